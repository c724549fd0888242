"""The live engine on a headless JACK server: output, timing, handoff, routing, safety, errors.

Each test that streams starts its own JACK server with the dummy backend (``jack_server`` in
tests/conftest.py): a real, clock-paced PortAudio device without a soundcard (DEVELOPERS.md,
"Real time without a soundcard").

Sources of the checks
---------------------
* Live equals offline: the project's own contract (DEVELOPERS.md, "Conventions the tests rely on":
  one Processor, live or in render; the recorded automation replays exactly) - the reference is
  livedyn.render run over the live recording, compared sample for sample.
* No call that takes the interpreter lock or allocates in the callback's compiled code:
  DEVELOPERS.md, "The live engine" (rules for the callback path); the check reads the LLVM IR numba
  emits (numba's cfunc wrapper and calling convention as found in numba 0.68's output, see
  ``IRModule``).
* Late and overrun blocks: a block is late when its host cycle starts more than 1.5 host periods
  after the previous cycle, or it runs longer than one period (engine/callback.py's
  ``timing_stage``; common practice, no source); the elapsed-time ring marks each late block.
* Ducking depth: the ducker attenuates by at most ``range`` dB while the key is far above
  threshold (livedyn.algorithms' ducker definition with ratio inf; common practice, no source).
* Safety stage: a non-finite sample mutes its block, the ceiling clips (README, "Cautions").
"""
from __future__ import annotations

import math
import os
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numba as nb
import numpy as np
import pytest
import soundfile as sf
from numba import carray

import livedyn
from livedyn.engine import callback as cb
from livedyn.engine import stream as st
from livedyn.engine.engine import ArraySource, Engine, FileSource
from livedyn.engine.intrinsics import call_job, int_to_voidptr
from livedyn.dsp.ircheck import FORBIDDEN, IRModule
from livedyn.engine.stream import DeviceError
from livedyn.params import NPARAM
from livedyn.render import Setup, render
from tests.conftest import jack_registry, jackd_pids, make_sure_gone
from tests.waiting import stream_for, stream_until, wait_for

FS = 48000
BS = 64
PERIOD_NS = int(round(1e9 * BS / FS))  # as the engine sets stats[S_PERIOD_NS]
# The engine fades in over 500 ms (Engine's fade_in_ms default); the fade gain reaches 1 within
# 24000 samples, plus one block of margin.
FADE = 24000 + BS
LIVEDYN = Path(sys.executable).parent / "livedyn"
ROOT = Path(__file__).resolve().parent.parent


# ---------------------------------------------------------------------------------------------
# helpers

def _run_to_end(eng, timeout=20.0, tail=0.1):
    """Wait until a file/array main source has played out (and the stream is healthy)."""
    t_end = time.monotonic() + timeout
    while not eng.source_finished:
        assert eng.watch(), eng.error
        assert time.monotonic() < t_end, "the source did not finish in time"
        time.sleep(0.02)
    stream_for(eng, tail)


def _stopped(eng):
    class _Ctx:
        def __enter__(self):
            return eng

        def __exit__(self, *exc):
            eng.stop()

    return _Ctx()


def _wav(path):
    return sf.read(str(path), dtype="float32", always_2d=True)[0]


def _bursts(rng, seconds, ch, burst_s=0.1, lo=0.03, hi=0.5):
    """Gaussian noise whose level jumps every burst_s seconds."""
    n = int(seconds * FS)
    steps = rng.uniform(lo, hi, int(math.ceil(seconds / burst_s)))
    env = np.repeat(steps, int(burst_s * FS))[:n]
    return (rng.standard_normal((n, ch)) * env[:, None]).astype(np.float32)


def _tone(seconds, freq, amp, ch=1):
    t = np.arange(int(seconds * FS)) / FS
    return np.repeat((amp * np.sin(2 * np.pi * freq * t))[:, None], ch, 1).astype(np.float32)


def _late_per_block(el, iv, period=PERIOD_NS):
    """The callback's own rule, per block: overran the period, or started more than 1.5
    periods after a block that did not overrun."""
    over = el > period
    prev_over = np.r_[False, over[:-1]]
    return over | ((2 * iv > 3 * period) & ~prev_over & (iv > 0))


def _ring_window(eng, b0, b1):
    idx = np.arange(b0, b1) % len(eng.elring)
    return eng.elring[idx, 0].copy(), eng.elring[idx, 1].copy(), eng.elring[idx, 2].copy()


class _Thread(threading.Thread):
    """A thread whose exception is re-raised by join()."""

    def __init__(self, fn):
        super().__init__(daemon=True)
        self.fn, self.exc = fn, None

    def run(self):
        try:
            self.fn()
        except BaseException as e:  # noqa: BLE001 - handed to the test thread
            self.exc = e

    def join(self, timeout=30.0):
        super().join(timeout)
        assert not self.is_alive(), "helper thread did not finish"
        if self.exc is not None:
            raise self.exc


# ---------------------------------------------------------------------------------------------
# 1. Live equals offline

COMP_SETTINGS = dict(threshold=-30, ratio=4, attack=5, release=80, lookahead=5, key_hpf=100)
COMP_CHANGES = [(0.7, "threshold", -20.0), (0.95, "ratio", 8.0), (1.2, "attack", 2.0),
                (1.45, "threshold", -36.0), (1.7, "ratio", 2.5), (1.95, "attack", 20.0),
                (2.2, "threshold", -26.0)]
DUCK_SETTINGS = dict(threshold=-30, range=12, attack=10, release=100, hold=50, lookahead=0)
DUCK_CHANGES = [(0.7, "threshold", -45.0), (1.0, "range", 20.0), (1.3, "release", 300.0),
                (1.6, "threshold", -25.0), (1.9, "range", 6.0), (2.2, "release", 40.0)]


def _live_run(rec, algorithm, settings, changes, main, key, kch, precision="float64",
              variants=False):
    """One live run of the processor on the sources, recorded, with changes from a thread."""
    from livedyn.dsp.precision import job_for

    proc = livedyn.Processor(algorithm, FS, 2, kch, precision=precision, **settings)
    eng = Engine(proc, BS, main_source=ArraySource(main),
                 key_source=ArraySource(key) if key is not None else None, record_dir=rec,
                 variants=variants)
    # The kernel behind the callback's one indirect call (see test 2) is one of the job cfuncs,
    # of the processor's precision.
    jobs = (job_for("dynamics", precision).address, job_for("limiter", precision).address)
    assert eng.table[0, 0] in jobs
    assert all(a in jobs for a in eng.extra_table[:eng.ud[cb.U_NEXTRA], 0])
    seqs = []

    def automate():  # parameter changes from another thread while the stream runs
        t0 = time.monotonic()
        for t, name, v in changes:
            time.sleep(max(0.0, t - (time.monotonic() - t0)))
            seqs.append(eng.set(name, v))

    with _stopped(eng.start()):
        th = _Thread(automate)
        th.start()
        th.join()
        _run_to_end(eng)
        snap = eng.snapshot()
    return proc, eng, snap, seqs, rec


@pytest.mark.parametrize("algorithm,precision,variants", [("compressor", "float64", False),
                                                          ("ducker", "float64", False),
                                                          ("compressor", "float32", False),
                                                          ("compressor", "float64", True)])
def test_live_output_equals_offline_render_of_the_recording(jack_server, tmp_path, algorithm,
                                                            precision, variants):
    rng = np.random.default_rng(7)
    seconds = 2.6
    main = _bursts(rng, seconds, 2)
    if algorithm == "compressor":
        settings, changes, key, kch = COMP_SETTINGS, COMP_CHANGES, None, 0
        if variants:
            # changes of setting while variants are installed: the running variant hands a
            # block of another setting to the general kernel until that setting's variant is
            # in (both made here first, so that the run sees them installed)
            from livedyn.dsp.dynamics import dynamics_modes
            from livedyn.dsp.variants import job_variant

            for det in ("peak", "rms"):
                p = livedyn.Processor(algorithm, FS, 2, detector=det, **settings).p
                job_variant(int(dynamics_modes(p)), precision)
            changes = sorted(changes + [(1.05, "detector", 1.0), (1.85, "detector", 0.0)])
    else:
        settings, changes, kch = DUCK_SETTINGS, DUCK_CHANGES, 1
        gate = np.repeat(rng.uniform(0, 1, 26) > 0.5, int(0.1 * FS))[:len(main)]
        key = (_tone(seconds, 700, 0.3)[:, 0] * gate)[:, None].astype(np.float32)
    for attempt in range(3):
        # A run in which the machine starved the feeder or the recorder (input not as the
        # source, or tap blocks dropped) says nothing about the processing: run it again.
        proc, eng, snap, seqs, rec = _live_run(tmp_path / f"live{attempt}", algorithm, settings,
                                              changes, main, key, kch, precision, variants)
        xin = _wav(rec / "main.wav")
        if snap["tap_dropped_blocks"] == 0 and np.array_equal(xin[:len(main)], main):
            break
        print(f"attempt {attempt}: the machine starved the stream's helpers; running again")
    else:
        pytest.fail("in 3 runs the machine never fed the stream without gaps")
    # the recorded automation holds every change at the frame where the callback applied it
    auto = livedyn.automation.Automation.load(rec / "automation.txt", proc.schema)
    recorded = [(n, v) for f, n, v in auto if f > 0]
    assert recorded == [(n, v) for _, n, v in changes]
    frames = [f for f, _, _ in auto if f > 0]
    assert all(f % BS == 0 for f in frames) and frames == sorted(frames)
    for seq, f in zip(seqs, frames):
        assert tuple(eng.seqlog[(seq // 2) % len(eng.seqlog)]) == (seq, f)

    setup = Setup(algorithm=algorithm, settings=[(k, str(v)) for k, v in settings.items()],
                  precision=precision)
    render(rec / "main.wav", tmp_path / "offline.wav", setup,
           key_path=(rec / "key.wav") if key is not None else None,
           automation_path=rec / "automation.txt", blocksize=BS, keep_latency=True,
           safety_ceiling_db=-1.0)
    live, off = _wav(rec / "out.wav"), _wav(tmp_path / "offline.wav")
    assert live.shape == off.shape == xin.shape and len(live) >= len(main)
    assert np.array_equal(xin[:len(main)], main)  # the callback saw the source unchanged
    assert np.array_equal(live[FADE:], off[FADE:])
    # not a vacuous comparison: the processor changed the signal substantially
    lat = proc.latency_samples
    body = slice(FADE, len(main))
    moved = np.abs(live[body] - xin[body.start - lat:body.stop - lat])
    assert moved.max() > 0.05
    if variants:  # variants ran: the first setting's, and one installed after a change
        assert len(eng._mem.variants) >= 2, eng._mem.variants


# ---------------------------------------------------------------------------------------------
# 2. The callback's compiled code: no interpreter lock, no allocation, no numba runtime

IR_SCRIPT = r'''
import sys
import numpy as np
import numba as nb
from numba import types
from livedyn.engine import callback as cb


# Negative controls: code the check must refuse.
@nb.cfunc(types.intc(types.int64), nopython=True, error_model="numpy")
def alloc_control(n):
    a = np.empty(n)  # allocates through numba's runtime (NRT)
    a[:] = 1.0
    return np.intc(a.sum())


@nb.cfunc(types.int64(types.int64, types.int64), nopython=True)
def raise_control(a, b):
    return a // b  # default (python) error model: raises ZeroDivisionError, under the GIL


# Positive control: the same division under the numpy error model raises nothing.
@nb.cfunc(types.int64(types.int64, types.int64), nopython=True, error_model="numpy")
def clean_control(a, b):
    return a // b


for name, f in [("native_callback", cb.native_callback), ("job_dynamics", cb.job_dynamics),
                ("job_limiter", cb.job_limiter), ("alloc_control", alloc_control),
                ("raise_control", raise_control), ("clean_control", clean_control)]:
    with open(f"{sys.argv[1]}/{name}.ll", "w") as fh:
        fh.write(f.inspect_llvm())
'''

@pytest.fixture(scope="module")
def callback_ir(tmp_path_factory):
    """LLVM IR of the callback, the job cfuncs and the controls, compiled afresh in a
    subprocess: numba does not keep IR for functions loaded from its cache, so the subprocess
    gets an empty NUMBA_CACHE_DIR (same source, flags and CPU: the same code as the cache)."""
    d = tmp_path_factory.mktemp("ir")
    env = dict(os.environ, NUMBA_CACHE_DIR=str(d / "cache"))
    script = d / "dump_ir.py"
    script.write_text(IR_SCRIPT)
    r = subprocess.run([sys.executable, str(script), str(d)], env=env, cwd=ROOT,
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    return {p.stem: p.read_text() for p in d.glob("*.ll")}




def test_callback_ir_reaches_no_gil_allocation_or_runtime_call(callback_ir):
    report = {}
    for name in ("native_callback", "job_dynamics", "job_limiter"):
        r = IRModule(callback_ir[name]).scan()
        report[name] = r
        print(f"{name}: reaches {r['functions']}\n  external calls {r['externals']}\n"
              f"  indirect calls {r['indirect_calls']}")
        assert r["violations"] == [], (name, r["violations"])
        assert not [e for e in r["externals"] if FORBIDDEN.match(e)]
    # the callback's indirect calls are the kernel calls through address tables (the kernel
    # slot, the incoming slot of a live swap, and the extra instances the bench runs), whose
    # entries are the job cfuncs (asserted on a real Engine in the live-equals-offline test)
    assert report["native_callback"]["indirect_calls"] == 3
    # the dynamics kernel makes three: a user algorithm's gain curve, detector and smoother,
    # through the addresses in the parameter array (livedyn.dsp.calls; each taken only when
    # its address is set)
    assert report["job_dynamics"]["indirect_calls"] == 3
    assert report["job_limiter"]["indirect_calls"] == 0
    assert "clock_gettime" in report["native_callback"]["externals"]
    assert any("dynamics_block" in f for f in report["job_dynamics"]["functions"])
    assert any("limiter_block" in f for f in report["job_limiter"]["functions"])
    # The wrapper's GIL path is really there and only dead because the statuses are constant 0:
    # followed blindly, every branch reaches numba_gil_ensure.
    blind = IRModule(callback_ir["native_callback"], prune=False).scan()
    assert any("numba_gil_ensure" in v for v in blind["violations"])


def test_ir_check_refuses_allocation_and_raising_code(callback_ir):
    alloc = IRModule(callback_ir["alloc_control"]).scan()["violations"]
    assert any("NRT_MemInfo_alloc" in v for v in alloc), alloc
    raising = IRModule(callback_ir["raise_control"]).scan()["violations"]
    assert any("may return status" in v for v in raising), raising
    assert any("numba_gil_ensure" in v for v in raising), raising
    assert IRModule(callback_ir["clean_control"]).scan()["violations"] == []


# ---------------------------------------------------------------------------------------------
# 3. Canary: blocks made to overrun on purpose are all counted as late

def _settled_stats(eng):
    """A copy of the statistics taken just after a block finished, not while one runs (a block
    updates several counters in turn: a copy taken in the middle would split them)."""
    f = eng.stats[cb.S_FRAMES]
    t_end = time.monotonic() + 1.0
    while eng.stats[cb.S_FRAMES] == f and time.monotonic() < t_end:
        time.sleep(0.0001)
    time.sleep(0.0002)  # the block's last few stores take microseconds
    return eng.stats.copy(), time.monotonic()


def _window(eng, seconds, during=None):
    """(stats delta, block range, wall seconds) of a stretch of the running stream; ``during``
    (on, off) callables run just inside its edges."""
    s0, t0 = _settled_stats(eng)
    if during:
        during[0]()
    time.sleep(seconds)
    if during:
        during[1]()
        time.sleep(0.02)
    s1, t1 = _settled_stats(eng)
    return s1 - s0, (int(s0[cb.S_BLOCKS]), int(s1[cb.S_BLOCKS])), t1 - t0


def test_canary_overruns_are_all_counted_as_late(jack_server):
    every, spin = 25, int(2 * PERIOD_NS)
    proc = livedyn.Processor("compressor", FS, 2)
    eng = Engine(proc, BS, main_source=ArraySource(np.zeros((FS, 2), np.float32), loop=True))
    with _stopped(eng.start()):
        stream_until(eng, 0.7)  # past the start-up
        # controls just before and just after: the machine's own late blocks
        before, _, before_s = _window(eng, 2.0)
        d, (b0, b1), dur = _window(eng, 3.0, (lambda: eng.set_canary(every, spin),
                                               lambda: eng.set_canary(0, 0)))
        after, _, after_s = _window(eng, 2.0)
        assert eng.watch(), eng.error
    el, iv, flags = _ring_window(eng, b0, b1)
    # the canary blocks: every `every`-th block (the callback's rule) from the first block that
    # spun to the last (the canary is off at both window edges)
    spun = np.nonzero(el >= spin)[0]
    grid = np.nonzero((np.arange(b0, b1) + 1) % every == 0)[0]
    canary = grid[(grid >= spun.min()) & (grid <= spun.max())]
    late_base = int(before[cb.S_LATE] + after[cb.S_LATE])
    base_s = before_s + after_s
    late = int(d[cb.S_LATE])
    injected = int(d[cb.S_CANARY])
    print(f"realtime {jack_server.realtime_granted}; controls: {int(before[cb.S_LATE])} + "
          f"{int(after[cb.S_LATE])} late in {base_s:.2f} s; canary: {late} late, {injected} "
          f"injected in {dur:.2f} s ({b1 - b0} blocks)")
    # counted, not timed: the canary fired on every `every`-th block of the window it was on
    assert injected == len(canary) > 0.9 * (b1 - b0) / every - 2
    # each of them spun, so ran longer than a period
    assert np.all(el[canary] >= spin) and spin > PERIOD_NS
    # the counter agrees block by block with the per-block record of the elapsed-time ring
    per_block = ((flags >> cb.LATE_BIT) & 1).astype(bool)
    assert late == int(per_block.sum())
    # every injected block is among the blocks counted late, one for one; the others counted
    # late are the machine's own (the control windows show its rate), never a double count
    assert np.all(per_block[canary]), "an injected overrun was not counted"
    assert late >= injected
    print(f"late beyond the injected: {late - injected} in {dur:.2f} s; the controls' rate "
          f"predicts {late_base * dur / base_s:.1f}")


# ---------------------------------------------------------------------------------------------
# 4. Under interpreter load: the native callback against a Python callback

class _Load:
    """A busy Python thread and a thread compiling fresh numba functions, as long as it runs."""

    def __init__(self):
        self.stop = threading.Event()
        self.compiled = 0

    def _busy(self):
        x = 0
        while not self.stop.is_set():
            for i in range(2000):
                x += i * i

    def _compile(self):
        import numba

        k = 0
        while not self.stop.is_set():
            k += 1
            src = (f"def f(a):\n    s = 0.0\n    for i in range(a.shape[0]):\n"
                   f"        s += a[i] * {k}.5 + i % {k + 2}\n    return s\n")
            ns = {}
            exec(src, ns)
            numba.njit(ns["f"])(np.ones(4))
            self.compiled += 1

    def __enter__(self):
        self.threads = [threading.Thread(target=t, daemon=True)
                        for t in (self._busy, self._compile)]
        for t in self.threads:
            t.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        for t in self.threads:
            t.join(30)


def _bad_blocks(late, flags, delivered, seconds):
    """Late-or-flagged blocks plus blocks that never came (the period grid minus deliveries)."""
    expected = int(round(seconds * FS / BS))
    lost = max(0, expected - delivered)
    return int(np.count_nonzero(late | (flags != 0))) + lost, lost


IDLE_SANE = 0.05  # share of bad blocks above which an idle stream says the machine is sick


def _native_under_load(seconds):
    """The native engine's bad blocks in an idle window, then under interpreter load."""
    x = (0.1 * np.random.default_rng(1).standard_normal((4 * FS, 2))).astype(np.float32)
    proc = livedyn.Processor("compressor", FS, 2, threshold=-30, ratio=4, lookahead=5)
    eng = Engine(proc, BS, main_source=ArraySource(x, loop=True))
    with _stopped(eng.start()):
        stream_until(eng, 0.5)
        # the machine's own noise floor, with no load in the process (a shared VM has late
        # wake-ups of its own: cyclictest on this machine saw up to 6 ms)
        _, (a0, a1), dur0 = _window(eng, seconds / 2)
        el0, iv0, fl0 = _ring_window(eng, a0, a1)
        idle, _ = _bad_blocks(_late_per_block(el0, iv0), fl0, a1 - a0, dur0)
        if idle > IDLE_SANE * dur0 * FS / BS:
            return dict(idle=idle, dur0=dur0, sick=True)
        with _Load() as load:
            d, (b0, b1), dur = _window(eng, seconds)
        assert eng.watch(), eng.error
    el, iv, fl = _ring_window(eng, b0, b1)
    n_late = _late_per_block(el, iv)
    native, native_lost = _bad_blocks(n_late, fl, b1 - b0, dur)
    return dict(idle=idle, dur0=dur0, sick=False, d=d, b=(b0, b1), dur=dur, el=el, fl=fl,
                n_late=n_late, native=native, native_lost=native_lost, compiled=load.compiled)


def test_native_callback_shrugs_off_interpreter_load_a_python_callback_does_not(jack_server):
    seconds = 10.0
    # A machine that cannot hold an idle 64-frame stream (a shared VM whose neighbour takes
    # its CPUs: the dummy server itself then skips cycles) makes the comparison meaningless.
    # Measure again, up to three times; if the idle stream never holds, say so and skip.
    tries = []
    for _ in range(3):
        m = _native_under_load(seconds)
        tries.append(m["idle"])
        if not m["sick"]:
            break
        print(f"idle stream: {m['idle']} bad blocks in {m['dur0']:.1f} s; measuring again")
    else:
        pytest.skip(f"this machine could not hold an idle {BS}-frame stream (bad blocks in "
                    f"{seconds / 2:g} s idle windows: {tries}, more than "
                    f"{100 * IDLE_SANE:g} %): the load comparison would be meaningless")
    idle, dur0, d, dur = m["idle"], m["dur0"], m["d"], m["dur"]
    b0, b1 = m["b"]
    el, fl, n_late = m["el"], m["fl"], m["n_late"]
    native, native_lost = m["native"], m["native_lost"]
    loadp = {q: float(np.percentile(el, q)) / PERIOD_NS for q in (50, 99, 99.9)}
    loadp["max"] = float(el.max()) / PERIOD_NS
    print(f"\nrealtime {jack_server.realtime_granted}; native: {b1 - b0} blocks in {dur:.2f} s, "
          f"{int(d[cb.S_LATE])} late, {int(d[cb.S_FLAGGED])} flagged, {native_lost} lost -> "
          f"{native} bad; {m['compiled']} compilations; callback load "
          + ", ".join(f"{k}: {100 * v:.2f} %" for k, v in loadp.items()))
    assert m['compiled'] > 0

    # the same kernel in a plain sounddevice stream with a Python callback, same load
    sd = st._sd()
    proc2 = livedyn.Processor("compressor", FS, 2, threshold=-30, ratio=4, lookahead=5)
    cap = int(2 * seconds * FS / BS)
    rec = np.zeros((cap, 3), np.int64)  # start time, elapsed, status flag per block
    count = [0]

    def python_callback(indata, outdata, frames, time_info, status):
        t0 = time.monotonic_ns()
        outdata[:] = proc2.process(indata)
        i = count[0]
        if i < cap:
            rec[i] = (t0, time.monotonic_ns() - t0, 1 if status else 0)
            count[0] = i + 1

    dev = st.find_device("system", "input")
    with sd.Stream(device=(dev, dev), samplerate=FS, blocksize=BS, channels=2, dtype="float32",
                   callback=python_callback, latency="low"):
        assert wait_for(lambda: count[0] >= FS // (2 * BS))  # half a second of blocks
        with _Load() as load2:
            c0, t0 = count[0], time.monotonic()
            time.sleep(seconds)
            c1, pdur = count[0], time.monotonic() - t0
    r = rec[c0:c1]
    piv = np.r_[0, np.diff(r[:, 0])]
    p_late = _late_per_block(r[:, 1], piv)
    python, python_lost = _bad_blocks(p_late, r[:, 2], c1 - c0, pdur)
    print(f"python: {c1 - c0} blocks in {pdur:.2f} s, {int(p_late.sum())} late, "
          f"{int(r[:, 2].sum())} flagged, {python_lost} lost -> {python} bad; "
          f"{load2.compiled} compilations")
    n_lf = int(np.count_nonzero(n_late | (fl != 0)))
    p_lf = int(np.count_nonzero(p_late | (r[:, 2] != 0)))
    print(f"late-or-flagged blocks: native {n_lf}, python {p_lf}; ratio python/native bad "
          f"blocks {python / max(native, 1):.1f} (native measured {native})")
    # A block that never came is the worst kind of late one: the ratio counts both. What the
    # load costs the native callback is its bad blocks beyond the machine's own noise floor
    # (the idle window, scaled to the same length); the Python callback must lose at least 20
    # times that, which also shows that the load was real.
    excess = max(native - idle * dur / dur0, 1.0)
    print(f"native bad blocks: {native} under load, {idle} in {dur0:.1f} s without; "
          f"load-attributable {excess:.0f}")
    assert python >= 20 * excess, (native, idle, python)


# ---------------------------------------------------------------------------------------------
# 5. A parameter set from another thread is applied at the next block at the latest

def test_parameter_set_from_another_thread_arrives_within_one_block(jack_server):
    proc = livedyn.Processor("compressor", FS, 2)
    eng = Engine(proc, BS, main_source=ArraySource(np.zeros((FS, 2), np.float32), loop=True))
    rng = np.random.default_rng(3)
    results = []

    def setter():
        for i in range(150):
            time.sleep(rng.uniform(0, 3 * BS / FS))  # land anywhere within blocks
            f_before = int(eng.stats[cb.S_FRAMES])
            seq = eng.set("threshold", -float(rng.integers(10, 60)))
            f_after = int(eng.stats[cb.S_FRAMES])
            applied = eng.wait_applied(seq)
            results.append((seq, f_before, f_after, applied, int(eng.stats[cb.S_PARAM_SEQ])))

    with _stopped(eng.start()):
        stream_until(eng, 0.3)
        th = _Thread(setter)
        th.start()
        th.join(60)
    r = np.array(results, dtype=np.int64)
    seq, f_before, f_after, applied, echoed = r.T
    assert np.all(echoed == seq)  # the callback echoed exactly this publication
    # S_FRAMES counts frames of finished blocks; the publication happened when the counter read
    # between f_before and f_after; the block that picks it up starts at that count (it began
    # after the publication) or one block later (it was running): never later than that.
    assert np.all(applied >= f_before)
    assert np.all(applied - f_after <= BS), (applied - f_after).max()
    assert np.all(applied % BS == 0)
    for s, a in zip(seq, applied):  # and the callback's own log agrees
        assert tuple(eng.seqlog[(s // 2) % len(eng.seqlog)]) == (s, a)
    spread = f_after - f_before
    print(f"publish bracket within one block for {np.mean(spread == 0):.0%} of sets; applied "
          f"frame - counter after publish: {sorted(set((applied - f_after).tolist()))}")


# ---------------------------------------------------------------------------------------------
# 6. Key input from a device channel and from a file ducks by `range`

DUCK = dict(threshold=-40, ratio="inf", range=9, attack=5, release=40, hold=0, knee=0)


def _gain_windows(main, out, key, win=2400):
    """Per window: key level dBFS (RMS), gain out/main dB."""
    n = min(len(main), len(out), len(key)) // win
    rows = []
    for i in range(n):
        s = slice(i * win, (i + 1) * win)
        k = float(np.sqrt(np.mean(key[s] ** 2)))
        a = float(np.sqrt(np.mean(main[s] ** 2)))
        b = float(np.sqrt(np.mean(out[s] ** 2)))
        gain = 20 * math.log10(b / a) if a > 1e-6 else math.nan  # nan: no main signal
        rows.append((i * win, 20 * math.log10(max(k, 1e-12)), gain))
    return np.array(rows)


def _assert_ducks_by_range(rec, rng_db, settle=6):
    """Windows after the fade-in: silent key (and silent for `settle` windows) -> 0 dB; loud key
    for `settle` windows -> -range dB."""
    g = _gain_windows(_wav(rec / "main.wav"), _wav(rec / "out.wav"), _wav(rec / "key.wav"))
    after_fade = (g[:, 0] >= FADE) & np.isfinite(g[:, 2])
    loud = g[:, 1] > -30
    silent = g[:, 1] < -120
    hist = np.array([i >= settle and bool(loud[i - settle:i + 1].all()) for i in range(len(g))])
    quiet = np.array([i >= settle and bool(silent[i - settle:i + 1].all())
                      for i in range(len(g))])
    ducked, open_ = g[after_fade & hist, 2], g[after_fade & quiet, 2]
    print(f"{rec.name}: silent-key windows {len(open_)}, gain {open_.min():.3f}.."
          f"{open_.max():.3f} dB; loud-key windows {len(ducked)}, gain {ducked.min():.3f}.."
          f"{ducked.max():.3f} dB")
    assert len(open_) >= 5 and len(ducked) >= 5
    assert np.all(np.abs(open_) < 0.05)
    assert np.all(np.abs(ducked + rng_db) < 0.1)


@pytest.mark.jack(capture=4, playback=4)
def test_key_from_a_device_channel_ducks_by_range(jack_server, tmp_path):
    main = _tone(2.0, 440, 0.1, 2)
    proc = livedyn.Processor("ducker", FS, 2, 1, **DUCK)
    rec = tmp_path / "device-key"
    eng = Engine(proc, BS, main_source=ArraySource(main, loop=True), key_inputs=[3],
                 outputs=[1, 2], record_dir=rec)
    # a second stream plays the key tone on its device output 3, patched to our input 3
    tone_proc = livedyn.Processor("compressor", FS, 1, ratio=1, threshold=0)
    with _stopped(eng.start()):
        stream_until(eng, 1.4)  # key input 3 hears the dummy capture port: silence, no ducking
        before = set(jack_server.connections())
        player = Engine(tone_proc, BS, main_source=ArraySource(_tone(1.0, 1000, 0.3), loop=True),
                        outputs=[3])
        with _stopped(player.start()):
            con = jack_server.connections()
            mine = [p for p, peers in con.items() if "system:capture_3" in peers
                    and p in before]
            theirs = [p for p, peers in con.items() if "system:playback_3" in peers
                      and p not in before]
            assert len(mine) == 1 and len(theirs) == 1, con
            jack_server.connect(theirs[0], mine[0])
            stream_for(eng, 1.6)
            assert player.watch() and eng.watch()
    _assert_ducks_by_range(rec, DUCK["range"])


def test_key_from_a_file_ducks_by_range(jack_server, tmp_path):
    key = np.concatenate([np.zeros((int(1.3 * FS), 1), np.float32), _tone(1.5, 1000, 0.3)])
    sf.write(str(tmp_path / "key-in.wav"), key, FS, subtype="FLOAT")
    main = _tone(len(key) / FS, 440, 0.1, 2)
    proc = livedyn.Processor("ducker", FS, 2, 1, **DUCK)
    rec = tmp_path / "file-key"
    eng = Engine(proc, BS, main_source=ArraySource(main),
                 key_source=FileSource(tmp_path / "key-in.wav", samplerate=FS), record_dir=rec)
    with _stopped(eng.start()):
        _run_to_end(eng)
    assert np.array_equal(_wav(rec / "key.wav")[:len(key)], key)  # the file, as played
    _assert_ducks_by_range(rec, DUCK["range"])


# ---------------------------------------------------------------------------------------------
# 7. Non-finite samples: the last stage mutes the block; live output stays finite

def test_safety_stage_mutes_a_non_finite_block_and_holds_the_ceiling():
    ceil = 10 ** (-1 / 20)
    for bad in (np.nan, np.inf, -np.inf):
        safe = np.zeros(cb.SAFE_SIZE)
        safe[cb.F_GAIN] = safe[cb.F_TARGET] = 1.0
        safe[cb.F_CEIL] = ceil
        stats = np.zeros(cb.STATS_SIZE, np.int64)
        y = np.full((BS, 2), 0.5, np.float32)
        y[17, 1] = bad
        cb.safety_stage(y, BS, 2, safe, 0, stats)
        assert stats[cb.S_NONFINITE_BLOCKS] == 1 and np.all(y == 0.0)
        y = np.full((BS, 2), 0.5, np.float32)
        y[::2] = 3.0
        y[1::4] = -3.0
        cb.safety_stage(y, BS, 2, safe, 0, stats)
        assert stats[cb.S_NONFINITE_BLOCKS] == 1  # a finite block is not counted
        assert np.all(y[::2] == np.float32(ceil)) and np.all(y[1::4] == np.float32(-ceil))
        assert np.all(y[3::4] == 0.5)
    # mute: the gain falls by F_MUTE_STEP per sample to 0 and stays there
    safe[cb.F_MUTE_STEP] = 1 / 32
    y = np.full((BS, 1), 0.5, np.float32)
    cb.safety_stage(y, BS, 1, safe, 1, stats)
    expect = 0.5 * np.maximum(1 - np.arange(1, BS + 1) / 32, 0)
    assert np.allclose(y[:, 0], expect, atol=1e-7) and np.all(y[31:] == 0)


def _with_non_finite(rng, seconds=1.6):
    x = (0.1 * rng.standard_normal((int(seconds * FS), 2))).astype(np.float32)  # below ceiling
    x[30000:30010, 0] = np.nan
    x[40000, 1] = np.inf
    x[50001] = -np.inf
    x[60100:60300] = np.nan
    return x


def test_non_finite_input_live_gives_finite_output(jack_server, tmp_path):
    rng = np.random.default_rng(11)
    x = _with_non_finite(rng)
    bad_blocks = np.unique(np.nonzero(~np.isfinite(x))[0] // BS)

    # processed: the processor replaces non-finite input by 0 itself (counted per value)
    proc = livedyn.Processor("compressor", FS, 2, threshold=-20, ratio=3)
    eng = Engine(proc, BS, main_source=ArraySource(x), record_dir=tmp_path / "processed")
    with _stopped(eng.start()):
        _run_to_end(eng)
        snap = eng.snapshot()
    out, xin = _wav(tmp_path / "processed/out.wav"), _wav(tmp_path / "processed/main.wav")
    assert np.all(np.isfinite(out))
    assert proc.nonfinite_count == np.count_nonzero(~np.isfinite(xin)) == \
        np.count_nonzero(~np.isfinite(x))
    assert snap["nonfinite_blocks"] == 0

    # bypassed: the raw input reaches the last stage, which mutes exactly the blocks that hold
    # a non-finite sample and passes every other block unchanged
    proc = livedyn.Processor("compressor", FS, 2)
    eng = Engine(proc, BS, main_source=ArraySource(x), record_dir=tmp_path / "bypassed")
    eng.bypass(True)
    with _stopped(eng.start()):
        _run_to_end(eng)
        snap = eng.snapshot()
    out, xin = _wav(tmp_path / "bypassed/out.wav"), _wav(tmp_path / "bypassed/main.wav")
    assert np.all(np.isfinite(out))
    seen_bad = np.unique(np.nonzero(~np.isfinite(xin))[0] // BS)
    assert snap["nonfinite_blocks"] == len(seen_bad) == len(bad_blocks)
    blk = np.arange(len(out)) // BS
    muted = np.isin(blk, seen_bad)
    assert np.all(out[muted] == 0.0)
    keep = ~muted & (np.arange(len(out)) >= FADE)
    assert np.array_equal(out[keep], xin[keep])


# ---------------------------------------------------------------------------------------------
# 8. Parameter writes at 1 kHz: the kernel never sees a torn or out-of-range parameter array

# The probe's own fields after a copy of the real job block (block_body sees JOB_SIZE of it).
PR_KERNEL, PR_LOG, PR_CAP, PR_N = cb.JOB_SIZE, cb.JOB_SIZE + 1, cb.JOB_SIZE + 2, cb.JOB_SIZE + 3
PROBE_SIZE = cb.JOB_SIZE + 8


@nb.cfunc(cb.JOB_SIG, nopython=True, error_model="numpy")
def _job_probe(jp):
    """In the audio thread: copy the parameter array the kernel is about to read into a log
    row (the callback's own copy, so it cannot be torn by the writer), then run the kernel."""
    job = carray(jp, (PROBE_SIZE,), np.int64)
    n = job[PR_N]
    if n < job[PR_CAP]:
        log = carray(int_to_voidptr(job[PR_LOG]), (job[PR_CAP], NPARAM), np.float64)
        p = carray(int_to_voidptr(job[cb.J_P]), (job[cb.J_PLEN],), np.float64)
        for i in range(job[cb.J_PLEN]):
            log[n, i] = p[i]
        job[PR_N] = n + 1
    call_job(job[PR_KERNEL], jp)


def test_parameter_writes_at_1khz_never_tear_or_leave_range(jack_server):
    proc = livedyn.Processor("compressor", FS, 2, threshold=-30)
    x = (0.2 * np.random.default_rng(5).standard_normal((FS, 2))).astype(np.float32)
    eng = Engine(proc, BS, main_source=ArraySource(x, loop=True))
    cap = 8192
    log = np.full((cap, NPARAM), np.nan)
    probe = np.zeros(PROBE_SIZE, np.int64)
    probe[:cb.JOB_SIZE] = eng.job
    probe[PR_KERNEL], probe[PR_LOG], probe[PR_CAP] = eng.table[0, 0], log.ctypes.data, cap
    eng.table[1] = (_job_probe.address, probe.ctypes.data)
    eng.ud[cb.U_KSLOT] = 1  # every block runs the kernel through the probe
    published = {proc.p.tobytes(): 0}
    schema = {prm.slot: prm for prm in proc.schema}
    rng = np.random.default_rng(9)
    ranges = {"threshold": (-80, 0), "ratio": (1, 30), "knee": (0, 24), "attack": (0, 500),
              "release": (1, 5000), "makeup": (-24, 24), "mix": (0, 100), "hold": (0, 2000)}
    refused = []

    def writer():
        t_next = time.monotonic()
        for i in range(2000):
            name = list(ranges)[i % len(ranges)]
            if i % 50 == 49:  # bad values are refused and publish nothing
                s0 = int(eng.ud[cb.U_SEQ])
                bad = [math.nan, -1e9, -math.inf][i % 3]  # out of every range
                with pytest.raises(livedyn.params.ParamError):
                    eng.set(name, bad)
                refused.append(int(eng.ud[cb.U_SEQ]) == s0)
            else:
                lo, hi = ranges[name]
                seq = eng.set(name, float(rng.uniform(lo, hi)))
                published[eng.pend.tobytes()] = seq
            t_next += 0.001
            time.sleep(max(0.0, t_next - time.monotonic()))

    with _stopped(eng.start()):
        assert wait_for(lambda: eng.stats[cb.S_BLOCKS] > 10)  # streaming
        th = _Thread(writer)
        b0 = int(eng.stats[cb.S_BLOCKS])
        th.start()
        th.join(60)
        b1 = int(eng.stats[cb.S_BLOCKS])
        last = int(eng.ud[cb.U_SEQ])
        assert wait_for(lambda: eng.stats[cb.S_PARAM_SEQ] >= last)  # the last write applied
        snap = eng.snapshot()
    n = int(probe[PR_N])
    rows = log[:n]
    print(f"{len(published) - 1} publications over {b1 - b0} blocks, {n} blocks probed, "
          f"{snap['param_seq']} last sequence applied, torn reads retried: "
          f"{int(eng.stats[cb.S_PARAM_TORN])}")
    assert all(refused) and len(refused) == 40
    # the writer made its 2000 writes (its 40 refusals come from the whole loop), and the probe
    # saw most of the blocks the stream counted meanwhile (counts, no clock)
    assert not th.is_alive()
    assert b1 - b0 > 0 and n > 0.75 * min(cap, b1 - b0)
    assert np.all(np.isfinite(rows))
    for slot, prm in schema.items():
        v = rows[:, slot]
        ok = (v >= prm.lo) & (v <= prm.hi)
        if prm.off_value is not None:
            ok |= v == prm.off_value
        assert ok.all(), (prm.name, v[~ok][:5])
    others = [i for i in range(NPARAM) if i not in schema]
    assert np.array_equal(rows[:, others], np.broadcast_to(proc.p[others], (n, len(others))))
    # every block saw exactly one whole published array, in publication order
    seqs = np.array([published.get(r.tobytes(), -1) for r in rows])
    assert np.all(seqs >= 0), f"{np.count_nonzero(seqs < 0)} blocks saw a mixed array"
    assert np.all(np.diff(seqs) >= 0)
    # writes come faster than blocks (1 kHz against 750 blocks a second): most blocks of the
    # writer's window saw a new array
    assert len(np.unique(seqs)) > 0.5 * (b1 - b0)


# ---------------------------------------------------------------------------------------------
# 9. The server killed under a running `livedyn run`

def _read_lines(pipe, sink):
    for line in pipe:
        sink.append((time.monotonic(), line.rstrip("\n")))


def test_server_killed_mid_stream_livedyn_reports_and_exits(tmp_path):
    from livedyn.engine.jackserver import JackServer

    p = subprocess.Popen([str(LIVEDYN), "run", "--headless", "--key-demo", "--seconds", "30",
                          "--no-ui", "--record", str(tmp_path / "rec")],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    out, err = [], []
    readers = [threading.Thread(target=_read_lines, args=(p.stdout, out), daemon=True),
               threading.Thread(target=_read_lines, args=(p.stderr, err), daemon=True)]
    for r in readers:
        r.start()
    name = None
    try:
        t_end = time.monotonic() + 60
        while time.monotonic() < t_end and p.poll() is None:
            text = "\n".join(line for _, line in out)
            m = re.search(r"JACK server (\S+) \(dummy backend", text)
            if m:
                name = m.group(1)
            if name and re.search(r"^\s*\d+\.\d s  in ", text, re.M):
                break  # streaming, one status line out
            time.sleep(0.05)
        assert name, (out, err)
        pids = jackd_pids(name)
        assert len(pids) == 1
        t_kill = time.monotonic()
        os.kill(pids[0], signal.SIGKILL)
        try:
            rc = p.wait(timeout=60)  # generous: a loaded machine; the point is that it exits
        except subprocess.TimeoutExpired:
            rc = None
        took = time.monotonic() - t_kill
        for r in readers:
            r.join(5)
        errors = [line for _, line in err]
        print(f"exit code {rc} {took:.2f} s after the kill; stderr: {errors}")
        assert rc is not None, "livedyn hung after its server died"
        assert rc != 0
        assert len(errors) == 1 and errors[0].startswith("livedyn: error: ")
        assert "JACK server" in errors[0] and "stopped" in errors[0]
        assert not any("Traceback" in line for _, line in out + err)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait(10)
        if name:
            srv = JackServer(name=name)
            srv.reclaim()  # the killed server's slot in JACK's table, always
            make_sure_gone(srv)
    assert not jackd_pids(name)
    assert name not in [n for _, n in jack_registry()]


# ---------------------------------------------------------------------------------------------
# 10. What cannot be had fails clearly before the stream opens

def _one_line(exc):
    text = str(exc)
    assert text and "\n" not in text
    return text


def test_bad_device_rate_or_channel_fails_before_the_stream_opens(jack_server, tmp_path):
    comp = livedyn.Processor("compressor", FS, 2)
    with pytest.raises(DeviceError) as e:
        Engine(comp, BS, device="no-such-card")
    assert "no-such-card" in _one_line(e.value) and "'system'" in str(e.value)
    with pytest.raises(DeviceError) as e:
        Engine(comp, BS, device="7")
    assert "device 7" in _one_line(e.value)
    with pytest.raises(DeviceError) as e:
        Engine(comp, BS, outputs=[1, 5])
    assert "output channel 5" in _one_line(e.value) and "2 output channels" in str(e.value)
    with pytest.raises(DeviceError) as e:
        Engine(comp, BS, main_inputs=[1, 3])
    assert "main input channel 3" in _one_line(e.value)
    duck = livedyn.Processor("ducker", FS, 2, 1)
    with pytest.raises(DeviceError) as e:
        Engine(duck, BS, key_inputs=[4])
    assert "key input channel 4" in _one_line(e.value) and "2 input channels" in str(e.value)
    # the rate is checked when the stream is asked for, before it is opened or files are made
    slow = livedyn.Processor("compressor", 44100, 2)
    eng = Engine(slow, BS, record_dir=tmp_path / "rec")
    with pytest.raises(DeviceError) as e:
        eng.start()
    assert "44100" in _one_line(e.value) and "48000" in str(e.value)
    assert eng.stream is None and not (tmp_path / "rec").exists()
    assert not [p for p in jack_server.ports() if p.startswith("PortAudio:")]  # no ports made


@pytest.mark.parametrize("args, words", [
    (["--device", "no-such-card"], ["no-such-card"]),
    (["--device", "system", "--samplerate", "44100"], ["44100", "48000"]),
    (["--device", "system", "--outputs", "1,5"], ["output channel 5"]),
    (["--device", "system", "--algorithm", "ducker", "--key-inputs", "4"],
     ["key input channel 4"]),
])
def test_cli_run_refuses_what_the_device_cannot_do_in_one_line(jack_server, tmp_path, args,
                                                               words):
    # not headless: the device is the test's own server (JACK_DEFAULT_SERVER in os.environ)
    r = subprocess.run([str(LIVEDYN), "run", "--seconds", "1", "--no-ui", "--record",
                        str(tmp_path / "rec"), *args], capture_output=True, text=True,
                       timeout=120, cwd=tmp_path)
    lines = r.stderr.splitlines()
    assert r.returncode == 2, r.stderr
    assert len(lines) == 1 and lines[0].startswith("livedyn: error: "), r.stderr
    assert all(w in lines[0] for w in words), lines[0]
    assert "stream reports" not in r.stdout  # the stream never opened
    assert not (tmp_path / "rec").exists()

"""Defects of the live engine, each pinned by a test that failed before its fix.

* Parameter publication is a sequence lock (DEVELOPERS.md, "The live engine"): the control
  side stages a whole parameter array privately and copies it into the array the callback
  reads only while the sequence number is odd, so a block sees one whole publication or the
  previous one, never a mix.
* A live swap that gives up (the stream stalled) is cancelled atomically: either the callback
  had switched (and the engine then describes the new version) or it never will.
* The native stream owns every array its callback touches; every way of stopping stops and
  closes the stream before any of them is freed.
* A callback with more frames than the engine's maximum is processed in pieces: counted, with
  continuous frame counters and recordings.
* The callback's C types and clock ids are per platform; an unsupported platform is refused
  in one line.
"""
from __future__ import annotations

import gc
import os
import subprocess
import sys
import threading
import time
import weakref
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

import livedyn
from livedyn import presets
from livedyn.engine import callback as cb
from livedyn.engine.engine import ArraySource, Engine
from livedyn.params import NPARAM
from tests.conftest import jack_registry, jackd_pids, make_sure_gone
from tests.test_engine import PR_CAP, PR_KERNEL, PR_LOG, PR_N, PROBE_SIZE, _job_probe

FS = 48000
BS = 64
ROOT = Path(__file__).resolve().parent.parent


def _wait(cond, timeout=10.0, step=0.005):
    t_end = time.monotonic() + timeout
    while time.monotonic() < t_end:
        if cond():
            return True
        time.sleep(step)
    return cond()


def _noise(seconds, ch=2, seed=5):
    return (0.2 * np.random.default_rng(seed).standard_normal((int(FS * seconds), ch))
            ).astype(np.float32)


# ---------------------------------------------------------------------------------------------
# the sequence lock: whole presets, every slot changed, at 1 kHz

PRESET_A = {"threshold": -30.0, "ratio": 4.0, "knee": 6.0, "attack": 5.0, "release": 100.0,
            "hold": 0.0, "makeup": 0.0, "automakeup": 0.0, "detector": 0.0, "rms_time": 10.0,
            "ballistics": 0.0, "domain": 0.0, "topology": 0.0, "lookahead": 0.0, "mix": 100.0,
            "ceiling": 0.0, "key": 0.0, "key_hpf": 100.0, "key_lpf": 8000.0,
            "key_bpf": 1000.0, "key_q": 1.0, "link": 0.0}
PRESET_B = {"threshold": -10.0, "ratio": 2.0, "knee": 0.0, "attack": 20.0, "release": 300.0,
            "hold": 50.0, "makeup": 3.0, "automakeup": 1.0, "detector": 1.0, "rms_time": 30.0,
            "ballistics": 1.0, "domain": 1.0, "topology": 1.0, "lookahead": 2.0, "mix": 50.0,
            "ceiling": -3.0, "key": 0.0, "key_hpf": 200.0, "key_lpf": 4000.0,
            "key_bpf": 2000.0, "key_q": 2.0, "link": 1.0}


def test_whole_presets_published_at_1khz_are_never_read_mixed(jack_server, tmp_path):
    proc = livedyn.Processor("compressor", FS, 2, key_channels=1)
    schema = proc.schema
    assert set(PRESET_A) == set(schema.names()) == set(PRESET_B)
    # every slot changes but the key input, which must stay main for the feedback topology
    assert [n for n in PRESET_A if PRESET_A[n] == PRESET_B[n]] == ["key"]
    files = []
    for name, vals in (("a", PRESET_A), ("b", PRESET_B)):
        files.append(presets.save(presets.Preset("compressor", dict(vals)),
                                  tmp_path / f"{name}.toml"))
    eng = Engine(proc, BS, main_source=ArraySource(_noise(1.0), loop=True),
                 key_source=ArraySource(_noise(1.0, 1, seed=6), loop=True))
    cap = 8192
    log = np.full((cap, NPARAM), np.nan)
    probe = np.zeros(PROBE_SIZE, np.int64)
    probe[:cb.JOB_SIZE] = eng.job
    probe[PR_KERNEL], probe[PR_LOG], probe[PR_CAP] = eng.table[0, 0], log.ctypes.data, cap
    eng.table[1] = (_job_probe.address, probe.ctypes.data)
    eng.ud[cb.U_KSLOT] = 1  # every block runs the kernel through the probe
    slots = np.array([schema[n].slot for n in PRESET_A])
    whole = {}
    for vals in (PRESET_A, PRESET_B):
        whole[tuple(vals[n] for n in PRESET_A)] = vals
    initial = tuple(float(proc.p[s]) for s in slots)
    loads = []

    def writer():
        t_next = time.monotonic()
        for i in range(1500):
            eng.load_preset(files[i % 2])
            loads.append(i)
            t_next += 0.001
            time.sleep(max(0.0, t_next - time.monotonic()))

    eng.start()
    try:
        time.sleep(0.1)
        th = threading.Thread(target=writer)
        th.start()
        th.join(60)
        time.sleep(0.05)
    finally:
        eng.stop()
    n = int(probe[PR_N])
    rows = [tuple(r) for r in log[:n, slots]]
    mixed = [r for r in rows if r not in whole and r != initial]
    kinds = {whole[r] is PRESET_A for r in rows if r in whole}
    print(f"{len(loads)} presets loaded, {n} blocks probed, {len(mixed)} mixed, torn reads "
          f"retried {int(eng.stats[cb.S_PARAM_TORN])}")
    assert len(loads) == 1500 and n > 500
    assert kinds == {True, False}  # both presets were heard
    assert mixed == [], f"{len(mixed)} of {n} blocks read a mix of two presets"


# ---------------------------------------------------------------------------------------------
# a swap that gives up is cancelled, atomically

def test_a_swap_that_gives_up_is_cancelled_and_never_finishes_later(jack_server):
    from livedyn.engine.engine import EngineError

    proc = livedyn.Processor("compressor", FS, 2, threshold=-30)
    eng = Engine(proc, BS, main_source=ArraySource(_noise(2.0), loop=True))
    eng.start()
    try:
        assert _wait(lambda: eng.stats[cb.S_BLOCKS] > 200)
        result = {}

        def swapper():
            try:  # a long crossfade: the swap is still running when the callback stalls
                result["info"] = eng.swap("compressor", xfade_ms=1500, stall_seconds=0.3)
            except EngineError as e:
                result["error"] = str(e)

        th = threading.Thread(target=swapper)
        th.start()
        assert _wait(lambda: eng.stats[cb.S_SWAP_BLOCKS] > 5)
        eng.set_canary(1, 700_000_000)  # every block now takes 0.7 s: the stream stalls
        th.join(10)
        eng.set_canary(0, 0)
        assert "error" in result and "stopped" in result["error"], result
        blocks = int(eng.stats[cb.S_BLOCKS])
        # blocks resume; a pending request would now run its crossfade to the end (1.5 s)
        assert _wait(lambda: eng.stats[cb.S_BLOCKS] > blocks + 1.6 * FS / BS, timeout=15)
        assert int(eng.stats[cb.S_SWAPS]) == 0 and int(eng.ud[cb.U_KSLOT]) == 0
        assert eng.proc is proc
        # the engine and the callback agree: a parameter reaches the processor that runs
        seq = eng.set("threshold", -12.0)
        assert eng.wait_applied(seq, timeout=2.0) is not None
        assert proc.p[proc.schema["threshold"].slot] == -12.0
        # and the next swap goes through
        info = eng.swap("compressor", xfade_ms=5)
        assert int(eng.stats[cb.S_SWAPS]) == 1 and eng.proc is not proc
        assert info["carried"] and eng.get("threshold") == -12.0
    finally:
        eng.set_canary(0, 0)
        eng.stop()


# ---------------------------------------------------------------------------------------------
# the stream owns its arrays; every stop path stops and closes it first

def test_stop_with_an_error_set_still_stops_and_closes_the_stream(jack_server):
    proc = livedyn.Processor("compressor", FS, 2)
    eng = Engine(proc, BS, main_source=ArraySource(_noise(1.0), loop=True))
    eng.start()
    assert _wait(lambda: eng.stats[cb.S_BLOCKS] > 100)
    eng.error = "a failure reported by whoever ran the engine"  # as the command line does
    stream = eng.stream
    eng.stop()
    blocks = int(eng.stats[cb.S_BLOCKS])
    time.sleep(0.1)
    assert int(eng.stats[cb.S_BLOCKS]) == blocks  # no callback runs any more
    assert stream.state == "closed" and stream.ptr is None and stream.keep is None
    assert not any(t.is_alive() for t in eng._threads)


def test_an_engine_dropped_without_stop_stops_its_stream_and_closes_its_recordings(
        jack_server, tmp_path):
    proc = livedyn.Processor("compressor", FS, 2)
    eng = Engine(proc, BS, main_source=ArraySource(_noise(1.0), loop=True),
                 record_dir=tmp_path / "rec")
    eng.start()
    assert _wait(lambda: eng.stats[cb.S_FRAMES] > FS // 2)
    stream, stats, threads = eng.stream, eng.stats, list(eng._threads)
    gone = weakref.ref(eng)
    del eng
    # the helper threads hold it only between their rounds (a starved machine stretches them)
    assert _wait(lambda: (gc.collect(), gone() is None)[1], timeout=20.0)
    assert stream.state == "closed" and stream.keep is None
    frames = int(stats[cb.S_FRAMES])
    time.sleep(0.1)
    assert int(stats[cb.S_FRAMES]) == frames
    assert _wait(lambda: not any(t.is_alive() for t in threads))
    for name in ("main", "out"):
        data, fs = sf.read(tmp_path / "rec" / f"{name}.wav")
        assert fs == FS and len(data) > FS // 4  # complete files, closed


STOP_AFTER_KILL = r'''
import os, signal, sys, time
import numpy as np
from livedyn.engine import stream as st
from livedyn.engine.jackserver import JackServer
import livedyn
from livedyn.engine.engine import ArraySource, Engine
srv = JackServer(48000, 64, name=sys.argv[1]).start()
st.reinitialise()
proc = livedyn.Processor("compressor", 48000, 2)
x = (0.2 * np.random.default_rng(1).standard_normal((48000, 2))).astype(np.float32)
eng = Engine(proc, 64, device="system", main_source=ArraySource(x, loop=True),
             record_dir=sys.argv[2])
eng.start()
while eng.stats[1] < 24000:
    time.sleep(0.01)
os.killpg(srv.proc.pid, signal.SIGKILL)
srv.proc.wait()
while eng.watch():
    time.sleep(0.02)
eng.stop()
print("state", eng.stream.state, len(st.abandoned()), st.abandoned()[0].keep is eng._mem,
      int(eng.stats[1]), flush=True)
os._exit(0)  # PortAudio cannot be terminated once its server is gone
'''


def test_stop_after_the_server_was_killed_keeps_the_stream_and_closes_the_take(tmp_path):
    from livedyn.engine.jackserver import JackServer

    name = f"livedyn-test-kill-{os.getpid()}"
    script = tmp_path / "kill.py"
    script.write_text(STOP_AFTER_KILL)
    rec = tmp_path / "rec"
    try:
        r = subprocess.run([sys.executable, str(script), name, str(rec)], capture_output=True,
                           text=True, timeout=60, cwd=ROOT)
    finally:
        srv = JackServer(name=name)
        srv.reclaim()
        make_sure_gone(srv)
    assert r.returncode == 0, r.stderr[-2000:]
    line = [t for t in r.stdout.splitlines() if t.startswith("state")][0].split()
    assert line[1:4] == ["abandoned", "1", "True"], line  # kept, with its memory
    frames = int(line[4])
    for f in ("main", "out"):
        data, fs = sf.read(rec / f"{f}.wav")
        assert len(data) == frames  # every frame the callback produced is in the take
    assert (rec / "automation.txt").exists()
    assert name not in [n for _, n in jack_registry()] and not jackd_pids(name)


def _rss_kib():
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def _resources():
    return (_rss_kib(), len(os.listdir("/proc/self/fd")), len(os.listdir("/proc/self/task")),
            threading.active_count())


def test_100_start_stop_cycles_leave_memory_files_and_threads_flat(jack_server, tmp_path):
    proc = livedyn.Processor("compressor", FS, 2)
    x = _noise(0.2)
    seen = []
    for i in range(100):
        eng = Engine(proc, BS, main_source=ArraySource(x, loop=True), meters=False,
                     record_dir=(tmp_path / f"r{i}") if i % 10 == 0 else None,
                     fade_in_ms=1.0, fade_out_ms=1.0)
        eng.start()
        assert _wait(lambda: eng.stats[cb.S_BLOCKS] >= 5)
        eng.stop()
        assert eng.stream.state == "closed"
        del eng
        if i in (9, 99):
            gc.collect()
            seen.append(_resources())
    (rss0, fd0, task0, thr0), (rss1, fd1, task1, thr1) = seen
    print(f"after 10 cycles: RSS {rss0} KiB, {fd0} open files, {task0} threads "
          f"({thr0} Python); after 100: RSS {rss1} KiB ({rss1 - rss0:+d}), {fd1} files, "
          f"{task1} threads ({thr1} Python)")
    assert fd1 == fd0 and task1 == task0 and thr1 == thr0
    # 90 more cycles of about 1.5 MiB of engine arrays each: flat means far less than one
    # cycle's worth per ten cycles
    assert rss1 - rss0 < 8 * 1024


# ---------------------------------------------------------------------------------------------
# a callback with more frames than the engine's maximum

def _call(eng, inp, frames):
    import ctypes

    f = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_ulong,
                         ctypes.c_void_p, ctypes.c_ulong, ctypes.c_void_p)(
        cb.native_callback.address)
    out = np.zeros((frames, eng.n_out), np.float32)
    assert f(inp.ctypes.data, out.ctypes.data, frames, None, 0, eng.ud.ctypes.data) == 0
    return out


def _tap(eng):
    got = np.zeros((1 << 14, eng.tap_width), np.float32)
    return got[:cb.ring_take(eng.tap_ring[0], got)].copy()


def test_a_callback_larger_than_the_maximum_is_processed_in_pieces_and_counted(jack_server):
    x = _noise(0.05)[:2000]
    outs, taps, engines = [], [], []
    for calls in ([2000], [250] * 8):  # one oversized callback, or eight that fit
        proc = livedyn.Processor("compressor", FS, 2, threshold=-30, ratio=4)
        eng = Engine(proc, BS, max_frames=256, fade_in_ms=0.01)
        o, pos = [], 0
        for n in calls:
            inp = np.zeros((n, eng.n_in), np.float32)
            inp[:, :2] = x[pos:pos + n]
            o.append(_call(eng, inp, n))
            pos += n
        outs.append(np.concatenate(o))
        taps.append(_tap(eng))
        engines.append(eng)
    big, small = engines
    assert int(big.stats[cb.S_FRAMES]) == 2000 == int(small.stats[cb.S_FRAMES])
    assert int(big.stats[cb.S_BLOCKS]) == 1
    assert big.snapshot()["oversized_callbacks"] == 1
    assert small.snapshot()["oversized_callbacks"] == 0
    assert np.array_equal(taps[0][:, :2], x) and len(taps[0]) == 2000  # the recording is whole
    assert np.abs(outs[0][100:]).max() > 0.05  # not silence
    assert np.array_equal(outs[0], outs[1])  # the same as blocks that fit
    assert np.array_equal(taps[0], taps[1])


def test_a_blocksize_above_the_maximum_is_refused_when_the_engine_is_built(jack_server):
    proc = livedyn.Processor("compressor", FS, 2)
    with pytest.raises(ValueError) as e:
        Engine(proc, 512, max_frames=256)
    assert "blocksize 512" in str(e.value) and "256" in str(e.value)
    assert "\n" not in str(e.value)


# ---------------------------------------------------------------------------------------------
# platform guards

def test_clock_ids_and_the_callback_types_are_per_platform_or_refused_in_one_line():
    from livedyn.engine.intrinsics import PlatformError, platform_clocks

    # this platform's ids as Python's own time module gives them (an independent reference)
    assert platform_clocks() == (time.CLOCK_MONOTONIC, time.CLOCK_THREAD_CPUTIME_ID)
    assert platform_clocks("linux", 8) == (1, 3)
    assert platform_clocks("darwin", 8) == (6, 16)
    for plat, size in (("win32", 4), ("linux", 4), ("freebsd14", 8), ("darwin", 4)):
        with pytest.raises(PlatformError) as e:
            platform_clocks(plat, size)
        msg = str(e.value)
        assert plat in msg and f"{8 * size}-bit" in msg and "\n" not in msg

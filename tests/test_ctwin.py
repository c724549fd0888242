"""The plain-C twins (livedyn/bench/ctwin) agree with the numba kernels; the build helper and harness work.

Reference for the agreement checks: the numba kernels livedyn.dsp.dynamics.dynamics_block and
livedyn.dsp.limiter.limiter_block, of which livedyn/bench/ctwin/kernels.c is an independent C
transcription (same IEEE-754 double operations in the same order, the same libm functions, no
fast math, no multiply-add contraction on either side: -ffp-contract=off for gcc, and numba
without fastmath lets LLVM contract nothing). Outputs, traces and final states are therefore
expected to be bit-identical, and that is what is asserted.

Every test that needs the C twin is skipped, with the build helper's one-line note, when this
machine has no C compiler; the tests of that skip path run everywhere.
"""
import math
import shutil
import subprocess

import numpy as np
import pytest

import livedyn.bench.ctwin as ct
import livedyn.bench.kernels as bk
from livedyn.bench.kernels import CASES, CTWIN_ROW_KEYS, ROW_KEYS, noise_bursts, run_ctwin, run_kernels
from livedyn.dsp import layout as L
from livedyn.dsp import stages as S
from livedyn.params import ParamError
from livedyn.processor import Processor
from tests.kernel_cases import LIMITER_CASES, LIMITER_IDS

FS = 48000


@pytest.fixture(scope="module")
def lib():
    try:
        return ct.load()
    except ct.CTwinUnavailable as exc:
        pytest.skip(str(exc))


# ---- signals --------------------------------------------------------------------------------

def dirty(x, seed):
    """Non-finite and subnormal float32 samples in x (the kernels replace / keep them)."""
    rng = np.random.default_rng(seed)
    x = x.copy()
    idx = rng.choice(x.shape[0], 6, replace=False)
    x[idx[0], 0] = np.nan
    x[idx[1], -1] = np.inf
    x[idx[2], 0] = -np.inf
    x[idx[3:], :] = np.float32(1e-41)
    return x


def sweep(frames, channels, lo_db=-70.0, hi_db=-10.0):
    """997 Hz sine whose level goes lo -> hi -> lo dBFS (slow threshold crossings)."""
    n = np.arange(frames)
    level = lo_db + (hi_db - lo_db) * (1.0 - np.abs(2.0 * n / frames - 1.0))
    x = 10.0 ** (level / 20.0) * np.sin(2 * np.pi * 997.0 * n / FS)
    return np.repeat(x[:, None], channels, axis=1).astype(np.float32)


def run_both(lib, algorithm, settings=None, *, frames=2400, blocksize=100, channels=2,
             key_channels=0, schedule=None, seed=0, trace=True, gain=1.0, signal="bursts"):
    """Numba kernel and C twin block by block from identical fresh state; asserts bit-identity.

    ``schedule`` maps a block index to {parameter: value} set (validated, via Processor.set)
    before that block on both sides.
    """
    proc = Processor(algorithm, FS, channels, key_channels, **(settings or {}))
    kind = proc.algorithm.kind
    x = dirty(noise_bursts(seed, frames, channels, FS) * np.float32(gain), seed)
    if signal == "sweep":
        x = x + sweep(frames, channels)
    key = dirty(noise_bursts(seed + 1, frames, key_channels, FS), seed + 1) if key_channels \
        else x
    sides = [dict(fn=fn, p=proc.p.copy(), st=proc.st.copy(), ring=proc.ring.copy(),
                  y=np.zeros_like(x)) for fn in (proc._kernel, lib.kernel(kind))]
    ncols = proc.st.shape[1]
    for b, i in enumerate(range(0, frames, blocksize)):
        if schedule and b in schedule:
            for name, value in schedule[b].items():
                proc.set(name, value)
            for s in sides:
                s["p"][:] = proc.p
        n = min(blocksize, frames - i)
        trs = []
        for s in sides:
            tr = np.zeros((L.NTRACE, n if trace else 0, ncols))
            s["fn"](x[i:i + n], key[i:i + n], s["y"][i:i + n], s["p"], s["st"], s["ring"], tr)
            trs.append(tr)
        assert np.array_equal(trs[0], trs[1], equal_nan=True), f"trace differs in block {b}"
    k, c = sides
    assert np.array_equal(k["y"], c["y"]), (
        f"max |numba - C| = {np.nanmax(np.abs(k['y'].astype(float) - c['y'])):.3g}")
    assert np.array_equal(k["st"], c["st"], equal_nan=True), (
        f"state rows differ: {sorted(set(np.nonzero(k['st'] != c['st'])[0].tolist()))}")
    assert np.array_equal(k["ring"], c["ring"])
    assert np.isfinite(k["y"]).all()
    return k, proc


# ---- agreement ------------------------------------------------------------------------------

@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_c_twin_matches_every_benchmarked_case(lib, case):
    # Reference: the numba kernels (module docstring). 37-frame blocks: boundaries everywhere.
    k, _ = run_both(lib, case.algorithm, case.settings, key_channels=case.key_channels,
                    blocksize=37, seed=11)
    assert k["st"][L.S_NONFINITE, 0] >= 3  # dirty() put three non-finite main samples in


@pytest.mark.parametrize("settings", [
    dict(detector="rms", rms_time=3.0, knee=0.0),
    dict(ballistics="decoupled", hold=5.0, attack=2.0, release=40.0),
    dict(domain="linear", hold=3.0, threshold=-30.0, ratio="inf"),
    dict(domain="linear", ballistics="decoupled", detector="rms"),
    dict(domain="linear", ballistics="decoupled", hold=4.0, release=30.0),
    dict(topology="feedback", key_lpf=3000.0, ratio=8.0, makeup=4.0),
    dict(link="none", key_bpf=1000.0, key_q=2.0),
    dict(key_hpf=80.0, key_lpf=6000.0, key_bpf=900.0, key_q=0.7),
    dict(link="mean", automakeup="on", makeup=3.0, mix=60.0, ceiling=-6.0, knee=12.0),
], ids=["rms", "decoupled+hold", "linear", "linear+decoupled+rms", "linear+decoupled+hold",
        "feedback+lpf", "link-none+bpf", "three-filters", "mean+automakeup+mix+ceiling"])
def test_c_twin_matches_compressor_settings(lib, settings):
    # Reference: the numba kernel dynamics_block.
    run_both(lib, "compressor", settings, seed=3)


def test_c_twin_matches_lookahead_changes_and_glides_mid_stream(lib):
    # Reference: the numba kernel. Lookahead 0 -> 5 ms (block 3) -> 2 ms (block 5, inside the
    # 480-frame crossfade, so the change is pending until it ends, inside a block) -> 0 ms;
    # threshold, makeup, ratio and knee jumps run the per-sample glide long enough to snap.
    sched = {3: dict(lookahead=5.0, threshold=-40.0), 5: dict(lookahead=2.0, makeup=6.0),
             7: dict(lookahead=0.0), 14: dict(ratio=2.0, knee=0.0)}
    k, _ = run_both(lib, "compressor", dict(key_hpf=100.0, automakeup="on"), frames=14400,
                    blocksize=200, schedule=sched, seed=5, trace=False)
    assert k["st"][L.S_DCUR, 0] == 0 and k["st"][L.S_XF, 0] == 0
    assert k["st"][L.S_THR, 0] == -40.0


@pytest.mark.parametrize("algorithm,settings,key_channels", [
    ("expander", dict(knee=0.0, hysteresis=3.0, detector="rms", link="mean"), 0),
    ("expander", dict(ratio="inf", link="none", lookahead=1.0), 0),
    ("expander", dict(knee=10.0, ratio=3.0, hold=20.0), 0),
    ("gate", dict(hysteresis=6.0, hold=2.0, lookahead=1.0, mix=80.0), 0),
    ("ducker", dict(ballistics="decoupled", detector="peak", knee=0.0, ratio=3.0), 2),
    ("ducker", dict(link="none", hold=0.0), 1),
    ("ducker", dict(link="none", key_hpf=200.0), 2),
], ids=["expander-rms-mean", "expander-inf-none", "expander-knee-hold", "gate-hyst-hold",
        "ducker-decoupled", "ducker-mono-key-none", "ducker-stereo-key-none"])
def test_c_twin_matches_other_laws(lib, algorithm, settings, key_channels):
    # Reference: the numba kernel. Noise bursts, then a slow sweep through the threshold.
    run_both(lib, algorithm, settings, key_channels=key_channels, seed=7)
    run_both(lib, algorithm, settings, key_channels=key_channels, frames=4800, blocksize=256,
             signal="sweep", trace=False)


@pytest.mark.parametrize("settings,schedule", LIMITER_CASES, ids=LIMITER_IDS)
def test_c_twin_matches_limiter(lib, settings, schedule):
    # Reference: the numba kernel limiter_block. 4400 frames > SUM_REFRESH (the exact re-sum of
    # the moving average is crossed); +18 dB so that the ceiling is at work when settings change.
    k, _ = run_both(lib, "limiter", settings, frames=4400, blocksize=128, schedule=schedule,
                    seed=9, gain=8.0)
    assert k["st"][L.S_GR_MAX, 0] > 0.0  # the limiter was reducing gain


def test_c_twin_matches_mono_and_three_channels(lib):
    # Reference: the numba kernels.
    run_both(lib, "compressor", dict(link="none"), channels=1, seed=2)
    run_both(lib, "compressor", dict(link="mean", detector="rms"), channels=3, seed=2)
    run_both(lib, "expander", dict(link="mean"), channels=3, seed=6, trace=False)
    run_both(lib, "limiter", dict(link="none", true_peak="on"), channels=3, seed=4, gain=8.0)


def _random_settings(proc, rng):
    """A random value for every control of the algorithm (within its range); invalid
    combinations (ParamError) keep the previous value."""
    out = {}
    for prm in proc.schema:
        if prm.taper == "choice":
            v = prm.choices[int(rng.integers(len(prm.choices)))]
        elif prm.taper == "slope":
            v = "inf" if rng.random() < 0.2 else float(rng.uniform(1.0, 20.0))
        elif prm.off_value is not None and rng.random() < 0.5:
            v = "off"
        elif prm.taper == "log":
            lo = max(prm.lo, 0.05)
            v = prm.lo if rng.random() < 0.15 else float(math.exp(rng.uniform(math.log(lo),
                                                                             math.log(prm.hi))))
        else:
            v = float(rng.uniform(prm.lo, prm.hi))
        try:
            proc.set(prm.name, v)
            out[prm.name] = v
        except ParamError:
            pass
    return out


@pytest.mark.parametrize("seed", range(12))
def test_c_twin_matches_random_settings(lib, seed):
    # Reference: the numba kernels. Random algorithm, settings, block size and a second random
    # setting half-way (glides, lookahead crossfade and limiter structure changes mid-stream).
    rng = np.random.default_rng(1000 + seed)
    algorithm = ("compressor", "limiter", "expander", "gate", "ducker")[seed % 5]
    key_channels = int(rng.integers(0, 3)) if algorithm == "ducker" else 0
    probe = Processor(algorithm, FS, 2, key_channels)
    first = _random_settings(probe, rng)
    second = _random_settings(probe, rng)
    blocksize = int(rng.integers(16, 300))
    frames = 4800
    run_both(lib, algorithm, first, frames=frames, blocksize=blocksize,
             key_channels=key_channels, schedule={frames // blocksize // 2: second}, seed=seed,
             gain=float(rng.choice([0.5, 1.0, 8.0])), trace=bool(seed % 2))


# ---- drivers --------------------------------------------------------------------------------

@pytest.mark.parametrize("algorithm", ["compressor", "limiter"])
def test_c_driver_matches_numba_driver(lib, algorithm):
    # Reference: livedyn.bench.kernels.drive (the numba block loop): the same whole blocks, the same
    # output; frames after the last whole block are left alone; the elapsed time is positive.
    proc = Processor(algorithm, FS, 2, lookahead=2.0)
    x = noise_bursts(3, 1000, 2, FS) * np.float32(4.0)
    outs, states = [], []
    for run in ("numba", "c", "numba_timed"):
        p, st, ring = proc.p.copy(), proc.st.copy(), proc.ring.copy()
        y = np.zeros_like(x)
        if run == "numba":
            n = bk.drive(proc._kernel, x, x, y, p, st, ring, proc._no_trace, 64)
            assert n == 960
        elif run == "c":
            assert lib.drive(proc.algorithm.kind, x, x, y, p, st, ring, proc._no_trace, 64) > 0
        else:
            assert ct.numba_drive_timed(lib, proc._kernel, x, x, y, p, st, ring,
                                        proc._no_trace, 64) > 0
        outs.append(y)
        states.append(st)
    for y, st in zip(outs[1:], states[1:]):
        assert np.array_equal(outs[0], y) and np.array_equal(states[0], st)
    assert not outs[1][960:].any() and outs[1][:960].any()
    assert states[1][L.S_FRAMES, 0] == 960
    with pytest.raises(ValueError, match="blocksize = 0"):
        lib.drive("dynamics", x, x, outs[1], proc.p, states[1], proc.ring, proc._no_trace, 0)


def test_c_kernel_checks_its_arguments(lib):
    # Common practice, no source: wrong dtypes, shapes or memory order never reach the C code;
    # the message is one line naming the argument.
    proc = Processor("compressor", FS, 2)
    x = np.zeros((64, 2), np.float32)
    f = lib.kernel("dynamics")
    good = dict(x=x, key=x, out=np.zeros_like(x), p=proc.p.copy(), st=proc.st.copy(),
                ring=proc.ring.copy(), tr=proc._no_trace)
    f(**good)
    bad = [
        (dict(x=x.astype(np.float64)), "x: float64 2-D"),
        (dict(out=np.zeros((64, 2), np.float32, order="F")), "out: not C-contiguous"),
        (dict(out=np.zeros((32, 2), np.float32)), "out: shape"),
        (dict(key=x[:10]), "key: 10 frames"),
        (dict(p=proc.p[:5].copy()), "p: 5 slots"),
        (dict(st=np.zeros((10, 12))), "st: shape"),
        (dict(ring=np.zeros((100, 2))), "ring: 2 columns"),
        (dict(tr=np.zeros((L.NTRACE, 0, 3))), "tr: shape"),
    ]
    for change, msg in bad:
        with pytest.raises(ValueError, match=msg) as info:
            f(**{**good, **change})
        assert "\n" not in str(info.value)


# ---- build helper ---------------------------------------------------------------------------

def test_header_carries_the_python_constants_exactly():
    # Common practice, no source: the C side must read the same doubles and the same layout.
    text = ct.consts_header()
    defs = {}
    for line in text.splitlines():
        if line.startswith("#define "):
            parts = line.split(None, 2)
            if len(parts) == 3:
                defs[parts[1]] = parts[2]
    for name in ("R_MEAS", "R_GAIN", "S_WPOS", "C_BPF", "RING_REQ", "T_TOTAL", "NROWS"):
        assert int(defs[name]) == getattr(L, name), name
    for name in ("LN10_OVER_20", "DB_PER_NEPER_AMP", "DB_PER_NEPER_POW", "LEVEL_FLOOR_AMP",
                 "TINY"):
        assert float.fromhex(defs[name].strip("()")) == getattr(S, name), name
    assert float.fromhex(defs["MATH_PI"].strip("()")) == math.pi


def test_build_is_cached_and_forced(lib, tmp_path):
    # Common practice, no source: a second build reuses the library; force rebuilds it.
    path = ct.build(tmp_path)
    assert path.parent == tmp_path and path.suffix == ".so"
    mtime = path.stat().st_mtime_ns
    assert ct.build(tmp_path) == path and path.stat().st_mtime_ns == mtime
    assert ct.build(tmp_path, force=True) == path
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([path.name,
                                                                 path.with_suffix(".h").name])
    assert ct.CTwin(path).now_ns() > 0


def test_library_has_no_fused_multiply_add(lib):
    # numba without fastmath lets LLVM contract none of the kernels' multiply-adds
    # (inspect_asm: no fused instruction in dynamics_block; in limiter_block only one
    # vfnmadd, LLVM's exact expansion of t % 4096, equal to C's fmod), so the C build must not
    # fuse either (-ffp-contract=off); the bit-identity tests above fail if it does.
    objdump = shutil.which("objdump")
    if objdump is None:
        pytest.skip("objdump not found")
    text = subprocess.run([objdump, "-d", str(lib.path)], capture_output=True, text=True,
                          check=True).stdout
    assert "ctwin_dynamics_block" in text
    assert "vfmadd" not in text and "vfmsub" not in text and "vfnmadd" not in text


def test_no_compiler_gives_a_one_line_note(monkeypatch, tmp_path):
    # Common practice, no source: no compiler -> CTwinUnavailable with a one-line note; the
    # harness then reports the C columns as skipped with that note instead of failing.
    assert ct.find_compiler({"CC": "no-such-compiler-here --flag"}) is None
    monkeypatch.setattr(ct, "find_compiler", lambda env=None: None)
    with pytest.raises(ct.CTwinUnavailable) as info:
        ct.build(tmp_path)
    note = str(info.value)
    assert "no C compiler" in note and "\n" not in note
    assert not any(tmp_path.iterdir())

    def unavailable(*a, **k):
        raise ct.CTwinUnavailable(note)

    monkeypatch.setattr(ct, "load", unavailable)
    lines = []
    rows = run_ctwin(out=lines.append, blocksizes=(32,), seconds=0.01, repeats=1,
                     check_seconds=0.004, cases=CASES[:2], progress=None)
    assert [r["c_check"] for r in rows] == ["skipped", "skipped"]
    assert all(r["c_ns_per_frame"] is None for r in rows)
    assert sum(note in ln for ln in lines) == 2
    lines = []
    rows = run_kernels(out=lines.append, quick=True, blocksizes=(32,), seconds=0.01,
                       repeats=1, check_seconds=0.004, twin_seconds=0.002, twin_repeats=1,
                       cases=CASES[:1], progress=None)
    assert rows[0]["c_check"] == "skipped" and rows[0]["numba_ns_per_frame"] > 0
    assert any(note in ln for ln in lines)


def test_compile_error_gives_a_one_line_note(tmp_path):
    # Common practice, no source: a compiler that fails is reported, not raised as a crash.
    false = shutil.which("false")
    if false is None:
        pytest.skip("no 'false' program")
    with pytest.raises(ct.CTwinUnavailable) as info:
        ct.build(tmp_path, cc=false)
    assert "failed" in str(info.value) and "\n" not in str(info.value)


# ---- harness --------------------------------------------------------------------------------

SMALL = dict(blocksizes=(32,), seconds=0.01, repeats=2, check_seconds=0.004, progress=None)


def test_run_ctwin_rows_and_table(lib):
    # Common practice, no source: every case checks bit-identical and gets positive timings.
    lines = []
    rows = run_ctwin(out=lines.append, **SMALL)
    assert len(rows) == len(CASES)
    for r in rows:
        assert set(r) == set(CTWIN_ROW_KEYS)
        assert r["c_check"] == "ok" and r["c_bit_identical"] and r["c_driver_identical"]
        for key in ("numba_ns_per_frame", "c_ns_per_frame", "numba_over_c",
                    "numba_over_c_of_minima", "numba_over_c_paired"):
            assert math.isfinite(r[key]) and r[key] > 0, key
        assert r["c_ns_min"] <= r["c_ns_per_frame"] <= r["c_ns_max"]
        assert r["numba_over_c"] == pytest.approx(r["numba_ns_per_frame"] / r["c_ns_per_frame"])
    text = "\n".join(lines)
    assert "numba/C" in text and all(c.name in text for c in CASES)
    # the default table fits 100 columns; --wide adds the spreads
    assert max(len(ln) for ln in lines if not ln.startswith(("CPU:", "C:"))) <= bk.NARROW
    wide = bk.format_ctwin_table(rows, wide=True)
    assert "[min-max]" in wide[2] and "[min-max]" not in text


def test_run_kernels_has_c_columns(lib):
    # Common practice, no source: the main table carries the C figures when a compiler exists.
    lines = []
    rows = run_kernels(out=lines.append, quick=True, blocksizes=(32,), seconds=0.01, repeats=2,
                       check_seconds=0.004, twin_seconds=0.002, twin_repeats=1,
                       cases=CASES[:3], progress=None)
    for r in rows:
        assert set(r) == set(ROW_KEYS)
        assert r["c_check"] == "ok" and r["c_bit_identical"] and r["c_driver_identical"]
        assert r["c_ns_per_frame"] > 0 and r["numba_over_c"] > 0
    assert "numba/C" in lines[2]


def test_c_mismatch_gets_no_c_timings(lib, monkeypatch):
    # The refusal rule: a C twin that disagrees beyond the tolerance gets no timings.
    real = lib.drive

    class Shifted:
        path = lib.path

        def drive(self, kind, x, key, out, *rest):
            ns = real(kind, x, key, out, *rest)
            out[0, 0] += np.float32(1e-3)
            return ns

    rows = run_ctwin(out=None, lib=Shifted(), **{**SMALL, "cases": CASES[:1]})
    assert rows[0]["c_check"] == "MISMATCH" and rows[0]["c_ns_per_frame"] is None
    assert rows[0]["c_max_abs_diff"] == pytest.approx(1e-3, rel=1e-3)
    assert "differ" in rows[0]["c_mismatch"]

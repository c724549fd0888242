"""The kernel benchmark: plain-Python twins agree with the numba kernels; the harness runs.

Reference for the agreement checks: livedyn.bench.twins, an independent plain-Python implementation of
the equations livedyn.dsp documents ([GMR2012] eqs. (3), (4), (16), (17); Audio EQ Cookbook key
filters; ITU-R BS.1770-4 Annex 2 true-peak interpolation; the limiter design in the
livedyn.dsp.limiter docstring). Both evaluate the same IEEE-754 double operations in the same
order (no fast math, no multiply-add contraction, the same libm), so outputs, traces and final
states are expected to be bit-identical, and that is what is asserted.

Signals are short (the twins run at tens of microseconds per frame).
"""
import json
import math

import numpy as np
import pytest

import livedyn.bench.kernels as bk
from livedyn.bench.__main__ import main as bench_main
from livedyn.bench.kernels import CASES, ROW_KEYS, TOLERANCE, noise_bursts, report, run_kernels
from livedyn.bench.twins import twin_for
from livedyn.dsp import layout as L
from livedyn.params import P_RATIO
from livedyn.processor import Processor
from tests.kernel_cases import LIMITER_CASES, LIMITER_IDS

FS = 48000


def dirty(x, seed):
    """Add non-finite and subnormal float32 samples (the kernels replace/keep them)."""
    rng = np.random.default_rng(seed)
    x = x.copy()
    idx = rng.choice(x.shape[0], 6, replace=False)
    x[idx[0], 0] = np.nan
    x[idx[1], -1] = np.inf
    x[idx[2], 0] = -np.inf
    x[idx[3:], :] = np.float32(1e-41)  # subnormal float32
    return x


def sweep(frames, channels, lo_db=-70.0, hi_db=-10.0):
    """A 997 Hz sine whose level goes lo -> hi -> lo dBFS linearly in dB (slow threshold
    crossings, so that every sample near a threshold is visited)."""
    n = np.arange(frames)
    level = lo_db + (hi_db - lo_db) * (1.0 - np.abs(2.0 * n / frames - 1.0))
    x = 10.0 ** (level / 20.0) * np.sin(2 * np.pi * 997.0 * n / FS)
    return np.repeat(x[:, None], channels, axis=1).astype(np.float32)


def run_both(algorithm, settings=None, *, frames=2400, blocksize=100, channels=2,
             key_channels=0, schedule=None, seed=0, trace=True, signal="bursts", gain=1.0,
             raw=None):
    """Kernel and twin block by block on identical fresh state; asserts bit-identity.

    ``schedule`` maps a block index to {parameter: value} applied (via Processor.set, so values
    are validated) before that block, to both sides. ``raw`` maps parameter slots to values
    written straight into both parameter arrays (for slots no control of the algorithm
    writes). ``signal``: "bursts" (seeded noise bursts with non-finite and subnormal samples,
    times ``gain``) or "sweep" (for the key when there is one).
    """
    proc = Processor(algorithm, FS, channels, key_channels, **(settings or {}))
    kernel, twin = proc._kernel, twin_for(proc.algorithm.kind)
    x = dirty(noise_bursts(seed, frames, channels, FS) * np.float32(gain), seed)
    if signal == "sweep" and not key_channels:
        x = x + sweep(frames, channels)
    if key_channels:
        key = sweep(frames, key_channels) if signal == "sweep" else \
            noise_bursts(seed + 1, frames, key_channels, FS)
    else:
        key = x
    for slot, value in (raw or {}).items():
        proc.p[slot] = value
    sides = []
    for _ in range(2):
        sides.append(dict(p=proc.p.copy(), st=proc.st.copy(), ring=proc.ring.copy(),
                          y=np.zeros_like(x)))
    ncols = proc.st.shape[1]
    for b, i in enumerate(range(0, frames, blocksize)):
        if schedule and b in schedule:
            for name, value in schedule[b].items():
                proc.set(name, value)
            for s in sides:
                s["p"][:] = proc.p
        trs = []
        for fn, s in zip((kernel, twin), sides):
            tr = np.zeros((L.NTRACE, blocksize if trace else 0, ncols))
            fn(x[i:i + blocksize], key[i:i + blocksize], s["y"][i:i + blocksize], s["p"], s["st"],
               s["ring"], tr)
            trs.append(tr)
        assert np.array_equal(trs[0], trs[1], equal_nan=True), f"trace differs in block {b}"
    k, t = sides
    assert np.array_equal(k["y"], t["y"]), (
        f"max |kernel - twin| = {np.nanmax(np.abs(k['y'].astype(float) - t['y'])):.3g}")
    assert np.array_equal(k["st"], t["st"], equal_nan=True)
    assert np.array_equal(k["ring"], t["ring"])
    assert np.isfinite(k["y"]).all()
    return k, proc


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_twin_matches_kernel_for_every_benchmarked_case(case):
    # Reference: bench.twins (module docstring). 37-frame blocks: boundaries everywhere.
    k, proc = run_both(case.algorithm, case.settings, key_channels=case.key_channels,
                       blocksize=37, seed=11)
    assert k["st"][L.S_NONFINITE, 0] == 3  # the three non-finite main samples were counted
    if proc.algorithm.kind == "dynamics":
        assert k["st"][L.S_GR_MAX, 0] >= 0.0


@pytest.mark.parametrize("settings", [
    dict(detector="rms", rms_time=3.0, knee=0.0),
    dict(ballistics="decoupled", hold=5.0, attack=2.0, release=40.0),
    dict(domain="linear", hold=3.0, threshold=-30.0, ratio="inf"),
    dict(domain="linear", ballistics="decoupled", detector="rms"),
    dict(domain="linear", ballistics="decoupled", hold=4.0, release=30.0),
    dict(topology="feedback", key_lpf=3000.0, ratio=8.0, makeup=4.0),
    dict(link="none", key_bpf=1000.0, key_q=2.0),
    dict(link="mean", automakeup="on", makeup=3.0, mix=60.0, ceiling=-6.0, knee=12.0),
], ids=["rms", "decoupled+hold", "linear", "linear+decoupled+rms", "linear+decoupled+hold",
        "feedback+lpf", "link-none+bpf",
        "mean+automakeup+mix+ceiling"])
def test_twin_matches_compressor_settings(settings):
    # Reference: bench.twins (module docstring).
    run_both("compressor", settings, seed=3)


def test_twin_matches_lookahead_changes_and_glides_mid_stream():
    # Reference: bench.twins. Lookahead 0 -> 5 ms (frame 600) -> 2 ms (frame 1000, inside the
    # 480-frame crossfade, so it waits and starts inside block 5 at frame 1080) -> 0 ms (frame
    # 1400, inside that crossfade: starts at 1560, inside block 7); threshold, makeup, ratio and
    # knee jumps exercise the per-sample glide, long enough (0.3 s, 30 glide time constants)
    # for every glide to snap onto its target.
    sched = {3: dict(lookahead=5.0, threshold=-40.0), 5: dict(lookahead=2.0, makeup=6.0),
             7: dict(lookahead=0.0), 14: dict(ratio=2.0, knee=0.0)}
    k, proc = run_both("compressor", dict(key_hpf=100.0), frames=14400, blocksize=200,
                       schedule=sched, seed=5, trace=False)
    assert k["st"][L.S_DCUR, 0] == 0 and k["st"][L.S_XF, 0] == 0
    assert k["st"][L.S_THR, 0] == -40.0 and k["st"][L.S_MAKEUP, 0] == 6.0


def test_twin_matches_kernel_with_no_ratio_slot():
    # Reference: bench.twins. A ratio slot below 1 means "no ratio" (slope slot 0), as for an
    # algorithm without a ratio control; the glide must stay finite and reach its targets.
    k, _ = run_both("gate", dict(hold=2.0), schedule={4: dict(threshold=-30.0)}, seed=8,
                    raw={P_RATIO: 0.0})
    assert not np.isnan(k["st"]).any()


def test_twin_matches_decay_into_silence():
    # Reference: bench.twins. Short time constants and a long digital silence after a burst:
    # detector, envelope and key-filter states decay past 1e-30, where both must store exactly
    # 0 (no subnormals, livedyn.dsp.stages.flush).
    proc = Processor("compressor", FS, 2, detector="rms", rms_time=0.5, domain="linear",
                     attack=0.2, release=1.0, key_hpf=1000.0)
    x = np.zeros((6000, 2), np.float32)
    x[:400] = noise_bursts(1, 400, 2, FS)[:400] + 0.3
    sides = [(fn, proc.p.copy(), proc.st.copy(), proc.ring.copy(), np.zeros_like(x))
             for fn in (proc._kernel, twin_for("dynamics"))]
    for fn, p, st, ring, y in sides:
        for i in range(0, len(x), 256):
            fn(x[i:i + 256], x[i:i + 256], y[i:i + 256], p, st, ring, proc._no_trace)
    (_, _, st1, r1, y1), (_, _, st2, r2, y2) = sides
    assert np.array_equal(y1, y2) and np.array_equal(st1, st2) and np.array_equal(r1, r2)
    for row in (L.R_MS, L.R_ENV, L.R_HPZ, L.R_HPZ + 1):
        assert np.all(st1[row, :2] == 0.0), row


@pytest.mark.parametrize("algorithm,settings,key_channels", [
    ("expander", dict(knee=0.0, hysteresis=3.0, detector="rms", link="mean"), 0),
    ("expander", dict(ratio="inf", link="none", lookahead=1.0), 0),
    ("gate", dict(hysteresis=6.0, hold=2.0, lookahead=1.0, mix=80.0), 0),
    ("ducker", dict(ballistics="decoupled", detector="peak", knee=0.0, ratio=3.0), 2),
    ("ducker", dict(link="none", hold=0.0), 1),
], ids=["expander-rms-mean", "expander-inf-none", "gate-hyst-hold", "ducker-decoupled",
        "ducker-mono-key-none"])
def test_twin_matches_other_laws(algorithm, settings, key_channels):
    # Reference: bench.twins (module docstring). Noise bursts, then a slow level sweep through
    # the threshold (every level near it, and the hysteresis band, is visited).
    run_both(algorithm, settings, key_channels=key_channels, seed=7)
    run_both(algorithm, settings, key_channels=key_channels, frames=4800, blocksize=256,
             signal="sweep", trace=False)


@pytest.mark.parametrize("settings,schedule", LIMITER_CASES, ids=LIMITER_IDS)
def test_twin_matches_limiter(settings, schedule):
    # Reference: bench.twins; ITU-R BS.1770-4 Annex 2 for the true-peak taps (TP_TAPS).
    # frames > SUM_REFRESH so that the exact re-summing of the moving average is crossed; +18 dB
    # so that the ceiling is at work (and the minimum queue is long) when settings change.
    run_both("limiter", settings, frames=4400, blocksize=128, schedule=schedule, seed=9, gain=8.0)


def test_twin_matches_mono_and_three_channels():
    # Reference: bench.twins.
    run_both("compressor", dict(link="none"), channels=1, seed=2)
    run_both("expander", dict(link="mean"), channels=3, seed=6, trace=False)  # mean of 3
    run_both("limiter", dict(link="none"), channels=3, seed=4, trace=False)
    run_both("limiter", dict(link="none"), channels=3, seed=4, gain=8.0,
             schedule={5: dict(link="max"), 12: dict(link="none", lookahead=1.0)})


# ---- the harness ----------------------------------------------------------------------------

SMALL = dict(quick=True, blocksizes=(32,), seconds=0.01, repeats=2, check_seconds=0.004,
             twin_seconds=0.002, twin_repeats=1, progress=None)


def test_run_kernels_smoke_returns_complete_rows():
    # Common practice, no source: every case runs, checks, and yields positive timings.
    lines = []
    rows = run_kernels(out=lines.append, **SMALL)
    assert len(rows) == len(CASES)
    for r in rows:
        assert set(r) == set(ROW_KEYS)
        assert r["check"] == "ok" and r["bit_identical"] and r["state_identical"]
        assert r["driver_identical"]  # the njit-driven path computes what the Python path does
        for key in ("numba_ns_per_frame", "py_call_ns_per_frame", "process_ns_per_frame",
                    "twin_ns_per_frame", "twin_ratio", "x_realtime"):
            assert math.isfinite(r[key]) and r[key] > 0, key
        assert r["numba_ns_min"] <= r["numba_ns_per_frame"] <= r["numba_ns_max"]
        assert r["x_realtime"] == pytest.approx(1e9 / (FS * r["numba_ns_per_frame"]))
    text = "\n".join(lines)
    for c in CASES:
        assert c.name in text


def test_table_fits_100_columns_and_never_shows_a_negative_call_cost():
    # README, "Commands" (bench): the default table fits 100 columns, --wide shows the rest;
    # a call cost is a difference of two medians, so a negative one is "within noise".
    rows = run_kernels(out=None, **{**SMALL, "cases": CASES[:2]})
    rows[0]["py_call_overhead_us_per_block"] = -1.25
    rows[1]["process_overhead_us_per_block"] = -0.5
    rows[1]["py_call_overhead_us_per_block"] = 0.75
    narrow = bk.format_table(rows, bk.machine_info())
    wide = bk.format_table(rows, bk.machine_info(), wide=True)
    table = [ln for ln in narrow if ln.startswith(tuple(c.name for c in CASES[:2]))]
    assert len(table) == 2
    assert max(len(ln) for ln in narrow if not ln.startswith("CPU:")) <= bk.NARROW
    assert max(len(ln) for ln in wide) > bk.NARROW  # the rest of the columns
    assert "twin ns/fr" in wide[2] and "twin ns/fr" not in narrow[2]
    for lines in (narrow, wide):
        body = [ln for ln in lines if ln.startswith(tuple(c.name for c in CASES[:2]))]
        assert body[0].count("within noise") == 1 and body[1].count("within noise") == 1
        assert "0.75" in body[1]
        assert "-1.25" not in body[0] and "-0.50" not in body[1]


def test_mismatching_twin_gets_no_timings(monkeypatch):
    # The refusal rule of the harness: a twin that disagrees beyond TOLERANCE gets the mismatch
    # printed instead of timings; one within it passes but is not called bit-identical.
    def shifted(delta):
        def make(kind):
            real = twin_for(kind)

            def twin(x, key, out, p, st, ring, tr):
                real(x, key, out, p, st, ring, tr)
                out[0, 0] += np.float32(delta)
            return twin
        return make

    lines = []
    monkeypatch.setattr(bk, "twin_for", shifted(1e-3))
    (row,) = run_kernels(out=lines.append, **{**SMALL, "cases": CASES[:1]})
    assert row["check"] == "MISMATCH" and row["numba_ns_per_frame"] is None
    assert row["max_abs_diff"] == pytest.approx(1e-3, rel=1e-3)
    assert "no timings" in "\n".join(lines)

    monkeypatch.setattr(bk, "twin_for", shifted(TOLERANCE / 8))
    (row,) = run_kernels(out=None, **{**SMALL, "cases": CASES[:1]})
    assert row["check"] == "ok" and not row["bit_identical"]
    assert 0 < row["max_abs_diff"] <= TOLERANCE


def test_report_is_strict_json():
    # RFC 8259 JSON (no NaN/Infinity tokens): json.dumps(allow_nan=False) raises otherwise.
    rows = run_kernels(out=None, **{**SMALL, "cases": CASES[2:3]})
    rows[0]["twin_ratio"] = float("nan")  # a non-finite value must still serialise
    doc = json.loads(json.dumps(report(rows), allow_nan=False))
    assert doc["rows"][0]["twin_ratio"] is None
    assert doc["machine"]["cores"] >= 1 and doc["machine"]["numba"]


def test_command_line_writes_json(tmp_path, capsys):
    # Common practice, no source: the thin command line runs and writes valid JSON.
    path = tmp_path / "k.json"
    code = bench_main(["kernels", "--quick", "--blocksize", "256", "--seconds", "0.02",
                       "--json", str(path)])
    assert code == 0
    doc = json.loads(path.read_text())
    assert [r["case"] for r in doc["rows"]] == [c.name for c in CASES]
    assert all(r["blocksize"] == 256 and r["check"] == "ok" for r in doc["rows"])
    assert "x realtime" in capsys.readouterr().out
    assert bench_main(["kernels", "--blocksize", "0"]) == 2

"""Level meter (peak, hold, RMS) and the meter classes; IEC 61672-1 time weightings, AES17."""
import importlib
import math

import numba
import numpy as np
import pytest
from scipy import signal

from livedyn import meters
from livedyn.dsp import levels as lv
from livedyn.dsp import loudness as ld
from livedyn.dsp import truepeak as tp

FLOOR = -200.0


def run(x, fs, block=None, **kw):
    x = np.ascontiguousarray(x, dtype=np.float32)
    m = meters.LevelMeter(fs, x.shape[1], **kw)
    if block is None:
        m.process(x)
    else:
        for i in range(0, x.shape[0], block):
            m.process(x[i : i + block])
    return m


@pytest.mark.parametrize("tau_ms", [125.0, 1000.0, 10.0])  # IEC 61672-1 Fast, Slow; any tau
def test_step_reaches_63_percent_at_tau(tau_ms):
    # IEC 61672-1 exponential time weighting: the mean square of a step reaches 1 - 1/e of its
    # final value after one time constant tau.
    fs = 48000
    n_tau = int(round(tau_ms * fs / 1000))  # an exact whole number of samples here
    x = np.full((n_tau, 1), 0.5, dtype=np.float32)
    m = run(x[:-1], fs, rms_tau_ms=tau_ms)
    before = m.arrays["state"][0, lv.L_MS] / 0.25
    m.process(x[-1:])
    at = m.arrays["state"][0, lv.L_MS] / 0.25
    assert at == pytest.approx(1 - 1 / math.e, abs=1e-9)
    assert before < 1 - 1 / math.e


def test_step_at_44k1_brackets_tau():
    # IEC 61672-1 Fast at 44.1 kHz: tau = 5512.5 samples falls between two samples
    fs = 44100
    x = np.full((5513, 1), 1.0, dtype=np.float32)
    m = run(x[:5512], fs)
    assert m.arrays["state"][0, lv.L_MS] < 1 - 1 / math.e
    m.process(x[5512:])
    assert m.arrays["state"][0, lv.L_MS] > 1 - 1 / math.e


def test_rms_equals_lfilter_of_one_pole_on_square():
    # scipy.signal.lfilter([1 - a], [1, -a], x^2) with a = exp(-1 / (tau fs)), sample by sample
    fs = 48000
    rng = np.random.default_rng(8)
    x = (rng.standard_normal((3000, 2)) * 0.3).astype(np.float32)
    m = meters.LevelMeter(fs, 2, rms_tau_ms=5.0)
    got = np.zeros((3000, 2))
    for n in range(3000):
        m.process(x[n : n + 1])
        got[n] = m.arrays["state"][:, lv.L_MS]
    a = math.exp(-1 / (0.005 * fs))
    ref = signal.lfilter([1 - a], [1, -a], x.astype(np.float64) ** 2, axis=0)
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=0)


@pytest.mark.parametrize("dbfs", [0.0, -20.0])
def test_sine_reads_its_level_in_dbfs(dbfs):
    # AES17: a full-scale sine is 0 dBFS; the RMS meter reads 10 log10(2 ms), so a sine reads
    # its peak level (ripple of the Fast average on a 997 Hz sine is below 0.01 dB)
    fs = 48000
    t = np.arange(2 * fs)
    x = (10 ** (dbfs / 20) * np.sin(2 * np.pi * 997 * t / fs)).astype(np.float32)[:, None]
    m = run(x, fs)
    assert m.rms_db()[0] == pytest.approx(dbfs, abs=0.01)
    assert m.max_peak_db()[0] == pytest.approx(dbfs, abs=0.01)
    assert m.peak_hold_db()[0] == pytest.approx(dbfs, abs=0.01)


def test_peak_hold_and_fall():
    # Documented ballistics (hold 1 s, fall 20 dB/s: common practice, no source): one sample at
    # 0.5 (-6.02 dBFS), then silence.
    fs = 48000
    x = np.zeros((3 * fs, 1), dtype=np.float32)
    x[0, 0] = 0.5
    start = 20 * math.log10(0.5)
    m = run(x[: fs // 2 + 1], fs)  # sample 0 .. 0.5 s
    assert m.peak_db()[0] == pytest.approx(start - 10.0, abs=1e-6)  # bar: falls at once
    assert m.peak_hold_db()[0] == pytest.approx(start, abs=1e-12)  # hold: held
    m.process(x[fs // 2 + 1 : fs + 1])  # to 1.0 s: hold ends exactly now
    assert m.peak_hold_db()[0] == pytest.approx(start, abs=1e-12)
    m.process(x[fs + 1 : 3 * fs // 2 + 1])  # to 1.5 s
    assert m.peak_hold_db()[0] == pytest.approx(start - 10.0, abs=1e-6)
    assert m.peak_db()[0] == pytest.approx(start - 30.0, abs=1e-6)
    assert m.max_peak_db()[0] == pytest.approx(start, abs=1e-12)
    # a custom hold and fall
    m2 = run(x[: fs // 10 + 1], fs, hold_ms=50.0, fall_db_per_s=100.0)
    assert m2.peak_hold_db()[0] == pytest.approx(start - 5.0, abs=1e-6)  # 50 ms held, 50 ms fall


def test_block_size_invariance():
    fs = 48000
    rng = np.random.default_rng(12)
    x = np.concatenate([rng.standard_normal((fs // 2, 2)) * 0.5, np.zeros((fs, 2))])
    ref = run(x, fs)
    for block in (1, 64, 4097):
        np.testing.assert_array_equal(run(x, fs, block=block).arrays["state"], ref.arrays["state"])


def test_non_finite_input_counts_as_zero():
    fs = 48000
    rng = np.random.default_rng(13)
    x = (rng.standard_normal((5000, 2)) * 0.1).astype(np.float32)
    bad = x.copy()
    bad[10, 0] = np.nan
    bad[20, 1] = np.inf
    clean = x.copy()
    clean[10, 0] = 0.0
    clean[20, 1] = 0.0
    a = run(bad, fs, block=64)
    assert np.all(np.isfinite(a.arrays["state"]))
    np.testing.assert_array_equal(a.arrays["state"], run(clean, fs, block=64).arrays["state"])


def _no_subnormals(a):
    a = np.asarray(a, dtype=np.float64)
    return bool(np.all((a == 0) | (np.abs(a) >= np.finfo(np.float64).tiny)))


@pytest.mark.parametrize(
    "kw",
    [{}, {"rms_tau_ms": 1.0, "hold_ms": 0.0, "fall_db_per_s": 2000.0}],
    ids=["defaults", "fast-decay"],
)
def test_no_subnormals_after_loud_then_silence(kw):
    # No subnormals (DEVELOPERS.md, "The kernel contract"): loud input then 10 s silence, checked
    # every 100 ms; the fast settings would reach float64 subnormals within the 10 s without the
    # documented flush
    fs = 48000
    rng = np.random.default_rng(14)
    m = meters.LevelMeter(fs, 2, **kw)
    m.process((rng.standard_normal((fs, 2)) * 0.9).astype(np.float32))
    quiet = np.zeros((fs // 10, 2), dtype=np.float32)
    for _ in range(100):
        m.process(quiet)
        assert _no_subnormals(m.arrays["state"])
    if kw:
        st = m.arrays["state"]
        assert np.all(st[:, [lv.L_BAR, lv.L_HOLD, lv.L_MS]] == 0.0)
        assert m.rms_db() == [FLOOR, FLOOR] and m.peak_db() == [FLOOR, FLOOR]


def test_bad_arguments_raise_one_line():
    with pytest.raises(ValueError, match=r"^rms_tau_ms = 0 ms: out of range, expected above 0 ms$"):
        meters.LevelMeter(48000, 2, rms_tau_ms=0)
    with pytest.raises(ValueError, match=r"^hold_ms = -1 ms"):
        meters.LevelMeter(48000, 2, hold_ms=-1)
    with pytest.raises(ValueError, match=r"^fall = "):
        meters.LevelMeter(48000, 2, fall_db_per_s=0)


# --- the meter classes together -----------------------------------------------------------------
def test_meterset_snapshot_is_plain_and_consistent():
    # a stereo 997 Hz sine at -20 dBFS: -20 LUFS (BS.1770-4, as EBU Tech 3341 case 1 at -23),
    # true peak and sample peak -20 dB, RMS -20 dBFS (AES17)
    fs = 48000
    t = np.arange(4 * fs)
    s = 0.1 * np.sin(2 * np.pi * 997 * t / fs)
    x = np.stack([s, s], axis=1).astype(np.float32)
    ms = meters.MeterSet(fs, 2)
    for i in range(0, x.shape[0], 512):
        ms.process(x[i : i + 512])
    snap = ms.snapshot()
    for k, v in snap.items():
        assert type(v) is float or (type(v) is list and all(type(e) is float for e in v)), k
    for k in ("momentary_lufs", "short_term_lufs", "integrated_lufs"):
        assert snap[k] == pytest.approx(-20.0, abs=0.1), k
    assert snap["max_true_peak_dbtp"] == pytest.approx(-20.0, abs=0.2)
    for k in ("peak_dbfs", "peak_hold_dbfs", "max_peak_dbfs", "rms_dbfs"):
        assert snap[k] == pytest.approx([-20.0, -20.0], abs=0.02), k
    ms.reset()
    snap = ms.snapshot()
    assert snap["integrated_lufs"] == FLOOR and snap["max_true_peak_dbtp"] == FLOOR


@numba.njit(cache=True, error_model="numpy", nogil=True)
def _engine_like(x, la, lb, lc, ld_, le, lf, lg, ta, tb, tc, td, va, vb):
    # what a compiled callback would do: call the three kernels on preallocated arrays
    ld.loudness_block(x, la, lb, lc, ld_, le, lf, lg)
    tp.true_peak_block(x, ta, tb, tc, td)
    lv.level_block(x, va, vb)


def test_kernels_run_from_compiled_code_with_the_exposed_arrays():
    fs = 48000
    rng = np.random.default_rng(15)
    x = (rng.standard_normal((fs, 2)) * 0.2).astype(np.float32)
    a = meters.MeterSet(fs, 2)
    b = meters.MeterSet(fs, 2)
    a.process(x)
    for i in range(0, fs, 480):
        blk = x[i : i + 480]
        _engine_like(blk, *b.loudness.kernel_args, *b.true_peak.kernel_args, *b.levels.kernel_args)
    for ma, mb in zip(a.meters, b.meters):
        mod, _, name = mb.kernel_name.rpartition(".")
        assert getattr(importlib.import_module(mod), name) is mb.kernel
        for key in ma.arrays:
            np.testing.assert_array_equal(ma.arrays[key], mb.arrays[key], err_msg=key)
    assert a.snapshot() == b.snapshot()

"""True-peak meter: ITU-R BS.1770-4 Annex 2 (4x oversampling), checked against scipy.signal."""
import math

import numba
import numpy as np
import pytest
from scipy import signal

from livedyn import meters
from livedyn.dsp import truepeak as tp

# ITU-R BS.1770-4 Annex 2, example interpolation filter, phases 0 and 1 (value recalled from
# memory); phases 2 and 3 are phases 1 and 0 reversed.
PUBLISHED_PHASE0 = [
    0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000,
    -0.0594482421875, 0.1373291015625, 0.9721679687500, -0.1022949218750,
    0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500,
]
PUBLISHED_PHASE1 = [
    -0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250,
    -0.1665039062500, 0.4650878906250, 0.7797851562500, -0.2003173828125,
    0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375,
]


def full_filter():
    """The 48-tap filter h with h[4 j + k] = TP_TAPS[k, j]."""
    h = np.zeros(48)
    for k in range(4):
        h[k::4] = tp.TP_TAPS[k]
    return h


def run_blocks(x, block):
    m = meters.TruePeakMeter(48000, x.shape[1])
    for i in range(0, x.shape[0], block):
        m.process(x[i : i + block])
    return m


def faded_sine(fs, f, phase, n=4096, fade=512, amp=1.0):
    """A sine with raised-cosine fade in and out, so that no switching transient counts."""
    t = np.arange(n)
    env = np.ones(n)
    ramp = 0.5 - 0.5 * np.cos(np.pi * np.arange(fade) / fade)
    env[:fade] = ramp
    env[-fade:] = ramp[::-1]
    return (amp * env * np.sin(2 * np.pi * f / fs * t + phase)).astype(np.float32)


# A 32x reference interpolator: a long Kaiser-windowed sinc designed with scipy.signal.firwin
# (64 zero crossings each side, beta 12); measured here within 0.0002 dB of a sine's amplitude
# up to 20 kHz at 44.1 kHz. scipy's default resample_poly filter ripples by up to 0.04 dB there.
REF_FIR = signal.firwin(2 * 32 * 64 + 1, 0.999 / 32, window=("kaiser", 12.0))


def reference_peak(x):
    """max |x(t)| on a 32x grid, via scipy.signal.resample_poly (reference library)."""
    return float(np.abs(signal.resample_poly(x.astype(np.float64), 32, 1, window=REF_FIR)).max())


def test_taps_are_the_published_filter():
    # ITU-R BS.1770-4 Annex 2 example filter (value recalled from memory).
    assert tp.TP_TAPS.shape == (4, 12) and tp.TP_TAPS.dtype == np.float64
    np.testing.assert_array_equal(tp.TP_TAPS[0], PUBLISHED_PHASE0)
    np.testing.assert_array_equal(tp.TP_TAPS[1], PUBLISHED_PHASE1)
    np.testing.assert_array_equal(tp.TP_TAPS[2], PUBLISHED_PHASE1[::-1])
    np.testing.assert_array_equal(tp.TP_TAPS[3], PUBLISHED_PHASE0[::-1])
    # a linear-phase (symmetric) 48-tap filter: group delay 23.5 samples at 4x = TP_DELAY
    h = full_filter()
    np.testing.assert_array_equal(h, h[::-1])
    assert tp.TP_DELAY == pytest.approx(23.5 / 4)


def test_kernel_equals_upfirdn():
    # scipy.signal.upfirdn(h, x, 4) is the 4x interpolated signal u[4n+k] = sum_j h[4j+k] x[n-j];
    # the meter's per-channel maximum must be max |u| over the same span.
    rng = np.random.default_rng(1)
    x = (rng.standard_normal((3000, 3)) * 0.3).astype(np.float32)
    h = full_filter()
    m = run_blocks(x, 257)
    for c in range(3):
        u = signal.upfirdn(h, x[:, c].astype(np.float64), up=4)[: 4 * x.shape[0]]
        assert m.arrays["peak"][c] == pytest.approx(np.abs(u).max(), rel=1e-12)
    # tp_tick per sample: max over the 4 phases of that sample
    hist = tp.new_history(1)
    taps = tp.new_taps()
    u = signal.upfirdn(h, x[:, 0].astype(np.float64), up=4)
    pos = 0
    for n in range(200):
        got = tp.tp_tick(hist, pos, 0, x[n, 0], taps)
        assert got == pytest.approx(np.abs(u[4 * n : 4 * n + 4]).max(), rel=1e-12, abs=1e-15)
        pos = (pos + 1) % 12


@pytest.mark.parametrize("t0", [300.2, 300.5, 300.8])
def test_delay_alignment(t0):
    # The values computed at input sample n describe input times n - TP_DELAY + k/4, i.e.
    # between n - 6 and n - 5 (module notes): a narrow band-limited pulse peaking at t0 gives
    # its largest tp_tick value at n = floor(t0) + TP_LOOKAHEAD. (Derived from the filter's
    # symmetry, BS.1770-4 Annex 2 filter.)
    t = np.arange(600)
    x = np.exp(-0.5 * ((t - t0) / 1.5) ** 2).astype(np.float32)
    hist = tp.new_history(1)
    taps = tp.new_taps()
    vals = []
    for n in range(600):
        vals.append(tp.tp_tick(hist, n % 12, 0, x[n], taps))
    assert int(np.argmax(vals)) == math.floor(t0) + tp.TP_LOOKAHEAD


def phase_responses(f, fs):
    """Complex response H_k(f) of each phase filter (scipy.signal.freqz)."""
    w = 2 * np.pi * f / fs
    return np.array([signal.freqz(tp.TP_TAPS[k], 1, worN=[w])[1][0] for k in range(4)])


def bound_for_sine(f, fs):
    """(low, high) factors of the amplitude that a 4x reading of a steady sine can take.

    Phase k outputs A |H_k| sin(w (n - d_k) + phi), d_k = -arg(H_k) / w (scipy.signal.freqz
    of the taps). high = max_k |H_k|. Every input-sample interval holds four grid times
    n - d_k; the largest gap g between neighbours on the circle of one sample leaves a peak at
    most g/2 from a grid time, so low = min_k |H_k| * cos(w g / 2). For ideal quarter-sample
    phases g = 1/4 and this is the textbook 4x under-read cos(pi f / (4 fs)); the example
    filter's phases are not quite evenly spaced near 20 kHz, which is why g is measured.
    """
    H = phase_responses(f, fs)
    w = 2 * np.pi * f / fs
    d = np.sort(np.mod(-np.angle(H) / w, 1.0))
    gaps = np.diff(np.concatenate([d, [d[0] + 1.0]]))
    g = gaps.max()
    mags = np.abs(H)
    return mags.min() * math.cos(w * g / 2), mags.max()


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_sine_sweep_against_32x_reference(fs):
    rng = np.random.default_rng(fs)
    freqs = [100.0, 997.0, 3000.0, 6000.0, 10000.0, 12000.0, 15000.0, 18000.0, 19000.0, 20000.0]
    for f in freqs:
        lo, hi = bound_for_sine(f, fs)
        for phase in rng.uniform(0, 2 * np.pi, 5):
            x = faded_sine(fs, f, phase, amp=0.5)
            ref = reference_peak(x)
            # 32x reference is itself within 0.001 dB of the amplitude (sanity of the reference)
            assert ref == pytest.approx(0.5, rel=2e-4)
            got = 10 ** (meters.true_peak_dbtp(x, fs) / 20)
            # bound: ref * low - slack <= reading <= ref * high + slack; slack 1e-4 covers the
            # 32x reference's own error and float32 input rounding
            assert ref * lo - 1e-4 <= got <= ref * hi + 1e-4, (fs, f, phase, got / ref, lo, hi)


def test_quarter_rate_sine_at_45_degrees():
    # Common known example, no source: a sine at fs/4 with 45 degree phase whose samples reach
    # full scale (+/-1.0, sample peak 0 dBFS) has a true amplitude of sqrt(2), so it reads
    # about +3.01 dBTP: the sample peak is 3.01 dB below the true peak.
    fs = 48000
    n = np.arange(4800)
    x = (math.sqrt(2) * np.sin(np.pi / 2 * n + np.pi / 4)).astype(np.float32)
    sample_peak_db = 20 * math.log10(float(np.abs(x).max()))
    assert sample_peak_db == pytest.approx(0.0, abs=1e-6)
    m = meters.TruePeakMeter(fs, 1)
    m.process(x[:100].reshape(-1, 1))
    m.arrays["peak"][:] = 0.0  # forget the switch-on transient of the first samples
    m.process(x[100:].reshape(-1, 1))
    reading = m.max_dbtp()[1]
    assert reading == pytest.approx(3.01, abs=0.1)
    # exact steady-state value from the phase responses (scipy.signal.freqz): phase k outputs
    # |H_k| sin(pi/2 n + pi/4 + arg H_k); take the max over one period and the phases
    H = phase_responses(fs / 4, fs)
    amp = float(np.abs(x[100:104]).max()) * math.sqrt(2)  # amplitude of the float32 sine
    pred = max(
        abs(H[k]) * np.abs(np.sin(np.pi / 2 * np.arange(4) + np.pi / 4 + np.angle(H[k]))).max()
        for k in range(4)
    )
    assert reading == pytest.approx(20 * math.log10(amp * pred), abs=1e-6)


def test_block_size_invariance():
    rng = np.random.default_rng(7)
    x = (rng.standard_normal((9000, 2)) * 0.4).astype(np.float32)
    ref = run_blocks(x, 9000)
    for block in (1, 64, 4097):
        m = run_blocks(x, block)
        for name in ("hist", "state", "peak"):
            np.testing.assert_array_equal(m.arrays[name], ref.arrays[name], err_msg=f"{name} {block}")


def test_non_finite_input_is_zeroed_and_does_not_poison():
    # documented behaviour: NaN/inf count as 0
    rng = np.random.default_rng(3)
    x = (rng.standard_normal((2000, 2)) * 0.2).astype(np.float32)
    bad = x.copy()
    bad[100, 0] = np.nan
    bad[500, 1] = np.inf
    bad[501, 1] = -np.inf
    clean = x.copy()
    clean[100, 0] = 0.0
    clean[500:502, 1] = 0.0
    a = run_blocks(bad, 64)
    b = run_blocks(clean, 64)
    assert np.all(np.isfinite(a.arrays["peak"]))
    np.testing.assert_array_equal(a.arrays["peak"], b.arrays["peak"])
    np.testing.assert_array_equal(a.arrays["hist"], b.arrays["hist"])


def _no_subnormals(a):
    a = np.asarray(a, dtype=np.float64)
    return bool(np.all((a == 0) | (np.abs(a) >= np.finfo(np.float64).tiny)))


def test_no_subnormals_after_loud_then_silence():
    # No subnormals (DEVELOPERS.md, "The kernel contract"): loud input, then 10 s of near-silence
    # made of float32 subnormals (1e-40). The ring holds only input samples, and the documented
    # flush stores samples below 1e-30 as exact zeros, so after 12 such samples the ring is all
    # zero.
    fs = 48000
    m = meters.TruePeakMeter(fs, 2)
    loud = faded_sine(fs, 997.0, 0.0, n=4800, amp=0.9)
    m.process(np.stack([loud, loud], axis=1))
    quiet = np.full((4800, 2), 1e-40, dtype=np.float32)
    assert quiet[0, 0] != 0  # really a float32 subnormal
    for _ in range(100):
        m.process(quiet)
        assert _no_subnormals(m.arrays["hist"]) and _no_subnormals(m.arrays["peak"])
        assert np.all(m.arrays["hist"] == 0.0)
    assert m.max_dbtp()[1] == pytest.approx(20 * math.log10(0.9), abs=0.2)


@numba.njit(cache=True, error_model="numpy", nogil=True)
def _other_kernel(x, hist, taps, out):
    # tp_tick used from inside another compiled kernel (as a limiter would)
    pos = 0
    for n in range(x.shape[0]):
        for c in range(x.shape[1]):
            out[n, c] = tp.tp_tick(hist, pos, c, x[n, c], taps)
        pos += 1
        if pos >= 12:
            pos = 0


def test_tp_tick_inside_another_kernel():
    rng = np.random.default_rng(5)
    x = (rng.standard_normal((1000, 2)) * 0.3).astype(np.float32)
    out = np.zeros((1000, 2))
    _other_kernel(x, tp.new_history(2), tp.new_taps(), out)
    m = run_blocks(x, 100)
    np.testing.assert_array_equal(out.max(axis=0), m.arrays["peak"])


def test_silence_and_errors():
    assert meters.true_peak_dbtp(np.zeros(1000, dtype=np.float32), 48000) == -200.0
    m = meters.TruePeakMeter(48000, 2)
    with pytest.raises(ValueError, match=r"block shape \(10, 3\)"):
        m.process(np.zeros((10, 3), dtype=np.float32))
    with pytest.raises(ValueError, match="samplerate = 100"):
        meters.TruePeakMeter(100, 2)

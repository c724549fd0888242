"""Loudness meter: ITU-R BS.1770-4 / EBU R 128, checked against the standards and pyloudnorm."""
import math

import numpy as np
import pyloudnorm as pyln
import pytest
from scipy import signal

from livedyn import meters
from livedyn.dsp import loudness as ld

FLOOR = -200.0

# ITU-R BS.1770-4 Annex 1, Table 1 (stage 1, shelf) and Table 2 (stage 2, high-pass), 48 kHz
# (value recalled from memory).
TABLE1_B = [1.53512485958697, -2.69169618940638, 1.19839281085285]
TABLE1_A = [1.0, -1.69065929318241, 0.73248077421585]
TABLE2_B = [1.0, -2.0, 1.0]
TABLE2_A = [1.0, -1.99004745483398, 0.99007225036621]


def sine(fs, seconds, dbfs, f=997.0, channels=2):
    n = int(round(seconds * fs))
    x = 10 ** (dbfs / 20) * np.sin(2 * np.pi * f * np.arange(n) / fs)
    return np.repeat(x[:, None], channels, axis=1)


def run(x, fs, block=None, weights=None):
    x = np.ascontiguousarray(x, dtype=np.float32)
    m = meters.LoudnessMeter(fs, x.shape[1], weights=weights)
    if block is None:
        m.process(x)
    else:
        for i in range(0, x.shape[0], block):
            m.process(x[i : i + block])
    return m


def readings_per_hop(x, fs):
    """Momentary and short-term readings after every 100 ms hop."""
    m = meters.LoudnessMeter(fs, x.shape[1])
    hop = m.hop
    x = np.ascontiguousarray(x, dtype=np.float32)
    mom, st = [], []
    for i in range(0, x.shape[0] - hop + 1, hop):
        m.process(x[i : i + hop])
        mom.append(m.momentary())
        st.append(m.short_term())
    return np.array(mom), np.array(st), m


def pink(rng, n):
    spec = np.fft.rfft(rng.standard_normal(n))
    k = np.arange(spec.shape[0], dtype=float)
    k[0] = 1.0
    x = np.fft.irfft(spec / np.sqrt(k), n)
    return x / np.std(x)


# --- K-weighting -----------------------------------------------------------------------------
def test_kweight_48k_reproduces_tables_1_and_2():
    # ITU-R BS.1770-4 Tables 1 and 2 (printed to 14 decimals)
    b1, a1, b2, a2 = ld.kweight_coeffs(48000)
    np.testing.assert_allclose(b1, TABLE1_B, rtol=0, atol=1e-13)
    np.testing.assert_allclose(a1, TABLE1_A, rtol=0, atol=1e-13)
    np.testing.assert_allclose(b2, TABLE2_B, rtol=0, atol=1e-13)
    np.testing.assert_allclose(a2, TABLE2_A, rtol=0, atol=1e-13)


def _mag_db(b, a, f, fs):
    return 20 * np.log10(np.abs(signal.freqz(b, a, worN=f, fs=fs)[1]))


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_kweight_response_matches_48k_table_and_prototype(fs):
    # Magnitude (scipy.signal.freqz) from 10 Hz to 10 kHz agrees within 0.02 dB with the
    # published 48 kHz filters (BS.1770-4 Tables 1-2) and with the analog prototype
    # (scipy.signal.freqs). Measured here: at most 0.010 dB, from bilinear frequency warping.
    f = np.geomspace(10, 10000, 300)
    b1, a1, b2, a2 = ld.kweight_coeffs(fs)
    got = _mag_db(b1, a1, f, fs) + _mag_db(b2, a2, f, fs)
    table = _mag_db(TABLE1_B, TABLE1_A, f, 48000) + _mag_db(TABLE2_B, TABLE2_A, f, 48000)
    np.testing.assert_allclose(got, table, atol=0.02)
    w0 = 2 * np.pi * ld.KW_SHELF_F0
    q = ld.KW_SHELF_Q
    hs = signal.freqs([ld.KW_SHELF_VH, ld.KW_SHELF_VB * w0 / q, w0**2], [1, w0 / q, w0**2], 2 * np.pi * f)[1]
    w1 = 2 * np.pi * ld.KW_HP_F0
    hh = signal.freqs([ld.KW_HP_GAIN, 0, 0], [1, w1 / ld.KW_HP_Q, w1**2], 2 * np.pi * f)[1]
    np.testing.assert_allclose(got, 20 * np.log10(np.abs(hs * hh)), atol=0.02)
    # and the K-weighting's own shape: about +4 dB above 5 kHz, about 0 dB at 500 Hz,
    # strongly cut at 10 Hz (BS.1770-4 Fig. 1-2, read as shape only)
    assert 3.5 < got[f > 5000].min() and got.max() < 4.1
    assert abs(np.interp(500, f, got)) < 0.3
    assert got[0] < -10


def test_kernel_filter_equals_lfilter():
    # The kernel's two biquads (transposed direct form II) equal scipy.signal.lfilter of the
    # same coefficients: the mean square of one 100 ms sub-block, mono, weight 1.
    fs = 48000
    rng = np.random.default_rng(11)
    x = (rng.standard_normal((fs // 10, 1)) * 0.3).astype(np.float32)
    m = run(x, fs)
    b1, a1, b2, a2 = ld.kweight_coeffs(fs)
    y = signal.lfilter(b2, a2, signal.lfilter(b1, a1, x[:, 0].astype(np.float64)))
    assert m.arrays["ring"][0] == pytest.approx(np.mean(y**2), rel=1e-12)


# --- EBU Tech 3341 -------------------------------------------------------------------------
@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_tech3341_case1_minus23(fs):
    # EBU Tech 3341 test case 1: stereo sine 997 Hz at -23 dBFS per channel, 20 s:
    # M, S and I read -23.0 +/- 0.1 LUFS.
    m = run(sine(fs, 20.0, -23.0), fs)
    assert m.momentary() == pytest.approx(-23.0, abs=0.1)
    assert m.short_term() == pytest.approx(-23.0, abs=0.1)
    assert m.integrated() == pytest.approx(-23.0, abs=0.1)
    assert m.max_momentary() == pytest.approx(-23.0, abs=0.1)
    assert m.max_short_term() == pytest.approx(-23.0, abs=0.1)


def test_tech3341_case2_minus33():
    # EBU Tech 3341 test case 2: as case 1 at -33 dBFS: -33.0 +/- 0.1 LUFS.
    fs = 48000
    m = run(sine(fs, 20.0, -33.0), fs)
    for v in (m.momentary(), m.short_term(), m.integrated()):
        assert v == pytest.approx(-33.0, abs=0.1)


def _seq(fs, parts):
    return np.concatenate([sine(fs, d, lvl) for lvl, d in parts])


@pytest.mark.parametrize(
    "parts",
    [
        # EBU Tech 3341 cases 3, 4, 5: tone sequences (levels dBFS, durations s) whose gated
        # integrated loudness is -23.0 +/- 0.1 LUFS (values recalled from memory)
        [(-36, 10.0), (-23, 60.0), (-36, 10.0)],
        [(-72, 10.0), (-36, 10.0), (-23, 60.0), (-36, 10.0), (-72, 10.0)],
        [(-26, 20.0), (-20, 20.1), (-26, 20.0)],
    ],
    ids=["case3", "case4", "case5"],
)
def test_tech3341_gated_sequences(parts):
    fs = 48000
    m = run(_seq(fs, parts), fs)
    assert m.integrated() == pytest.approx(-23.0, abs=0.1)


def test_tech3341_case6_five_channels_and_lfe_ignored():
    # EBU Tech 3341 case 6 (value recalled from memory): 5.0 (L R C Ls Rs) sines at
    # -28, -28, -24, -30, -30 dBFS read -23.0 +/- 0.1 LUFS (BS.1770-4 Table 3 weights, 1.41 on
    # the surrounds).
    fs = 48000
    lv = [-28, -28, -24, -30, -30]
    x5 = np.concatenate([sine(fs, 20.0, v, channels=1) for v in lv], axis=1)
    assert run(x5, fs).integrated() == pytest.approx(-23.0, abs=0.1)
    # 5.1 in the order L R C LFE Ls Rs: the LFE channel has weight 0 (BS.1770-4 Table 3)
    lfe = sine(fs, 20.0, -3.0, f=50.0, channels=1)
    x6 = np.concatenate([x5[:, :3], lfe, x5[:, 3:]], axis=1)
    m6 = run(x6, fs)
    assert m6.integrated() == pytest.approx(run(x5, fs).integrated(), abs=1e-9)
    # the same 6 channels with all weights 1 would read far louder
    assert run(x6, fs, weights=[1.0] * 6).integrated() > -20.0


def test_tech3341_momentary_tone_bursts():
    # EBU Tech 3341 momentary case (durations recalled from memory): stereo sine (997 Hz here),
    # 0.18 s at -20 dBFS then 0.22 s at -30 dBFS, repeated. Any 400 ms window holds one period,
    # so M reads -23.0 +/- 0.1 LUFS throughout (BS.1770-4 eq. (2): 10 log10((0.18*1e-2 +
    # 0.22*1e-3) / 0.4) = -22.97).
    fs = 48000
    x = _seq(fs, [(-20, 0.18), (-30, 0.22)] * 25)
    mom, _, m = readings_per_hop(x, fs)
    np.testing.assert_allclose(mom[5:], -23.0, atol=0.1)
    assert m.max_momentary() == pytest.approx(-23.0, abs=0.1)


def test_tech3341_short_term_tone_bursts():
    # EBU Tech 3341 short-term case (durations recalled from memory): 1.34 s at -20 dBFS then
    # 1.66 s at -30 dBFS, repeated: every 3 s window holds one period, S = -23.0 +/- 0.1 LUFS.
    fs = 48000
    x = _seq(fs, [(-20, 1.34), (-30, 1.66)] * 5)
    _, st, m = readings_per_hop(x, fs)
    np.testing.assert_allclose(st[30:], -23.0, atol=0.1)
    assert m.max_short_term() == pytest.approx(-23.0, abs=0.1)


# --- pyloudnorm (a BS.1770 implementation from the package registry) ------------------------
def _signals(fs):
    rng = np.random.default_rng(int(fs))
    n = int(10 * fs)
    white = rng.standard_normal((n, 2)) * 0.1
    pinkn = np.stack([pink(rng, n), pink(rng, n)], axis=1) * 0.05
    # loud and quiet sections: -36 and -45 dBFS fall under the relative gate, -80 under the
    # absolute gate
    parts = [(-20, 3.0), (-45, 2.0), (-36, 2.5), (-80, 2.0), (-18, 1.5), (-26, 3.0)]
    sections = np.concatenate([rng.standard_normal((int(d * fs), 2)) * 10 ** (lv / 20) for lv, d in parts])
    # a level ramp from -60 to -10 dB over 30 s puts gating blocks at every level around the
    # relative gate (exercises the histogram's 0.01 LU bins)
    t = np.arange(int(30 * fs)) / fs
    ramp = rng.standard_normal((t.shape[0], 2)) * 10 ** ((-60 + 50 * t / 30)[:, None] / 20)
    return {"white": white, "pink": pinkn, "sections": sections, "ramp": ramp}


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_agrees_with_pyloudnorm(fs):
    for name, x in _signals(fs).items():
        x = x.astype(np.float32)
        ours = meters.integrated_loudness(x, fs)
        x64 = x.astype(np.float64)
        # pyloudnorm's default K-weighting (shelf 1500 Hz, +4 dB, Q 0.707; high-pass 38 Hz,
        # Q 0.5, unity gain) is not the table's filter: it reads about 0.043 LU lower, nearly
        # all of it the table's high-pass passband gain (1.005 = +0.043 dB) that pyloudnorm
        # normalises away. Tolerance 0.1 LU.
        ref = pyln.Meter(fs).integrated_loudness(x64)
        assert ours == pytest.approx(ref, abs=0.1), name
        # pyloudnorm's "DeMan" filters reproduce the 48 kHz table; they keep the high-pass
        # numerator 1, -2, 1 at every rate, whose passband gain 1 + K/Q + K^2 then varies with
        # fs, where ours keeps the 48 kHz gain. So the difference must be exactly that gain.
        deman = pyln.Meter(fs, filter_class="DeMan").integrated_loudness(x64)
        k = math.tan(math.pi * ld.KW_HP_F0 / fs)
        expected = 20 * math.log10(ld.KW_HP_GAIN / (1 + k / ld.KW_HP_Q + k * k))
        assert ours - deman == pytest.approx(expected, abs=2e-3), name


def test_gating_matters_for_sections():
    # guard for the test above: gating changes the result by far more than its tolerance
    fs = 48000
    x = _signals(fs)["sections"].astype(np.float32)
    b1, a1, b2, a2 = ld.kweight_coeffs(fs)
    y = signal.lfilter(b2, a2, signal.lfilter(b1, a1, x.astype(np.float64), axis=0), axis=0)
    ungated = -0.691 + 10 * np.log10(np.sum(np.mean(y**2, axis=0)))  # BS.1770-4 eq. (2)
    assert meters.integrated_loudness(x, fs) - ungated > 1.0


# --- streaming behaviour ---------------------------------------------------------------------
def test_block_size_invariance():
    fs = 48000
    rng = np.random.default_rng(2)
    x = np.concatenate([rng.standard_normal((fs, 2)) * 0.2, rng.standard_normal((fs // 2, 2)) * 0.01])
    ref = run(x, fs)
    for block in (1, 64, 4097):
        m = run(x, fs, block=block)
        for name, arr in ref.arrays.items():
            np.testing.assert_array_equal(m.arrays[name], arr, err_msg=f"{name}, block {block}")
        assert m.integrated() == ref.integrated()


def test_hour_long_stream_uses_fixed_memory():
    # bounded memory: an hour at 8 kHz mono leaves every state array as allocated
    fs = 8000
    rng = np.random.default_rng(4)
    chunk = (rng.standard_normal((10 * fs, 1)) * 0.1).astype(np.float32)
    m = meters.LoudnessMeter(fs, 1)
    before = {k: (v.shape, v.nbytes, v.ctypes.data) for k, v in m.arrays.items()}
    for _ in range(360):
        m.process(chunk)
    after = {k: (v.shape, v.nbytes, v.ctypes.data) for k, v in m.arrays.items()}
    assert before == after
    assert m.gating_blocks() == 36000 - 3  # one 400 ms block every 100 ms, once 400 ms are in
    one = meters.integrated_loudness(chunk, fs)
    assert m.integrated() == pytest.approx(one, abs=0.02)


def test_silence_reads_floor():
    fs = 48000
    m = run(np.zeros((5 * fs, 2)), fs)
    for v in (m.momentary(), m.short_term(), m.integrated(), m.max_momentary(), m.max_short_term()):
        assert v == FLOOR
    assert meters.integrated_loudness(np.zeros(fs), fs) == FLOOR
    # below the absolute gate (-70 LUFS) the integrated reading is the floor too
    m = run(sine(fs, 5.0, -80.0), fs)
    assert m.integrated() == FLOOR
    assert m.momentary() == pytest.approx(-80.0, abs=0.1)


def test_non_finite_input_counts_as_zero():
    # documented: NaN/inf samples are taken as 0, the meter is not poisoned
    fs = 48000
    rng = np.random.default_rng(9)
    x = (rng.standard_normal((2 * fs, 2)) * 0.1).astype(np.float32)
    bad = x.copy()
    bad[1000, 0] = np.nan
    bad[30000:30010, 1] = np.inf
    bad[50000, 0] = -np.inf
    clean = x.copy()
    clean[1000, 0] = 0.0
    clean[30000:30010, 1] = 0.0
    clean[50000, 0] = 0.0
    a = run(bad, fs, block=64)
    b = run(clean, fs, block=64)
    for name in a.arrays:
        assert np.all(np.isfinite(a.arrays[name])), name
        np.testing.assert_array_equal(a.arrays[name], b.arrays[name], err_msg=name)


def _no_subnormals(a):
    a = np.asarray(a, dtype=np.float64)
    return bool(np.all((a == 0) | (np.abs(a) >= np.finfo(np.float64).tiny)))


def test_no_subnormals_after_loud_then_silence():
    # No subnormals (DEVELOPERS.md, "The kernel contract"): loud input, then 10 s of silence,
    # checked every 100 ms (the 38 Hz high-pass state would pass through subnormals about 3 s into
    # the silence)
    fs = 48000
    rng = np.random.default_rng(6)
    m = meters.LoudnessMeter(fs, 2)
    m.process((rng.standard_normal((fs, 2)) * 0.9).astype(np.float32))
    quiet = np.zeros((fs // 10, 2), dtype=np.float32)
    for _ in range(100):
        m.process(quiet)
        for name, arr in m.arrays.items():
            assert _no_subnormals(arr), name
    assert np.all(m.arrays["filt"] == 0.0)


def test_bad_arguments_raise_one_line():
    with pytest.raises(ValueError, match=r"^samplerate = 1000: out of range, expected 8000 to 768000 Hz$"):
        meters.LoudnessMeter(1000, 2)
    with pytest.raises(ValueError, match=r"^channels = 0"):
        meters.LoudnessMeter(48000, 0)
    with pytest.raises(ValueError, match=r"^weights = "):
        meters.LoudnessMeter(48000, 2, weights=[1.0])
    m = meters.LoudnessMeter(48000, 2)
    with pytest.raises(ValueError, match=r"^block shape \(64,\)"):
        m.process(np.zeros(64, dtype=np.float32))


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_agrees_with_pyloudnorm_on_the_demo_scenario(fs):
    # pyloudnorm's "DeMan" filters (the 48 kHz table) on livedyn's own rehearsal scenario: the
    # same gain relation as in test_agrees_with_pyloudnorm, and the default filter within 0.1 LU.
    from livedyn import demo

    sc = demo.scenario(fs, seconds=8.0)
    k = math.tan(math.pi * ld.KW_HP_F0 / fs)
    expected = 20 * math.log10(ld.KW_HP_GAIN / (1 + k / ld.KW_HP_Q + k * k))
    for name in ("drums", "music", "narrator"):
        x = sc[name]
        ours = meters.integrated_loudness(x, fs)
        x64 = x.astype(np.float64)
        assert ours == pytest.approx(pyln.Meter(fs).integrated_loudness(x64), abs=0.1), name
        deman = pyln.Meter(fs, filter_class="DeMan").integrated_loudness(x64)
        assert ours - deman == pytest.approx(expected, abs=2e-3), name


def test_7_1_layout_weights_of_bs1770_table_3():
    # ITU-R BS.1770-4 Table 3: G = 1.41 (+1.5 dB) for loudspeakers at 60-120 degrees azimuth
    # (the 7.1 side surrounds Ls, Rs), 1.0 for the front and the back surrounds (135-150
    # degrees; the azimuth rule recalled from memory), and the LFE channel is not measured.
    # 8 channels in WAVE_FORMAT_EXTENSIBLE order: L R C LFE Lb Rb Ls Rs.
    fs = 48000
    tone = sine(fs, 4.0, -20.0, channels=1)

    def only(i, layout=None):
        x = np.zeros((tone.shape[0], 8))
        x[:, i] = tone[:, 0]
        m = meters.MeterSet(fs, 8, layout=layout) if layout else None
        if m is None:
            return run(x, fs).integrated()
        m.process(np.ascontiguousarray(x, np.float32))
        return m.loudness.integrated()

    front = only(0)
    assert only(6) - front == pytest.approx(10 * math.log10(1.41), abs=1e-6)  # +1.49 dB
    assert only(7) - front == pytest.approx(10 * math.log10(1.41), abs=1e-6)
    assert only(4) == pytest.approx(front, abs=1e-9)
    assert only(3) < -150  # the LFE alone: nothing measured
    assert only(6, "7.1") == pytest.approx(only(6), abs=1e-9)  # 8 channels default to 7.1
    np.testing.assert_array_equal(ld.default_weights(6, "5.1"), [1, 1, 1, 0, 1.41, 1.41])


def test_layout_that_does_not_fit_is_one_line():
    from livedyn.params import ParamError

    with pytest.raises(ParamError, match=r"layout = 5.1: 6 channels \(L R C LFE Ls Rs\), the "
                                         r"signal has 2"):
        meters.MeterSet(48000, 2, layout="5.1")

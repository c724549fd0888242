"""The example algorithm files in livedyn/examples/, checked against outside references.

* program_release.py: its smoother against a plain-numpy reimplementation of the equations in
  its docstring, and release times measured after short, medium and long bursts against the
  times those equations predict.
* speech_key.py: its key weighting against scipy.signal's Butterworth design, its gain curve
  against its equation, and a speech-band tone against 60 Hz hum at the same level.
* loudness_ducker.py: its K-weighting against ITU-R BS.1770-4 Tables 1 and 2 and pyloudnorm,
  its momentary loudness against pyloudnorm's 400 ms gating blocks, and the depth against the
  mapping its docstring specifies.

And for each: it loads, stays finite on noise, silence, full scale and NaN, never boosts and
gives the same output for any block split.
"""
import math
import sys
from pathlib import Path

import numpy as np
import pyloudnorm as pyln
import pytest
from scipy import signal

import livedyn
from livedyn.loader import load
from livedyn.dsp import layout as L
from livedyn.shipped import examples_folder

FS = 48000
EXAMPLES = examples_folder()
NAMES = ("program_release", "speech_key", "loudness_ducker")

# ITU-R BS.1770-4 Annex 1, Table 1 (stage 1, shelf) and Table 2 (stage 2, high-pass), 48 kHz,
# as b0, b1, b2, a1, a2 (a0 = 1) (values recalled from memory; the same figures are in
# tests/test_loudness.py).
BS1770_SHELF = [1.53512485958697, -2.69169618940638, 1.19839281085285,
                -1.69065929318241, 0.73248077421585]
BS1770_HP = [1.0, -2.0, 1.0, -1.99004745483398, 0.99007225036621]


# ---- helpers ----------------------------------------------------------------------------------

def example(name):
    return load(EXAMPLES / f"{name}.py", check=False)


def module_of(alg):
    """The loaded module of a user algorithm (for its helper functions and STATE names)."""
    for m in list(sys.modules.values()):
        f = getattr(m, "__file__", None)
        if f and Path(f).resolve() == Path(alg.source).resolve():
            return m
    raise LookupError(f"module of {alg.source} is not loaded")


def user_state(proc):
    """The declared STATE of a processor's user algorithm: (columns, nstate), a view."""
    return proc.st[L.NROWS:].reshape(proc.st.shape[1], -1)


def noise(frames, ch, rms=0.3, seed=0):
    rng = np.random.default_rng(seed)
    return (rms * rng.standard_normal((frames, ch))).astype(np.float32)


def tone(f, dbfs, seconds, fs=FS, ch=1):
    n = np.arange(int(round(seconds * fs)))
    x = 10 ** (dbfs / 20) * np.sin(2 * np.pi * f * n / fs)
    return np.repeat(x[:, None], ch, axis=1).astype(np.float32)


def square(amp, frames, half_period=48):
    """A square wave with no zero samples (so |x| is constant for a peak detector)."""
    n = np.arange(frames)
    return np.where((n // half_period) % 2 == 0, amp, -amp)


def run_blocks(proc, x, key, block):
    out = np.empty_like(x)
    for i in range(0, len(x), block):
        out[i:i + block] = proc.process(x[i:i + block],
                                        None if key is None else key[i:i + block])
    return out


def make(name, **extra):
    """A processor of the example, configured for the common tests."""
    alg = example(name)
    if name == "program_release":
        return livedyn.Processor(alg, FS, 2, threshold=-30, ratio=4, attack=2, **extra)
    if name == "speech_key":
        return livedyn.Processor(alg, FS, 2, key_channels=1, key="external", threshold=-30,
                                 **extra)
    return livedyn.Processor(alg, FS, 2, key_channels=1, **extra)


def programme(frames=24000, seed=0):
    """Stereo noise with silence, a full-scale square and one NaN; a key of bursts of noise."""
    x = noise(frames, 2, 0.3, seed)
    q = frames // 4
    x[q:2 * q] = 0.0  # silence
    x[2 * q:3 * q] = square(1.0, q)[:, None]  # full scale
    x[3 * q + 100, 0] = np.nan
    env = ((np.arange(frames) // 4800) % 2 == 0).astype(np.float32)
    key = noise(frames, 1, 0.3, seed + 1) * env[:, None]
    key[3 * q + 200, 0] = np.inf
    return x, key


# ---- every example ------------------------------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_example_loads_stays_finite_and_never_boosts(name):
    proc = make(name)
    x, key = programme()
    k = None if name == "program_release" else key
    if proc.algorithm.kind == "user":  # a whole kernel: no traces; gain = out / in
        y = proc.process(x, k)
        assert np.isfinite(y).all()
        ok = np.isfinite(x)
        assert np.all(np.abs(y[ok]) <= np.abs(x[ok]))  # never above the input
        assert np.all(y[~ok] == 0.0)
        xs = x[ok].astype(np.float64)
        ratio = np.abs(y[ok]) / np.maximum(np.abs(xs), 1e-30)
        # not vacuous: the key bursts did duck the programme by several dB
        assert ratio[np.abs(xs) > 1e-3].min() < 10 ** (-3 / 20)
    else:
        y, tr = proc.process_traced(x, k)
        assert np.isfinite(y).all()
        assert np.all(tr["gain_db"] <= 0.0)
        assert np.all(tr["total_gain_db"] <= 0.0)  # makeup is 0 dB
        assert tr["gain_db"].min() < -3.0  # not vacuous: it did reduce gain
    # negative control for the trace check: a file's makeup does show up as gain above 0 dB
    if "makeup" in proc.schema:
        p2 = make(name, makeup=6)
        _, tr2 = p2.process_traced(x, k)
        assert tr2["total_gain_db"].max() > 5.9


@pytest.mark.parametrize("name", NAMES)
def test_example_output_is_the_same_for_any_block_split(name):
    x, key = programme(24000, seed=3)
    k = None if name == "program_release" else key
    proc = make(name)
    whole = proc.process(x, k)
    assert np.max(np.abs(whole[np.isfinite(x)] - x[np.isfinite(x)])) > 0.01  # it did act
    for b in (1, 7, 64, 1000):
        proc.reset()
        np.testing.assert_array_equal(run_blocks(proc, x, k, b), whole, err_msg=f"block {b}")


# ---- program_release.py ----------------------------------------------------------------------

def ref_program_release(c, fs, attack, release_fast, release_slow, sustain):
    """The docstring's equations in plain numpy: two branching one-poles, the more negative
    one wins ([GMR2012] eq. (16) per envelope; see tests/reference.py)."""
    def alpha(tau_ms):
        return 0.0 if tau_ms <= 0 else math.exp(-1.0 / (tau_ms * 1e-3 * fs))

    a_att, a_rf, a_rs, a_sus = (alpha(attack), alpha(release_fast), alpha(release_slow),
                                alpha(sustain))
    f = s = 0.0
    g = np.empty(len(c))
    for n, v in enumerate(c):
        f = a_att * f + (1 - a_att) * v if v < f else a_rf * f + (1 - a_rf) * v
        s = a_sus * s + (1 - a_sus) * v if v < s else a_rs * s + (1 - a_rs) * v
        g[n] = min(f, s)
    return g


PR = dict(threshold=-30.0, ratio=4.0, knee=0.0, attack=1.0, release_fast=50.0,
          release_slow=1000.0, sustain=300.0)


def test_program_release_smoother_matches_a_numpy_reimplementation():
    alg = example("program_release")
    proc = livedyn.Processor(alg, FS, 1, **PR)
    # bursts of 20 ms, 200 ms and 1.5 s of a square at -6 dBFS, with 1.2 s gaps; then noise
    parts = []
    for dur in (0.02, 0.2, 1.5):
        parts += [square(0.5, int(dur * FS)), np.zeros(int(1.2 * FS))]
    parts.append(noise(int(0.5 * FS), 1, 0.2, seed=5)[:, 0])
    x = np.concatenate(parts).astype(np.float32)[:, None]
    _, tr = proc.process_traced(x)
    ref = ref_program_release(tr["curve_db"][:, 0], FS, PR["attack"], PR["release_fast"],
                              PR["release_slow"], PR["sustain"])
    np.testing.assert_allclose(tr["gain_db"][:, 0], ref, rtol=0, atol=1e-9)
    # and it is not the built-in ballistics: a plain compressor releases differently
    plain = livedyn.Processor("compressor", FS, 1, threshold=-30, ratio=4, knee=0, attack=1,
                              release=50)
    _, tr_plain = plain.process_traced(x)
    assert np.max(np.abs(tr_plain["gain_db"][:, 0] - ref)) > 3.0


def release_time(gain_db, end):
    """Seconds after the burst ending at sample ``end`` (exclusive) until the gain has come
    back 63 % of the way from its value at the end of the burst (to G/e)."""
    g_end = gain_db[end - 1]
    after = np.nonzero(gain_db[end:] >= g_end / math.e)[0]
    return (after[0] + 1) / FS


@pytest.mark.parametrize("burst_ms", [20.0, 600.0, 3000.0])
def test_program_release_time_follows_the_burst_length(burst_ms):
    # Derived from the equations: after a burst of constant reduction G lasting T (attack << T),
    # the slow envelope holds c G with c = 1 - exp(-T / sustain); the gain reaches G/e after
    # release_fast when c <= 1/e, else after release_slow (1 + ln c).
    alg = example("program_release")
    proc = livedyn.Processor(alg, FS, 1, **PR)
    n_burst = int(burst_ms * 1e-3 * FS)
    x = np.concatenate([square(0.5, n_burst), np.zeros(int(4.0 * FS))]).astype(np.float32)
    _, tr = proc.process_traced(x[:, None])
    g = tr["gain_db"][:, 0]
    # the curve: a square of peak 0.5 is 24 dB over a -30 dBFS threshold; 3/4 of it at 4:1
    assert g[n_burst - 1] == pytest.approx(-0.75 * (20 * math.log10(0.5) + 30), abs=1e-3)
    c = 1.0 - math.exp(-burst_ms / PR["sustain"])
    if c <= 1.0 / math.e:
        expected = PR["release_fast"] * 1e-3
    else:
        expected = PR["release_slow"] * 1e-3 * (1.0 + math.log(c))
    got = release_time(g, n_burst)
    assert got == pytest.approx(expected, rel=0.01, abs=2.0 / FS)
    # negative control: the built-in compressor with one release time does not depend on it
    plain = livedyn.Processor("compressor", FS, 1, threshold=-30, ratio=4, knee=0, attack=1,
                              release=PR["release_fast"])
    _, tr_plain = plain.process_traced(x[:, None])
    got_plain = release_time(tr_plain["gain_db"][:, 0], n_burst)
    assert got_plain == pytest.approx(PR["release_fast"] * 1e-3, abs=2.0 / FS)
    if burst_ms > 100:
        assert got > 10 * got_plain


# ---- speech_key.py -------------------------------------------------------------------------------

def speech_proc(fs=FS, **kw):
    return livedyn.Processor(example("speech_key"), fs, 2, key_channels=1, key="external", **kw)


def steady_detector_db(proc, key, settle):
    """Mean (in power) of the detector level over the key after ``settle`` samples."""
    main = np.zeros((len(key), 2), np.float32)
    proc.process(main[:settle], key[:settle])
    _, tr = proc.process_traced(main[settle:], key[settle:])
    return 10 * np.log10(np.mean(10 ** (tr["detector_db"][:, 0] / 10)))


@pytest.mark.parametrize("fs,low,high,freqs", [
    (48000, 300.0, 3400.0, [40, 60, 100, 300, 1000, 3400, 6000, 12000]),
    (44100, 200.0, 5000.0, [60, 200, 1500, 5000, 15000]),
])
def test_speech_key_weighting_matches_scipy_butterworth(fs, low, high, freqs):
    # Reference: scipy.signal.butter, 2nd-order Butterworth high-pass and low-pass (bilinear
    # transform, pre-warped), in cascade; evaluated with sosfreqz. The detector is
    # sine-referenced, so a steady tone of level A reads A + 20 log10 |H(f)|.
    sos = np.vstack([signal.butter(2, low, "highpass", fs=fs, output="sos"),
                     signal.butter(2, high, "lowpass", fs=fs, output="sos")])
    _, h = signal.sosfreqz(sos, worN=np.asarray(freqs, float), fs=fs)
    want = 20 * np.log10(np.abs(h))
    got = []
    for f in freqs:
        proc = speech_proc(fs, low=low, high=high, rms_time=100)
        got.append(steady_detector_db(proc, tone(f, -20.0, 1.5, fs), int(1.2 * fs)) + 20.0)
    np.testing.assert_allclose(got, want, atol=0.02)
    assert min(got) < -20.0  # not flat: the weighting is there


def smoothstep_curve(level_db, threshold, knee, depth):
    """The docstring's ducker curve, written again in numpy."""
    d = np.asarray(level_db) - threshold
    if knee == 0:
        return np.where(d > 0, -depth, 0.0)
    t = np.clip((d + knee / 2) / knee, 0.0, 1.0)
    return -depth * t * t * (3 - 2 * t)


@pytest.mark.parametrize("knee", [0.0, 10.0])
def test_speech_key_gain_curve_follows_its_equation(knee):
    proc = speech_proc(threshold=-30, knee=knee, depth=15)
    n = FS
    ramp = 10 ** (np.linspace(-60, 0, n) / 20)
    key = (ramp * np.sin(2 * np.pi * 1000 * np.arange(n) / FS)).astype(np.float32)[:, None]
    _, tr = proc.process_traced(np.zeros((n, 2), np.float32), key)
    lv = tr["detector_db"][:, 0]
    want = smoothstep_curve(lv, -30.0, knee, 15.0)
    np.testing.assert_allclose(tr["curve_db"][:, 0], want, atol=1e-9)
    assert want.min() == pytest.approx(-15.0) and want.max() == 0.0  # the sweep crossed it


def steady_gain_db(proc, key, seconds_tail=0.2):
    main = noise(len(key), 2, 0.1, seed=7)
    _, tr = proc.process_traced(main, key)
    return float(np.mean(tr["total_gain_db"][-int(seconds_tail * FS):, 0]))


def test_speech_tone_ducks_and_hum_at_the_same_level_does_not():
    speech = tone(1000, -20.0, 1.0)
    hum = tone(60, -20.0, 1.0)
    kw = dict(threshold=-35, knee=6, depth=12, attack=10, release=150)
    assert steady_gain_db(speech_proc(**kw), speech) == pytest.approx(-12.0, abs=0.01)
    # 60 Hz through the 300 Hz high-pass: -28 dB (scipy, as above), so -48 dBFS < threshold
    assert steady_gain_db(speech_proc(**kw), hum) == pytest.approx(0.0, abs=0.01)
    # negative control: livedyn's ducker without key filters ducks both by the same amount
    for key in (speech, hum):
        plain = livedyn.Processor("ducker", FS, 2, key_channels=1, key_hpf="off",
                                  threshold=-35, range=12, hold=0)
        assert steady_gain_db(plain, key) == pytest.approx(-12.0, abs=0.01)


# ---- loudness_ducker.py ------------------------------------------------------------------------

def test_kweighting_equals_bs1770_tables_at_48k_and_pyloudnorm_at_other_rates():
    kw = module_of(example("loudness_ducker")).kweighting
    # BS.1770-4 Tables 1 and 2 (recalled from memory), 48 kHz: printed to 14 decimals
    np.testing.assert_allclose(kw(48000.0), BS1770_SHELF + BS1770_HP, rtol=0, atol=1e-13)
    # pyloudnorm's "DeMan" filter class: the same analog prototypes, bilinear at any rate.
    # Its high-pass keeps the digital numerator 1, -2, 1 at every rate where the example keeps
    # the analog gain; that differs by |1 + K/Q + K^2 - const| < 0.3 % at 44.1-96 kHz.
    for fs in (44100, 48000, 96000):
        f = list(pyln.Meter(fs, filter_class="DeMan")._filters.values())
        ref_shelf = np.concatenate([f[0].b, f[0].a[1:]])
        ref_hp_a = f[1].a[1:]
        got = np.asarray(kw(float(fs)))
        np.testing.assert_allclose(got[:5], ref_shelf, rtol=0, atol=1e-11)
        np.testing.assert_allclose(got[8:], ref_hp_a, rtol=0, atol=1e-11)
        np.testing.assert_allclose(got[5:8] / got[5], [1, -2, 1], atol=1e-15)
        assert abs(got[5] - 1.0) < 3e-3
    # negative control: pyloudnorm's default (cookbook) K-weighting is not the table
    f = list(pyln.Meter(48000)._filters.values())
    assert np.max(np.abs(np.concatenate([f[0].b, f[0].a[1:]]) - BS1770_SHELF)) > 1e-5


def loudness_readings(fs, key):
    """The example's momentary loudness after every 100 ms sub-block of ``key``."""
    alg = example("loudness_ducker")
    slot = module_of(alg).S.loudness
    proc = livedyn.Processor(alg, fs, 2, key_channels=key.shape[1])
    hop = int(round(fs / 10))
    main = np.zeros((hop, 2), np.float32)
    out = []
    for i in range(0, len(key) - hop + 1, hop):
        proc.process(main, key[i:i + hop])
        out.append(user_state(proc)[0, slot])
    return np.array(out)


@pytest.mark.parametrize("fs,channels,tol", [(48000, 1, 1e-6), (48000, 2, 1e-6),
                                              (44100, 1, 0.01)])
def test_momentary_loudness_equals_pyloudnorm_gating_blocks(fs, channels, tol):
    # Reference: pyloudnorm's BS.1770-4 meter ("DeMan" filters, the exact 48 kHz tables),
    # whose blockwise loudness j covers samples [j H, j H + 4 H), H = 100 ms. The example's
    # reading after sub-block m covers the same samples as block m - 3. At 44.1 kHz the two
    # high-pass numerator conventions differ by 0.004 dB (see the test above).
    rng = np.random.default_rng(11)
    hop = fs // 10
    n = 24 * hop
    levels = np.repeat([0.3, 0.02, 0.1, 0.001, 0.5, 0.05], 4 * hop)  # steps every 400 ms
    key = (levels[:n, None] * rng.standard_normal((n, channels))).astype(np.float32)
    key[:, -1] *= 0.5  # the channels differ
    meter = pyln.Meter(fs, filter_class="DeMan")
    meter.integrated_loudness(key.astype(np.float64))
    ref = np.asarray(meter.blockwise_loudness)
    got = loudness_readings(fs, key)
    np.testing.assert_allclose(got[3:], ref[:len(got) - 3], rtol=0, atol=tol)
    assert np.ptp(ref) > 20  # the steps are there


def test_997hz_full_scale_sine_reads_minus_3_01_lufs():
    # ITU-R BS.1770-4: a 0 dBFS 997 Hz sine in one channel reads -3.01 LKFS (recalled from
    # memory).
    got = loudness_readings(48000, tone(997, 0.0, 1.0))
    assert got[-1] == pytest.approx(-3.01, abs=0.005)


def depth_spec(lufs, onset, span, fade, dmin, dmax):
    """The depth mapping as specified (piecewise linear through three points)."""
    if lufs < onset - fade:
        return 0.0
    return float(np.interp(lufs, [onset - fade, onset, onset + span], [0.0, dmin, dmax]))


def test_ducking_depth_follows_key_loudness_as_specified():
    spec = dict(onset=-40.0, span=16.0, fade=4.0, depth_min=4.0, depth_max=16.0)
    alg = example("loudness_ducker")
    meter = pyln.Meter(FS, filter_class="DeMan")
    main = noise(int(2.5 * FS), 2, 0.2, seed=9)
    depths = []
    for key_dbfs in (-50.0, -39.0, -35.0, -30.0, -26.0, -8.0):
        # a 997 Hz sine reads its dBFS level - 3.01 LUFS (see above): -53 ... -11 LUFS
        key = tone(997, key_dbfs, 2.5)
        lufs = meter.integrated_loudness(key[:, 0].astype(np.float64))
        proc = livedyn.Processor(alg, FS, 2, key_channels=1, attack=20, release=200, **spec)
        y = proc.process(main, key)
        tail = slice(int(2.0 * FS), None)
        gain_db = 20 * np.log10(np.abs(y[tail].astype(np.float64)) / np.abs(main[tail]))
        want = -depth_spec(lufs, spec["onset"], spec["span"], spec["fade"],
                           spec["depth_min"], spec["depth_max"])
        np.testing.assert_allclose(gain_db, want, atol=0.02, err_msg=f"key {key_dbfs} dBFS")
        depths.append(-float(np.median(gain_db)))
    # the points straddle every piece of the mapping: none, fade, span, clipped at depth_max
    assert depths[0] == pytest.approx(0.0, abs=1e-6)
    assert 0.5 < depths[1] < 4.0
    assert np.all(np.diff(depths) > 0.5)  # deeper for every louder key
    assert depths[-1] == pytest.approx(16.0, abs=0.02)

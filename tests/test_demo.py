"""Tests of livedyn.demo, the synthesised demo scenario (a small theatre rehearsal).

Each check names its source beside it: a standard's clause, a reference library (numpy's C maths
library functions, scipy.signal, pyloudnorm as a BS.1770 implementation), or the brief of the
scenario ("scenario spec", the intended content), or "common practice, no source".
"""
import hashlib
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import pyloudnorm
import soundfile
from scipy import signal

from livedyn import demo

ROOT = Path(__file__).resolve().parents[1]
FS = 48000
SECONDS = 16.0
RATES = (44100, 48000, 96000)


def rms_dbfs(x):
    """RMS level in dBFS per AES17-2020 clause 3 (clause number recalled from memory).

    A full-scale sine reads 0 dBFS, so the level is 20 log10(rms) + 3.01 dB.
    """
    x = np.asarray(x, dtype=np.float64)
    return 20.0 * math.log10(math.sqrt(float(np.mean(x * x)))) + 20.0 * math.log10(math.sqrt(2.0))


def peak_dbfs(x):
    return 20.0 * math.log10(float(np.max(np.abs(np.asarray(x, dtype=np.float64)))))


def crest_db(x):
    """Peak-to-RMS ratio in dB (plain ratio, no AES17 offset)."""
    x = np.asarray(x, dtype=np.float64)
    return 20.0 * math.log10(float(np.max(np.abs(x))) / math.sqrt(float(np.mean(x * x))))


def pauses(phrases, seconds):
    """The spans between phrases, including the lead-in and the tail."""
    edges = [0.0] + [t for p in phrases for t in p] + [seconds]
    return [(edges[i], edges[i + 1]) for i in range(0, len(edges), 2)]


def span(x, fs, a, b, guard=0.0):
    return x[int(math.ceil((a + guard) * fs)) : int(math.floor((b - guard) * fs))]


@pytest.fixture(scope="module")
def scenes():
    return {fs: demo.scenario(fs, SECONDS) for fs in RATES}


@pytest.fixture(scope="module")
def scene(scenes):
    return scenes[FS]


# --- constants and portable arithmetic -------------------------------------------------------


def test_level_constants_match_their_formulas():
    # AES17-2020 clause 3 (clause number recalled from memory): dBFS relative to full scale;
    # an RMS level in dBFS is referred to a full-scale sine, whose RMS is 1/sqrt(2).
    assert demo.MINUS_1_DBFS == pytest.approx(10 ** (-1 / 20), rel=1e-15)
    assert demo.ROOM_RMS == pytest.approx(10 ** (-70 / 20) / math.sqrt(2.0), rel=1e-15)
    assert demo.DRUM_PEAK < demo.MINUS_1_DBFS
    assert float(np.float32(demo.DRUM_PEAK)) <= demo.MINUS_1_DBFS
    assert demo._LN2 == pytest.approx(math.log(2.0), rel=1e-16)
    assert demo._INV_LN2 == pytest.approx(1.0 / math.log(2.0), rel=1e-16)


def test_portable_sine_matches_libm():
    # Reference: numpy.sin / numpy.cos (the C maths library).
    x = np.concatenate([np.linspace(-3.0, 3.0, 20001), np.linspace(1e4, 1e4 + 1.0, 1001),
                        np.array([0.25, 0.5, -0.25, 1.0, 123456.125])])
    # The reference argument is reduced exactly first (np.mod), since 2 pi x itself would lose
    # digits for large x.
    xr = np.mod(x, 1.0)
    assert np.max(np.abs(demo._sin_turns(x) - np.sin(2 * np.pi * xr))) < 1e-12
    assert np.max(np.abs(demo._cos_turns(x) - np.cos(2 * np.pi * xr))) < 1e-12
    assert demo._sin_turns_scalar(0.123) == pytest.approx(math.sin(2 * math.pi * 0.123), abs=1e-13)
    assert demo._sin_turns_scalar(-0.4) == pytest.approx(math.sin(2 * math.pi * -0.4), abs=1e-13)


def test_block_built_sine_rows_match_libm():
    # Reference: numpy.sin. Rows of different step and phase, lengths that are not multiples of
    # the internal block.
    step = np.array([185.0, 1700.0, 3400.0]) / 44100.0
    phase = np.array([0.0, 0.3, -1.7])
    for n in (1, 7, 1000, 1321):
        m = np.arange(n)
        want = np.sin(2 * np.pi * (phase[:, None] + step[:, None] * m))
        assert np.max(np.abs(demo._sin_rows(step, phase, n) - want)) < 1e-11


def test_portable_exp_matches_libm():
    # Reference: numpy.exp (the C maths library).
    x = np.concatenate([np.linspace(-60.0, 5.0, 50001), np.array([0.0, -1e-9, 1.0])])
    assert np.max(np.abs(demo._exp(x) / np.exp(x) - 1.0)) < 1e-14


def test_fir_band_pass_response():
    # Reference: scipy.signal.freqz. Pass band flat to 0.1 dB between the band edges (inset by
    # the transition width); beyond the transition the Hann window's side lobes keep the stop
    # band below -40 dB (the Hann window's first side lobe is about -31 dB and the windowed
    # sinc's stop band about -44 dB: values recalled from memory; -40 dB is our margin).
    for fs in RATES:
        h = demo._fir_taps(fs, 2500.0, 9000.0, 1500.0)
        assert h.shape[0] % 2 == 1
        assert np.allclose(h, h[::-1])  # linear phase
        f, resp = signal.freqz(h, worN=np.array([300.0, 500.0, 4000.0, 6000.0, 7500.0, 11000.0,
                                                  15000.0]), fs=fs)
        db = 20 * np.log10(np.abs(resp))
        assert np.all(np.abs(db[2:5]) < 0.1), (fs, db)
        assert np.all(db[[0, 1, 5, 6]] < -40.0), (fs, db)


def test_band_noise_has_unit_variance_at_every_rate():
    # Common practice, no source: normalising by sqrt(sum h^2) gives unit variance for white
    # input of unit variance; 20000 samples give the variance to about +-2 %.
    for fs in RATES:
        x = demo._band_noise(demo._Draws(7), 4, 20000, fs, 7000.0, 13000.0, 2500.0)
        assert np.var(x) == pytest.approx(1.0, rel=0.05)


def test_draws_are_uniform_and_follow_the_pcg64_stream():
    # Reference: numpy's PCG64 bit generator and its documented 53-bit conversion to doubles
    # (Generator.random uses the top 53 bits of each 64-bit word).
    d = demo._Draws(11)
    u = d.many(100000)
    assert 0.0 <= u.min() and u.max() < 1.0
    assert np.mean(u) == pytest.approx(0.5, abs=0.005)
    ref = np.random.Generator(np.random.PCG64(11)).random(100001)
    assert np.array_equal(u, ref[:100000])
    assert d.one() == ref[100000]


# --- API: shapes, types, determinism ----------------------------------------------------------


def test_shapes_and_dtypes(scene):
    frames = int(round(SECONDS * FS))
    assert set(scene) == {"drums", "music", "narrator", "phrases"}
    for name, channels in (("drums", 2), ("music", 2), ("narrator", 1)):
        x = scene[name]
        assert x.dtype == np.float32, name
        assert x.shape == (frames, channels), name
        assert x.flags.c_contiguous, name
    assert demo.drum_loop(FS, 1.0).shape == (FS, 2)
    assert demo.music_bed(FS, 1.0).shape == (FS, 2)
    assert demo.narrator(FS, 1.0).shape == (FS, 1)
    assert all(isinstance(a, float) and isinstance(b, float) for a, b in scene["phrases"])


def test_deterministic_within_a_process(scene):
    again = demo.scenario(FS, SECONDS)
    for name in ("drums", "music", "narrator"):
        assert scene[name].tobytes() == again[name].tobytes(), name
    assert scene["phrases"] == again["phrases"]
    assert demo.narrator(FS, SECONDS).tobytes() == scene["narrator"].tobytes()
    assert demo.drum_loop(FS, SECONDS).tobytes() == scene["drums"].tobytes()


def test_deterministic_across_processes(scene):
    # A fresh interpreter (other thread settings, other hash seed) gives the same bytes.
    code = ("import hashlib; from livedyn import demo; s = demo.scenario(48000, 16.0); "
            "print(*(hashlib.sha256(s[k].tobytes()).hexdigest() for k in "
            "('drums', 'music', 'narrator')))")
    env = dict(os.environ, PYTHONHASHSEED="12345", OMP_NUM_THREADS="1",
               OPENBLAS_NUM_THREADS="1", PYTHONPATH=str(ROOT))
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, check=True, timeout=120).stdout.split()
    here = [hashlib.sha256(scene[k].tobytes()).hexdigest() for k in ("drums", "music", "narrator")]
    assert out == here


def test_seeds_change_the_content():
    assert not np.array_equal(demo.drum_loop(FS, 4.0, seed=1), demo.drum_loop(FS, 4.0, seed=5))
    assert not np.array_equal(demo.music_bed(FS, 4.0, seed=2), demo.music_bed(FS, 4.0, seed=5))
    assert not np.array_equal(demo.narrator(FS, 4.0, seed=3), demo.narrator(FS, 4.0, seed=5))


def test_import_does_not_load_numba():
    code = "import sys, livedyn.demo; print('numba' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], env=dict(os.environ, PYTHONPATH=str(ROOT)),
                         capture_output=True, text=True, check=True, timeout=60).stdout.strip()
    assert out == "False"


@pytest.mark.parametrize(
    "call, words",
    [
        (lambda: demo.drum_loop(1000), "samplerate = 1000"),
        (lambda: demo.music_bed(48000.5), "samplerate = 48000.5"),
        (lambda: demo.narrator(True), "samplerate = True"),
        (lambda: demo.drum_loop(48000, 0.0), "seconds = 0.0"),
        (lambda: demo.music_bed(48000, float("nan")), "seconds = nan"),
        (lambda: demo.narrator(48000, 1e-6), "seconds = 1e-06"),
        (lambda: demo.narrator(48000, 4.0, seed=-1), "seed = -1"),
        (lambda: demo.drum_loop(48000, 4.0, seed=1.5), "seed = 1.5"),
        (lambda: demo.scenario(48000, 601.0), "seconds = 601.0"),
    ],
)
def test_bad_arguments_raise_one_line_errors(call, words):
    # Project rule: one line naming the value, what is wrong and what was expected.
    with pytest.raises(ValueError) as info:
        call()
    message = str(info.value)
    assert message.startswith(words) and "expected" in message and "\n" not in message


# --- levels and bounds ------------------------------------------------------------------------


def test_all_samples_finite_bounded_and_not_subnormal(scenes):
    tiny = np.finfo(np.float32).tiny
    for fs, sc in scenes.items():
        for name in ("drums", "music", "narrator"):
            x = sc[name]
            assert np.all(np.isfinite(x)), (fs, name)
            assert np.max(np.abs(x)) <= 1.0, (fs, name)
            assert not np.any((x != 0) & (np.abs(x) < tiny)), (fs, name)


def test_drum_peak_is_just_under_minus_1_dbfs(scenes):
    # Scenario spec: sample peak near -1 dBFS, never above (AES17 for dBFS).
    for fs, sc in scenes.items():
        peak = float(np.max(np.abs(sc["drums"])))
        assert peak <= demo.MINUS_1_DBFS, fs
        assert 20 * math.log10(peak) > -1.01, fs


def test_drums_have_accents_well_above_the_body(scene):
    # Scenario spec: some hits much louder than others. Peak per sixteenth-note step (125 ms):
    # the loudest 5 % of steps are at least 6 dB above the median step (common practice, no
    # source, for "much louder").
    d = scene["drums"].astype(np.float64)
    step = int(0.125 * FS)
    n = d.shape[0] // step
    peaks = np.max(np.abs(d[: n * step]).reshape(n, step, 2), axis=(1, 2))
    db = 20 * np.log10(np.maximum(peaks, 1e-6))  # a step may be silent
    assert np.percentile(db, 95) - np.median(db) > 6.0


def test_drum_crest_factor_clearly_above_the_music_bed(scene):
    # Common practice, no source: a percussive loop has a crest factor of well over 15 dB, a
    # sustained pad and bass of around 10 dB; "clearly above" taken as 6 dB.
    drums, music = crest_db(scene["drums"]), crest_db(scene["music"])
    assert drums > music + 6.0, (drums, music)
    assert music < 14.0


def test_drums_are_panned(scene):
    # Scenario spec: hi-hat to the right, kick in the centre. Reference filters: scipy.signal
    # Butterworth designs. Above 10 kHz the hat dominates; below 120 Hz the kick.
    d = scene["drums"].astype(np.float64)
    high = signal.sosfilt(signal.butter(6, 10000, "highpass", fs=FS, output="sos"), d, axis=0)
    low = signal.sosfilt(signal.butter(6, 120, "lowpass", fs=FS, output="sos"), d, axis=0)
    assert rms_dbfs(high[:, 1]) - rms_dbfs(high[:, 0]) > 3.0
    assert abs(rms_dbfs(low[:, 1]) - rms_dbfs(low[:, 0])) < 0.5


def test_music_bed_loudness_is_near_minus_20_lufs(scenes):
    # ITU-R BS.1770-4 integrated loudness, measured with pyloudnorm (a BS.1770 implementation).
    for fs, sc in scenes.items():
        loudness = pyloudnorm.Meter(fs).integrated_loudness(sc["music"].astype(np.float64))
        assert loudness == pytest.approx(demo.BED_LUFS, abs=0.5), fs


def test_music_bed_level_is_steady(scene):
    # Scenario spec: steady level. RMS of successive 3 s windows (the short-term window of
    # EBU R 128) varies by less than 1.5 dB (common practice, no source); and the same windows
    # measured as BS.1770 loudness with pyloudnorm stay within 1.5 LU of -20 LUFS.
    m = scene["music"].astype(np.float64)
    w = 3 * FS
    windows = [m[i : i + w] for i in range(0, m.shape[0] - w + 1, w)]
    levels = [rms_dbfs(x) for x in windows]
    assert max(levels) - min(levels) < 1.5, levels
    meter = pyloudnorm.Meter(FS)
    for x in windows:
        assert meter.integrated_loudness(x) == pytest.approx(demo.BED_LUFS, abs=1.5)


def test_music_bed_momentary_level_is_steady(scene):
    # Scenario spec: steady level, chords cross-fading without a dip or bump. RMS of both
    # channels in 400 ms windows (the momentary window of BS.1770-4 / EBU R 128) moved in 100 ms
    # hops stays within 2.5 dB of its median (common practice, no source). Measured here: the
    # power-complementary cross-fade gives 2.2 dB; an amplitude-complementary one 3.0 dB; none
    # at all 3.5 dB.
    m = scene["music"].astype(np.float64)
    w, hop = int(0.4 * FS), int(0.1 * FS)
    c = np.concatenate([[0.0], np.cumsum((m * m).sum(axis=1))])
    starts = np.arange(hop, m.shape[0] - w - hop, hop)  # skip the 50 ms edge fades
    levels = 10 * np.log10((c[starts + w] - c[starts]) / w)
    assert np.max(np.abs(levels - np.median(levels))) < 2.5


def short_rms_rise(x, fs):
    """Largest rise (dB) of a 50 ms RMS window moved in 10 ms hops."""
    x = np.asarray(x, dtype=np.float64)
    w, hop = int(0.05 * fs), int(0.01 * fs)
    c = np.concatenate([[0.0], np.cumsum(x * x)])
    starts = np.arange(0, x.shape[0] - w, hop)
    env = 10 * np.log10((c[starts + w] - c[starts]) / w + 1e-20)
    return float(np.max(np.diff(env)))


def test_music_bed_has_no_strong_transients(scene):
    # Scenario spec: no strong transients. A 50 ms RMS window moved in 10 ms hops never rises
    # by 3 dB or more from one hop to the next (common practice, no source), after the 50 ms
    # fade-in; the drum loop, for contrast, rises by far more.
    for ch in (0, 1):
        assert short_rms_rise(scene["music"][int(0.1 * FS):, ch], FS) < 3.0
    assert short_rms_rise(scene["drums"][:, 0], FS) > 10.0


# --- narrator ---------------------------------------------------------------------------------


def test_phrase_plan_follows_the_scenario(scene):
    # Scenario spec: phrases of a few seconds, pauses of 1-3 s, a silent lead-in.
    phrases = scene["phrases"]
    assert len(phrases) >= 3
    assert 0.5 < phrases[0][0]
    assert phrases[-1][1] <= SECONDS
    for a, b in phrases:
        assert 1.0 <= b - a <= 5.0
    for (_, end), (start, _) in zip(phrases[:-1], phrases[1:]):
        assert 1.0 <= start - end <= 3.0


def test_narrator_active_in_phrases_and_near_silent_in_pauses(scene):
    # Scenario spec: about -18 dBFS RMS over the phrases, room noise at -70 dBFS RMS in the
    # pauses (levels per AES17). Margins: +-1 dB overall, +-3 dB per phrase,
    # +-3 dB on the room noise, and at least 40 dB between any phrase and any pause.
    x = scene["narrator"][:, 0].astype(np.float64)
    phrases = scene["phrases"]
    inside = np.concatenate([span(x, FS, a, b) for a, b in phrases])
    assert rms_dbfs(inside) == pytest.approx(demo.NARRATOR_RMS_DBFS, abs=1.0)
    phrase_levels = [rms_dbfs(span(x, FS, a, b)) for a, b in phrases]
    pause_levels = [rms_dbfs(span(x, FS, a, b, guard=0.002)) for a, b in pauses(phrases, SECONDS)]
    for level in phrase_levels:
        assert level == pytest.approx(-18.0, abs=3.0)
    for level in pause_levels:
        assert level == pytest.approx(-70.0, abs=3.0)
        assert level < -60.0
    assert min(phrase_levels) - max(pause_levels) > 40.0


def test_narrator_pauses_hold_room_noise_only(scene):
    # The phrase spans bound every voiced ring and noise burst: within the pauses no sample
    # exceeds a few standard deviations of the -70 dBFS room noise (ROOM_RMS times 1.5 peak
    # factor of the interpolated uniform noise, plus margin).
    x = scene["narrator"][:, 0].astype(np.float64)
    for a, b in pauses(scene["phrases"], SECONDS):
        assert np.max(np.abs(span(x, FS, a, b))) < 4 * demo.ROOM_RMS


def test_narrator_syllables_have_onsets_and_gaps(scene):
    # Scenario spec: syllables of 100-300 ms with gaps. On a 5 ms RMS envelope, the spans above
    # -45 dBFS last 60-330 ms (a syllable's soft edges fall below the threshold) and there are
    # 2 to 8 of them per second of phrase.
    x = scene["narrator"][:, 0].astype(np.float64)
    hop = int(0.005 * FS)
    for a, b in scene["phrases"]:
        seg = span(x, FS, a, b)
        n = seg.shape[0] // hop
        env = np.sqrt(np.mean(seg[: n * hop].reshape(n, hop) ** 2, axis=1))
        on = 20 * np.log10(env + 1e-12) + 3.01 > -45.0
        edges = np.diff(np.concatenate([[0], on.astype(int), [0]]))
        durations = (np.flatnonzero(edges == -1) - np.flatnonzero(edges == 1)) * 0.005
        assert np.all((durations >= 0.06) & (durations <= 0.33)), durations
        assert 2.0 <= durations.shape[0] / (b - a) <= 8.0


def test_narrator_pitch_stays_in_a_speaking_range(scene):
    # Scenario spec: pitch ~100-180 Hz. Autocorrelation pitch of loud 40 ms frames (common
    # practice, no source), searching 70-250 Hz; frames with a clear period only.
    x = scene["narrator"][:, 0].astype(np.float64)
    n = int(0.04 * FS)
    lo, hi = int(FS / 250), int(FS / 70)
    found = []
    for a, b in scene["phrases"]:
        for t in np.arange(a, b - 0.04, 0.02):
            seg = x[int(t * FS) : int(t * FS) + n]
            if rms_dbfs(seg) < -30.0:
                continue
            seg = seg - seg.mean()
            r = np.correlate(seg, seg, "full")[n - 1 :]
            k = lo + int(np.argmax(r[lo:hi]))
            if r[k] > 0.5 * r[0]:
                found.append(FS / k)
    found = np.array(found)
    assert found.shape[0] > 100
    assert np.percentile(found, 2) > 95.0 and np.percentile(found, 98) < 185.0
    assert np.percentile(found, 90) - np.percentile(found, 10) > 20.0  # it does move


def test_narrator_has_fricative_bursts_and_formant_voicing(scene):
    # Scenario spec: occasional high-passed noise bursts; voiced parts dominated by low
    # formants. Reference: scipy.signal.spectrogram; thresholds common practice, no source.
    x = scene["narrator"][:, 0].astype(np.float64)
    f, _, s = signal.spectrogram(x, FS, nperseg=1024, noverlap=512)
    energy = s.sum(axis=0)
    active = energy > 1e-3 * energy.max()
    high = s[f > 2500].sum(axis=0) / energy
    assert np.sum(active & (high > 0.7)) >= 5  # fricative-like frames exist
    assert np.median(high[active]) < 0.2  # most sounding frames are voiced, low-formant heavy


# --- sample rates -----------------------------------------------------------------------------


def test_rates_give_same_duration_plan_and_similar_levels(scenes):
    # Scenario spec: times in seconds, frequencies in Hz, so the content is the same at any
    # rate. Levels agree within 0.3 dB (1 dB for the drums, whose peak normalisation rides on
    # sample-level noise).
    ref = scenes[FS]
    for fs, sc in scenes.items():
        for name in ("drums", "music", "narrator"):
            assert sc[name].shape[0] / fs == SECONDS, (fs, name)
        assert sc["phrases"] == ref["phrases"], fs
        assert rms_dbfs(sc["drums"]) == pytest.approx(rms_dbfs(ref["drums"]), abs=1.0)
        assert rms_dbfs(sc["music"]) == pytest.approx(rms_dbfs(ref["music"]), abs=0.3)
        assert rms_dbfs(sc["narrator"]) == pytest.approx(rms_dbfs(ref["narrator"]), abs=0.3)


def test_content_is_the_same_signal_at_other_rates(scenes):
    # The music bed has no noise: resampled from 96 kHz to 48 kHz with scipy.signal.resample_poly
    # (reference), it matches the 48 kHz rendering to -40 dB (common practice, no source).
    hi = scenes[96000]["music"].astype(np.float64)
    lo = scenes[48000]["music"].astype(np.float64)
    down = signal.resample_poly(hi, 1, 2, axis=0)
    core = slice(4800, lo.shape[0] - 4800)
    err = rms_dbfs(down[core] - lo[core]) - rms_dbfs(lo[core])
    assert err < -40.0, err


# --- files and command line -------------------------------------------------------------------


def test_write_scenario_writes_readable_float_wavs(tmp_path, scene):
    paths = demo.write_scenario(tmp_path / "out", FS, SECONDS)
    assert set(paths) == {"drums", "music", "narrator"}
    for name, path in paths.items():
        assert path == tmp_path / "out" / f"{name}.wav"
        info = soundfile.info(str(path))
        assert (info.format, info.subtype, info.samplerate) == ("WAV", "FLOAT", FS)
        data, fs = soundfile.read(str(path), dtype="float32", always_2d=True)
        assert fs == FS
        assert np.array_equal(data, scene[name]), name
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [
        "drums.wav", "music.wav", "narrator.wav"]


def test_write_failure_leaves_nothing_half_written(tmp_path, monkeypatch):
    old = tmp_path / "drums.wav"
    old.write_bytes(b"previous")
    real = soundfile.write
    calls = []

    def failing(file, data, samplerate, **kw):
        calls.append(1)
        if len(calls) == 3:
            file.write(b"partial")
            raise OSError("disk full")
        return real(file, data, samplerate, **kw)

    monkeypatch.setattr(soundfile, "write", failing)
    with pytest.raises(OSError, match="disk full"):
        demo.write_scenario(tmp_path, FS, 1.0)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["drums.wav"]
    assert old.read_bytes() == b"previous"


def test_command_line_writes_files_and_prints_paths(tmp_path, capsys):
    assert demo.main([str(tmp_path / "o"), "--seconds", "2", "--samplerate", "44100"]) == 0
    printed = capsys.readouterr().out.split()
    assert printed == [str(tmp_path / "o" / f"{n}.wav") for n in ("drums", "music", "narrator")]
    data, fs = soundfile.read(printed[2], always_2d=True)
    assert fs == 44100 and data.shape == (88200, 1)


def test_command_line_help_and_errors(tmp_path):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    ok = subprocess.run([sys.executable, "-m", "livedyn.demo", "--help"], env=env,
                        capture_output=True, text=True, timeout=60)
    assert ok.returncode == 0
    assert "--seconds" in ok.stdout and "--samplerate" in ok.stdout
    bad = subprocess.run([sys.executable, "-m", "livedyn.demo", str(tmp_path), "--samplerate",
                          "8000"], env=env, capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2
    assert "samplerate = 8000: out of range" in bad.stderr
    assert not any(tmp_path.iterdir())

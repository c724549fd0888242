"""Offline render (livedyn.render): streaming, latency compensation, file formats, traces,
summary loudness, key input and the progress bar.

Sources of the checks
---------------------
* The render runs the same Processor as the live engine, block by block: its output must equal
  one in-memory ``Processor.process`` call over the whole signal (DEVELOPERS.md, "The kernel
  contract": identical output whatever the block split).
* Latency is reported, never hidden (DEVELOPERS.md, "Conventions the tests rely on");
  ``render``'s module docstring defines the default output as aligned with the input (latency
  taken off the front, tail flushed with silence) and ``keep_latency`` as the raw stream.
* Integer PCM is written as ``round(x * 2**(bits - 1))``, round half to even, clipped
  (``livedyn.wavio`` module docstring); the expected integers are computed here with numpy.
* Static curve: Giannoulis, Massberg and Reiss, JAES 60(6) 2012, eq. (4), through the
  independent implementation in ``tests/reference.py``; level detection ``20 log10 |x|``
  (same paper, section 2).
* Key high-pass: Audio EQ Cookbook high-pass at Q = 1/sqrt(2), which equals
  ``scipy.signal.butter(2, f0, 'highpass', fs=fs)`` (DEVELOPERS.md, "Conventions the tests
  rely on").
* Loudness: ITU-R BS.1770-4 through pyloudnorm (a BS.1770 implementation from the package
  registry; within 0.1 LU, the tolerance tests/test_loudness.py justifies for its default
  K-weighting filter) and livedyn.meters on the written file.
"""
from __future__ import annotations

import io
import json
import math
import sys
import tracemalloc

import numpy as np
import pyloudnorm as pyln
import pytest
import soundfile as sf
from scipy import signal

import livedyn
from livedyn import meters
from livedyn import render as render_mod
from livedyn.render import Setup, render
from livedyn.wavio import WavReader, WavWriter
from tests.reference import gmr_static_curve

FS = 48000


def bursts(seed, frames, channels, lo_db=-50.0, hi_db=-3.0):
    """Noise bursts of 10-120 ms at random levels, with short gaps of silence."""
    rng = np.random.default_rng(seed)
    x = np.zeros((frames, channels), np.float32)
    pos = 0
    while pos < frames:
        n = int(rng.integers(480, 5760))
        amp = 10 ** (rng.uniform(lo_db, hi_db) / 20)
        end = min(frames, pos + n)
        x[pos:end] = (amp * rng.uniform(-1, 1, (end - pos, channels))).astype(np.float32)
        pos = end + int(rng.integers(0, 2400))
    return x


def write(path, x, fs=FS, subtype="FLOAT"):
    sf.write(str(path), x, fs, subtype=subtype)
    return path


def read(path):
    y, fs = sf.read(str(path), dtype="float32", always_2d=True)
    return y, fs


def in_memory(algorithm, x, fs=FS, key=None, **params):
    kch = 0 if key is None else key.shape[1]
    proc = livedyn.Processor(algorithm, fs, x.shape[1], key_channels=kch, **params)
    if kch and "key" in proc.schema:
        proc.set("key", "external")
    return proc, proc.process(x, key)


def settings(**kw):
    return [(k, str(v)) for k, v in kw.items()]


# ---------------------------------------------------------------------------------------------
# Streaming


def test_render_streams_in_blocks_and_equals_one_processor_call(tmp_path, monkeypatch):
    frames, bs = 10 * 4096 + 777, 4096  # ten blocks and a short last one
    x = bursts(1, frames, 2)
    src = write(tmp_path / "in.wav", x)
    read_sizes, write_sizes = [], []

    class CountingReader(WavReader):
        def blocks(self, n):
            for b in super().blocks(n):
                read_sizes.append(len(b))
                yield b

        def read(self, frames=-1):  # reading the whole file at once is not streaming
            raise AssertionError("render read the file in one go")

    class CountingWriter(WavWriter):
        def write(self, block):
            write_sizes.append(len(block))
            super().write(block)

    monkeypatch.setattr(render_mod, "WavReader", CountingReader)
    monkeypatch.setattr(render_mod, "WavWriter", CountingWriter)
    s = render(src, tmp_path / "out.wav", Setup("compressor", settings=settings(threshold=-30)),
               blocksize=bs)
    assert read_sizes == [bs] * 10 + [777]
    assert max(write_sizes) <= bs and sum(write_sizes) == frames
    y, fs = read(tmp_path / "out.wav")
    _, ref = in_memory("compressor", x, threshold=-30)
    assert fs == FS and y.tobytes() == ref.tobytes()
    assert s.frames == frames and s.gain_reduction_max_db > 10  # the compressor did work


def test_render_memory_stays_bounded(tmp_path):
    """Peak traced memory of a render stays far below the size of the file it streams."""
    x = bursts(2, 30 * FS, 2)  # 11.5 MB as float32
    src = write(tmp_path / "in.wav", x)
    render(write(tmp_path / "warm.wav", x[:4800]), tmp_path / "warm_out.wav", Setup())
    del x
    tracemalloc.start()
    try:
        render(src, tmp_path / "out.wav", Setup(), blocksize=4096)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    size = 30 * FS * 2 * 4
    assert peak < size / 2, f"peak {peak} bytes for a {size}-byte signal"
    assert sf.info(str(tmp_path / "out.wav")).frames == 30 * FS


# ---------------------------------------------------------------------------------------------
# Latency


def test_output_aligned_by_default_and_delayed_with_keep_latency(tmp_path):
    # Below the threshold a compressor with makeup 0 has gain exactly 1, so the aligned output
    # is the input itself and the raw stream is the input delayed by the lookahead.
    x = bursts(3, FS, 2, -60, -35)
    src = write(tmp_path / "in.wav", x)
    setup = Setup("compressor", settings=settings(threshold=0, lookahead=3))
    s = render(src, tmp_path / "aligned.wav", setup)
    k = render(src, tmp_path / "raw.wav", setup, keep_latency=True)
    lat = round(3e-3 * FS)
    assert s.latency_samples == k.latency_samples == lat == 144
    assert s.latency_compensated and not k.latency_compensated
    a, _ = read(tmp_path / "aligned.wav")
    r, _ = read(tmp_path / "raw.wav")
    assert a.shape == r.shape == x.shape  # both as long as the input
    assert a.tobytes() == x.tobytes()
    assert not r[:lat].any() and r[lat:].tobytes() == x[:-lat].tobytes()
    assert any("compensated" in line for line in s.lines())


@pytest.mark.parametrize("true_peak", ["off", "on"])
def test_limiter_latency_compensation(tmp_path, true_peak):
    x = bursts(4, FS // 2, 2, -30, 6)  # peaks above full scale in a float file
    src = write(tmp_path / "in.wav", x)
    setup = Setup("limiter", settings=settings(ceiling=-3, true_peak=true_peak))
    s = render(src, tmp_path / "a.wav", setup)
    render(src, tmp_path / "r.wav", setup, keep_latency=True)
    proc, raw = in_memory("limiter", x, ceiling=-3, true_peak=true_peak)
    lat = proc.latency_samples
    assert s.latency_samples == lat == 240 + (12 if true_peak == "on" else 0)
    a, _ = read(tmp_path / "a.wav")
    r, _ = read(tmp_path / "r.wav")
    assert r.tobytes() == raw.tobytes()
    # aligned: the stream over input + lat zeros, with the first lat samples taken off
    proc2 = livedyn.Processor("limiter", FS, 2, ceiling=-3, true_peak=true_peak)
    full = proc2.process(np.concatenate([x, np.zeros((lat, 2), np.float32)]))
    assert a.shape == x.shape and a.tobytes() == full[lat:].tobytes()
    assert np.abs(a).max() <= 10 ** (-3 / 20) * (1 + 1e-6)
    # Aligned, each output sample is its own input sample times a gain in (0, 1]: same sign,
    # no larger (a limiter only attenuates). One sample off, noise breaks both.
    on = np.abs(x) > 1e-3
    assert (a[on] * x[on] > 0).all()
    assert (np.abs(a[on]) <= np.abs(x[on]) * (1 + 1e-6)).all()
    assert (np.abs(a[on]) < np.abs(x[on]) * 0.9).any()  # it did limit


# ---------------------------------------------------------------------------------------------
# Formats


BITS = {"PCM_16": 16, "PCM_24": 24, "PCM_32": 32}
CASES = [(st, fs) for st in ("PCM_16", "PCM_24", "PCM_32", "FLOAT") for fs in (44100, 48000,
                                                                              96000)]


def _expected_file_samples(y, subtype):
    """What the file must hold for float output y: float32 as is, integers quantised."""
    if subtype == "FLOAT":
        return y
    b = BITS[subtype]
    q = np.clip(np.rint(y.astype(np.float64) * 2.0 ** (b - 1)), -2.0 ** (b - 1),
                2.0 ** (b - 1) - 1)
    return q.astype(np.int64) << (32 - b)  # as soundfile reads it into int32


@pytest.mark.parametrize("i", range(len(CASES)))
def test_formats_rates_channels(tmp_path, i):
    subtype, fs = CASES[i]
    channels = i % 8 + 1  # 1 to 8 channels across the cases
    x = bursts(10 + i, int(0.25 * fs), channels, -40, 0)
    src = write(tmp_path / "in.wav", x, fs, subtype)
    xin, _ = read(src)  # the input as read back (quantised for integer files)
    s = render(src, tmp_path / "out.wav", Setup("compressor", settings=settings(threshold=-24)))
    info = sf.info(str(tmp_path / "out.wav"))
    assert (info.subtype, info.samplerate, info.channels, info.frames) == \
        (subtype, fs, channels, len(x))
    assert s.samplerate == fs and s.channels == channels
    _, y = in_memory("compressor", xin, fs, threshold=-24)
    if subtype == "FLOAT":
        got, _ = read(tmp_path / "out.wav")
        assert got.tobytes() == y.tobytes()
    else:
        got, _ = sf.read(str(tmp_path / "out.wav"), dtype="int32", always_2d=True)
        np.testing.assert_array_equal(got, _expected_file_samples(y, subtype))


@pytest.mark.parametrize("channels", range(1, 9))
def test_every_channel_count(tmp_path, channels):
    x = bursts(40 + channels, 4800, channels, -40, 0)
    src = write(tmp_path / "in.wav", x, FS, "PCM_24")
    xin, _ = read(src)
    render(src, tmp_path / "out.wav", Setup("gate"))
    info = sf.info(str(tmp_path / "out.wav"))
    assert (info.subtype, info.channels, info.frames) == ("PCM_24", channels, 4800)
    got, _ = sf.read(str(tmp_path / "out.wav"), dtype="int32", always_2d=True)
    _, y = in_memory("gate", xin)
    np.testing.assert_array_equal(got, _expected_file_samples(y, "PCM_24"))


def test_double_input_writes_float_and_format_override(tmp_path):
    x = bursts(50, 4800, 2)
    src = write(tmp_path / "in.wav", x, FS, "DOUBLE")
    render(src, tmp_path / "a.wav", Setup())
    assert sf.info(str(tmp_path / "a.wav")).subtype == "FLOAT"
    src16 = write(tmp_path / "in16.wav", x, FS, "PCM_16")
    render(src16, tmp_path / "b.wav", Setup(), subtype="FLOAT")
    assert sf.info(str(tmp_path / "b.wav")).subtype == "FLOAT"


# ---------------------------------------------------------------------------------------------
# Traces


def test_trace_files_are_aligned_and_consistent(tmp_path):
    frames, lat = FS, 96  # lookahead 2 ms
    x = bursts(5, frames, 2, -50, -3)
    src = write(tmp_path / "in.wav", x)
    tdir = tmp_path / "trace"
    thr, ratio, knee, makeup = -30.0, 4.0, 6.0, 3.0
    setup = Setup("compressor", settings=settings(threshold=thr, ratio=ratio, knee=knee,
                                                  attack=1, release=50, makeup=makeup,
                                                  lookahead=2))
    s = render(src, tmp_path / "out.wav", setup, trace_dir=tdir)
    info = json.loads((tdir / "trace.json").read_text())
    wavs = {p.stem: p.name for p in tdir.glob("*.wav")}
    assert info["files"] == wavs
    assert set(wavs) == {"input", "output", "key_filtered", "detector_db", "curve_db",
                         "gain_db", "total_gain_db"}
    assert info["latency_samples"] == lat == s.latency_samples
    assert info["samplerate"] == FS and info["algorithm"] == "compressor"
    assert sorted(p.name for p in tdir.iterdir()) == sorted([*wavs.values(), "trace.json"])
    t = {}
    for name in wavs:
        t[name], fs = read(tdir / wavs[name])
        assert fs == FS
        assert len(t[name]) == frames + lat, name  # the flushed tail is traced too
    inp, out = t["input"], t["output"]
    assert inp[:frames].tobytes() == x.tobytes() and not inp[frames:].any()
    # key = main input, no key filters: the filtered key is the input
    assert t["key_filtered"].tobytes() == inp.tobytes()
    # peak detector, linked by max: level = 20 log10 max_c |x| (GMR 2012, section 2)
    det = t["detector_db"][:, 0].astype(np.float64)
    amp = np.abs(inp.astype(np.float64)).max(axis=1)
    on = amp > 1e-6
    np.testing.assert_allclose(det[on], 20 * np.log10(amp[on]), atol=1e-4)
    # gain computer = static curve minus level (GMR 2012, eq. (4))
    curve = t["curve_db"][:, 0].astype(np.float64)
    np.testing.assert_allclose(curve[on], gmr_static_curve(det[on], thr, ratio, knee) - det[on],
                               atol=1e-4)
    assert curve.min() < -10  # the curve did reduce
    # total = smoothed gain + makeup
    gain = t["gain_db"][:, 0].astype(np.float64)
    total = t["total_gain_db"][:, 0].astype(np.float64)
    np.testing.assert_allclose(total, gain + makeup, atol=1e-5)
    # output = input delayed by the latency times 10^(total/20)
    assert not out[:lat].any()
    pred = inp[:-lat].astype(np.float64) * 10 ** (total[lat:, None] / 20)
    np.testing.assert_allclose(out[lat:], pred, rtol=2e-5, atol=1e-8)
    # the aligned output file is the traced stream with the latency taken off
    y, _ = read(tmp_path / "out.wav")
    assert y.tobytes() == out[lat:].tobytes()
    assert s.gain_reduction_max_db == pytest.approx(-gain.min(), abs=1e-4)


# ---------------------------------------------------------------------------------------------
# Summary


def test_summary_loudness_agrees_with_meters_and_pyloudnorm(tmp_path):
    rng = np.random.default_rng(6)
    t = np.arange(6 * FS) / FS
    tone = 0.3 * np.sin(2 * np.pi * 997 * t) * (1 + 0.8 * np.sin(2 * np.pi * 0.5 * t))
    x = np.stack([tone, 0.5 * tone], axis=1) + 0.01 * rng.standard_normal((len(t), 2))
    x = x.astype(np.float32)
    src = write(tmp_path / "in.wav", x)
    s = render(src, tmp_path / "out.wav", Setup(preset="narrator-level"))
    y, _ = read(tmp_path / "out.wav")
    o, i = s.output_meters, s.input_meters
    # the summary metered exactly the written stream
    assert o["integrated_lufs"] == pytest.approx(meters.integrated_loudness(y, FS), abs=1e-3)
    assert i["integrated_lufs"] == pytest.approx(meters.integrated_loudness(x, FS), abs=1e-3)
    # BS.1770-4 through pyloudnorm
    assert o["integrated_lufs"] == pytest.approx(
        pyln.Meter(FS).integrated_loudness(y.astype(np.float64)), abs=0.1)
    assert i["integrated_lufs"] == pytest.approx(
        pyln.Meter(FS).integrated_loudness(x.astype(np.float64)), abs=0.1)
    # the compressor with 9 dB makeup changed the loudness, so the two are not trivially equal
    assert abs(o["integrated_lufs"] - i["integrated_lufs"]) > 1
    # sample peak per channel: 20 log10 max |y| (AES17 full-scale reference)
    np.testing.assert_allclose(o["max_peak_dbfs"], 20 * np.log10(np.abs(y).max(axis=0)),
                               atol=1e-4)
    assert o["max_true_peak_dbtp"] == pytest.approx(meters.true_peak_dbtp(y, FS), abs=0.05)
    # the printed line shows the same reading
    line = next(ln for ln in s.lines() if "integrated loudness" in ln)
    assert f"{o['integrated_lufs']:.1f} LUFS" in line


def test_summary_shows_silence_as_minus_inf(tmp_path):
    src = write(tmp_path / "in.wav", np.zeros((FS, 2), np.float32))
    s = render(src, tmp_path / "out.wav", Setup())
    text = "\n".join(s.lines())
    assert "-200" not in text  # the meters' floor is not a reading
    assert "-inf" in text


# ---------------------------------------------------------------------------------------------
# Key input


def test_key_file_drives_a_ducker(tmp_path):
    n = 4 * FS
    t = np.arange(n) / FS
    main = np.repeat((0.1 * np.sin(2 * np.pi * 997 * t))[:, None], 2, axis=1).astype(np.float32)
    rng = np.random.default_rng(7)
    key = np.zeros((n, 1), np.float32)
    key[2 * FS:] = (0.3 * rng.uniform(-1, 1, (2 * FS, 1))).astype(np.float32)
    src, kf = write(tmp_path / "music.wav", main), write(tmp_path / "voice.wav", key)
    s = render(src, tmp_path / "out.wav", Setup(preset="bed-under-narrator"), key_path=kf,
               trace_dir=tmp_path / "tr")
    y, _ = read(tmp_path / "out.wav")
    proc = livedyn.Processor("ducker", FS, 2, key_channels=1)
    for name, v in livedyn.presets.load("bed-under-narrator").values.items():
        proc.set(name, v)
    ref = proc.process(main, key)
    assert y.tobytes() == ref.tobytes()

    def level_db(a):
        return 10 * np.log10(np.mean(a.astype(np.float64) ** 2))

    # key silent: no ducking; key far above threshold (-40 dBFS), ratio inf: the main drops by
    # the full range (12 dB) (the ducker's definition in livedyn.params: range = largest
    # attenuation)
    assert level_db(y[FS // 2:2 * FS - 100]) == pytest.approx(level_db(main[:FS]), abs=0.01)
    assert level_db(y[3 * FS:]) - level_db(main[3 * FS:]) == pytest.approx(-12.0, abs=0.1)
    assert s.gain_reduction_max_db == pytest.approx(12.0, abs=0.05)
    # the key trace is the key file, filtered by the preset's 150 Hz high-pass and 5 kHz
    # low-pass (Audio EQ Cookbook = scipy.signal.butter(2, ...), DEVELOPERS.md conventions)
    kt, _ = read(tmp_path / "tr" / "key.wav")
    assert kt[:n].tobytes() == key.tobytes()
    kfilt, _ = read(tmp_path / "tr" / "key_filtered.wav")
    b1, a1 = signal.butter(2, 150, "highpass", fs=FS)
    b2, a2 = signal.butter(2, 5000, "lowpass", fs=FS)
    expect = signal.lfilter(b2, a2, signal.lfilter(b1, a1, key[:, 0].astype(np.float64)))
    np.testing.assert_allclose(kfilt[:n, 0], expect, atol=1e-6)


# ---------------------------------------------------------------------------------------------
# Progress bar


class _FakeTerminal(io.StringIO):
    def isatty(self):
        return True


def test_progress_bar_only_on_a_terminal(tmp_path, monkeypatch, capsys):
    src = write(tmp_path / "in.wav", bursts(8, FS, 1))
    render(src, tmp_path / "a.wav", Setup(), progress_min_seconds=0)
    assert capsys.readouterr().err == ""  # pytest's stderr is not a terminal
    term = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", term)
    render(src, tmp_path / "b.wav", Setup(), progress_min_seconds=0)
    shown = term.getvalue()
    assert "rendering in.wav" in shown and "100 %" in shown
    # and not for a file shorter than the threshold, even on a terminal
    term2 = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", term2)
    render(src, tmp_path / "c.wav", Setup(), progress_min_seconds=30)
    assert term2.getvalue() == ""
    assert math.isclose(sf.info(str(tmp_path / "b.wav")).duration, 1.0)


@pytest.mark.parametrize("key_frames", [FS, 3 * FS])
def test_key_of_another_length_is_padded_or_trimmed(tmp_path, key_frames):
    # A key shorter than the input is padded with silence, a longer one trimmed (one note
    # line each); the output equals one Processor call with the key adapted by numpy here.
    n = 2 * FS
    t = np.arange(n) / FS
    main = np.repeat((0.1 * np.sin(2 * np.pi * 997 * t))[:, None], 2, axis=1).astype(np.float32)
    key = (0.3 * np.random.default_rng(3).uniform(-1, 1, (key_frames, 1))).astype(np.float32)
    src, kf = write(tmp_path / "music.wav", main), write(tmp_path / "voice.wav", key)
    s = render(src, tmp_path / "out.wav", Setup(algorithm="ducker"), key_path=kf,
               blocksize=1000)
    y, _ = read(tmp_path / "out.wav")
    adapted = np.zeros((n, 1), np.float32)
    adapted[:min(n, key_frames)] = key[:n]
    proc = livedyn.Processor("ducker", FS, 2, key_channels=1, key="external")
    assert y.tobytes() == proc.process(main, adapted).tobytes()
    word = "padded" if key_frames < n else "trimmed"
    assert len(s.notes) == 1 and word in s.notes[0]
    assert any(line.startswith("  note: key voice.wav") for line in s.lines())


def test_key_at_another_rate_is_resampled(tmp_path):
    # A 44.1 kHz key for a 48 kHz input goes through scipy.signal.resample_poly(x, 160, 147)
    # (the reference library named in the note line) before it keys the processor.
    n = 2 * FS
    main = np.full((n, 1), 0.1, np.float32)
    k44 = (0.3 * np.random.default_rng(4).uniform(-1, 1, (88200, 1))).astype(np.float32)
    src, kf = write(tmp_path / "music.wav", main), write(tmp_path / "voice.wav", k44, fs=44100)
    s = render(src, tmp_path / "out.wav", Setup(algorithm="ducker"), key_path=kf)
    y, _ = read(tmp_path / "out.wav")
    k48 = signal.resample_poly(k44.astype(np.float64), 160, 147, axis=0).astype(np.float32)
    adapted = np.zeros((n, 1), np.float32)
    adapted[:min(n, len(k48))] = k48[:n]
    proc = livedyn.Processor("ducker", FS, 1, key_channels=1, key="external")
    assert y.tobytes() == proc.process(main, adapted).tobytes()
    assert "resampled to 48000 Hz (scipy.signal.resample_poly, up 160, down 147)" in s.notes[0]

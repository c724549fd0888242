"""Tests for livedyn.wavio: WAV/RF64 reading and writing, validation, atomic commit.

Outside references used here:
* scipy.io.wavfile (a general-purpose reference library with its own RIFF/RF64 parser) reads
  the files we write, to check header fields and the stored integers independently of
  libsndfile.
* EBU Tech 3306 (RF64): an RF64 file starts with the id "RF64", a RIFF/WAVE file with "RIFF"
  followed by "WAVE" at byte 8; the plain RIFF size field is 32 bits (4 GiB limit).
* Integer PCM full scale is 2**(bits-1) (signed two's complement PCM, as scipy.io.wavfile
  returns it): common practice, no source.
"""
from __future__ import annotations

import os
import warnings

import numpy as np
import pytest
import scipy.io.wavfile
import soundfile as sf

from livedyn import wavio
from livedyn.wavio import WavError, WavReader, WavWriter

BITS = {"PCM_16": 16, "PCM_24": 24, "PCM_32": 32}


def _signal(frames, channels, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(-1.0, 1.0, (frames, channels)).astype(np.float32)
    # Edge values: full-scale negative, full-scale positive (clips in integer PCM), zero,
    # half scale, tiny values below one 16-bit step.
    x[:6, 0] = [-1.0, 1.0, 0.0, 0.5, 1e-7, -3e-6]
    return x


def _scipy_read(path):
    with warnings.catch_warnings():
        # scipy notes the JUNK chunk (RF64 placeholder) it skips; that is expected.
        warnings.simplefilter("ignore", scipy.io.wavfile.WavFileWarning)
        return scipy.io.wavfile.read(path)


def _no_temp_files(folder):
    return [p.name for p in folder.iterdir() if p.name.endswith(".tmp")]


# ---------------------------------------------------------------------------------------------
# Round trips


@pytest.mark.parametrize("subtype", ["PCM_16", "PCM_24", "PCM_32", "FLOAT"])
@pytest.mark.parametrize("samplerate", [44100, 48000, 96000])
@pytest.mark.parametrize("channels", [1, 2, 8])
def test_round_trip(tmp_path, subtype, samplerate, channels):
    x = _signal(1500, channels, seed=channels)
    path = tmp_path / "rt.wav"
    with WavWriter(path, samplerate, channels, subtype) as w:
        # uneven blocks: the file must not depend on how writes are split
        w.write(x[:1])
        w.write(x[1:700])
        w.write(x[700:])
    assert _no_temp_files(tmp_path) == []

    with WavReader(path) as r:
        assert (r.samplerate, r.channels, r.frames, r.subtype) == (
            samplerate, channels, 1500, subtype)
        y = r.read()
    assert y.dtype == np.float32 and y.shape == x.shape

    # Independent reader (scipy.io.wavfile): same rate and shape.
    sr, d = _scipy_read(path)
    assert sr == samplerate
    d = d.reshape(d.shape[0], -1)
    assert d.shape == x.shape

    if subtype == "FLOAT":
        assert np.array_equal(y, x)  # float is stored exactly
        assert d.dtype == np.float32 and np.array_equal(d, x)
        return

    bits = BITS[subtype]
    full = 2.0 ** (bits - 1)
    lsb = 1.0 / full
    err = np.abs(y.astype(np.float64) - x.astype(np.float64))
    clipped = x >= 1.0 - lsb / 2  # +1.0 has no integer code: it clips to full - 1
    assert np.all(err[~clipped] <= 0.5 * lsb)  # rounding to nearest: within half an LSB
    assert np.all(err <= 1.0 * lsb)  # and within one LSB everywhere (the clipped sample)
    assert y[0, 0] == -1.0  # full-scale negative is exact

    # The stored integers, read by scipy: round(x * 2**(bits-1)) clipped to the code range.
    ints = d.astype(np.int64)
    if bits == 24:
        ints >>= 8  # scipy returns 24-bit samples left-justified in int32 (scipy docs)
    expect = np.clip(np.rint(x.astype(np.float64) * full), -full, full - 1)
    assert np.array_equal(ints, expect)
    # Our reader reads code n as n / 2**(bits-1), rounded to float32 (exact below 25 bits).
    assert np.array_equal(y, (ints / full).astype(np.float32))

    # Writing what we read gives the same codes again (no level drift per pass).
    path2 = tmp_path / "rt2.wav"
    wavio.write_wav(path2, y, samplerate, subtype)
    y2, _ = wavio.read_wav(path2)
    assert np.array_equal(y2, y)


def test_double_file_reads_as_float32(tmp_path):
    path = tmp_path / "d.wav"
    x = np.linspace(-1, 1, 333).reshape(-1, 1)
    sf.write(path, x, 48000, subtype="DOUBLE")
    y, sr = wavio.read_wav(path)
    assert sr == 48000 and y.dtype == np.float32
    assert np.array_equal(y, x.astype(np.float32))


@pytest.mark.parametrize("n", [1, 7, 64, 1000, 5000])
def test_blocks_equal_whole(tmp_path, n):
    path = tmp_path / "b.wav"
    frames = 400 if n == 1 else 2345
    x = _signal(frames, 2)
    wavio.write_wav(path, x, 48000, "PCM_24")
    with WavReader(path) as r:
        whole = r.read()
    with WavReader(path) as r:
        blocks = list(r.blocks(n))
    assert all(b.dtype == np.float32 and b.ndim == 2 and b.shape[1] == 2 for b in blocks)
    assert all(b.shape[0] == n for b in blocks[:-1]) and 1 <= blocks[-1].shape[0] <= n
    assert np.array_equal(np.concatenate(blocks), whole)


def test_blocks_rejects_bad_size(tmp_path):
    path = tmp_path / "b.wav"
    wavio.write_wav(path, np.zeros((10, 1), np.float32), 48000)
    with WavReader(path) as r:
        with pytest.raises(WavError, match="block size 0"):
            next(r.blocks(0))


def test_empty_file_yields_no_blocks(tmp_path):
    path = tmp_path / "e.wav"
    with WavWriter(path, 48000, 2):
        pass
    with WavReader(path) as r:
        assert r.frames == 0
        assert list(r.blocks(64)) == []


# ---------------------------------------------------------------------------------------------
# Bad input files


def _one_line(e, path):
    msg = str(e.value)
    assert "\n" not in msg
    assert msg.startswith(str(path) + ":")
    return msg


def test_text_file_named_wav(tmp_path):
    p = tmp_path / "notes.wav"
    p.write_text("this is not audio\n" * 20)
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "not a readable WAV file" in _one_line(e, p)


def test_truncated_header(tmp_path):
    good = tmp_path / "good.wav"
    wavio.write_wav(good, np.zeros((100, 2), np.float32), 48000, "PCM_16")
    p = tmp_path / "cut.wav"
    p.write_bytes(good.read_bytes()[:30])  # RIFF header cut inside the fmt chunk
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "not a readable WAV file" in _one_line(e, p)


def test_directory(tmp_path):
    p = tmp_path / "folder.wav"
    p.mkdir()
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "is a directory" in _one_line(e, p)


def test_missing_file(tmp_path):
    p = tmp_path / "missing.wav"
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "no such file" in _one_line(e, p)


def test_nine_channels(tmp_path):
    p = tmp_path / "nine.wav"
    sf.write(p, np.zeros((50, 9), np.float32), 48000, subtype="PCM_16")
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "9 channels, expected 1 to 8" in _one_line(e, p)


@pytest.mark.parametrize("subtype", ["ULAW", "ALAW", "PCM_U8"])
def test_unsupported_subtype(tmp_path, subtype):
    p = tmp_path / f"{subtype}.wav"
    sf.write(p, np.zeros((50, 1), np.float32), 8000, subtype=subtype)
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert f"sample format {subtype}" in _one_line(e, p)


def test_aiff_refused(tmp_path):
    p = tmp_path / "a.aiff"
    sf.write(p, np.zeros((50, 1), np.float32), 48000, subtype="PCM_16", format="AIFF")
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "AIFF" in _one_line(e, p) and "expected WAV, WAVEX or RF64" in str(e.value)


def test_flac_with_wav_name_refused(tmp_path):
    p = tmp_path / "really_flac.wav"
    sf.write(p, np.zeros((50, 1), np.float32), 48000, subtype="PCM_16", format="FLAC")
    with pytest.raises(WavError) as e:
        WavReader(p)
    assert "FLAC" in _one_line(e, p)


# ---------------------------------------------------------------------------------------------
# Writer: atomic commit and validation


def test_failed_write_leaves_existing_target(tmp_path):
    p = tmp_path / "out.wav"
    wavio.write_wav(p, _signal(300, 2), 48000, "PCM_16")
    before = p.read_bytes()
    with pytest.raises(RuntimeError, match="boom"):
        with WavWriter(p, 96000, 2, "FLOAT") as w:
            w.write(np.zeros((5000, 2), np.float32))
            raise RuntimeError("boom")
    assert p.read_bytes() == before
    assert _no_temp_files(tmp_path) == []


def test_failed_write_creates_nothing(tmp_path):
    p = tmp_path / "new.wav"
    with pytest.raises(KeyError):
        with WavWriter(p, 48000, 1) as w:
            w.write(np.zeros(100, np.float32))
            raise KeyError("x")
    assert not p.exists()
    assert list(tmp_path.iterdir()) == []


def test_commit_replaces_existing(tmp_path):
    p = tmp_path / "out.wav"
    wavio.write_wav(p, np.zeros((10, 1), np.float32), 44100)
    x = _signal(200, 2)
    wavio.write_wav(p, x, 48000)
    y, sr = wavio.read_wav(p)
    assert sr == 48000 and np.array_equal(y, x)
    assert _no_temp_files(tmp_path) == []


def test_target_unchanged_until_commit(tmp_path):
    p = tmp_path / "out.wav"
    wavio.write_wav(p, np.zeros((10, 1), np.float32), 44100)
    before = p.read_bytes()
    with WavWriter(p, 48000, 1) as w:
        w.write(np.ones((100, 1), np.float32) * 0.5)
        assert p.read_bytes() == before  # still the old file while writing
    assert p.read_bytes() != before


def test_nonfinite_refused_for_integer_pcm(tmp_path):
    p = tmp_path / "nan.wav"
    x = np.zeros((100, 2), np.float32)
    x[37, 1] = np.nan
    with pytest.raises(WavError) as e:
        with WavWriter(p, 48000, 2, "PCM_16") as w:
            w.write(x[:30])
            w.write(x[30:])
    assert "non-finite sample at frame 37" in _one_line(e, p)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    "kwargs, text",
    [
        (dict(samplerate=48000, channels=9), "9 channels, expected 1 to 8"),
        (dict(samplerate=48000, channels=0), "0 channels"),
        (dict(samplerate=0, channels=2), "sample rate 0"),
        (dict(samplerate=48000, channels=2, subtype="ULAW"), "'ULAW' is not supported"),
        (dict(samplerate=48000, channels=2, container="AIFF"), "container 'AIFF'"),
        (dict(samplerate=48000, channels=2, frames_hint=-5), "frames_hint -5"),
    ],
)
def test_writer_rejects_bad_arguments(tmp_path, kwargs, text):
    p = tmp_path / "w.wav"
    with pytest.raises(WavError) as e:
        WavWriter(p, **kwargs)
    assert text in _one_line(e, p)
    assert list(tmp_path.iterdir()) == []


def test_writer_missing_folder(tmp_path):
    p = tmp_path / "nope" / "w.wav"
    with pytest.raises(WavError) as e:
        WavWriter(p, 48000, 2)
    assert "does not exist" in _one_line(e, p)


def test_writer_block_shape(tmp_path):
    p = tmp_path / "w.wav"
    with pytest.raises(WavError) as e:
        with WavWriter(p, 48000, 2) as w:
            w.write(np.zeros((10, 3), np.float32))
    assert "expected (frames, 2)" in _one_line(e, p)
    assert not p.exists()


# ---------------------------------------------------------------------------------------------
# RF64


def test_rf64_decision_arithmetic():
    # RIFF sizes are 32-bit (EBU Tech 3306, introduction): 2**32 - 1 bytes at most; we keep
    # 1 KiB for the header (our margin).
    assert wavio.WAV_DATA_LIMIT == 2**32 - 1024
    # stereo float: 8 bytes a frame
    edge = (2**32 - 1024) // 8
    assert not wavio.needs_rf64(edge, 2, "FLOAT")
    assert wavio.needs_rf64(edge + 1, 2, "FLOAT")
    # 24-bit, 8 channels: 24 bytes a frame
    edge24 = (2**32 - 1024) // 24
    assert not wavio.needs_rf64(edge24, 8, "PCM_24")
    assert wavio.needs_rf64(edge24 + 1, 8, "PCM_24")
    # Worked example: stereo float at 48 kHz: 3 h = 4 147 200 000 bytes fits, 4 h does not.
    assert wavio.data_bytes(3 * 3600 * 48000, 2, "FLOAT") == 4_147_200_000
    assert wavio.choose_container(3 * 3600 * 48000, 2, "FLOAT") == "WAV"
    assert wavio.choose_container(4 * 3600 * 48000, 2, "FLOAT") == "RF64"
    assert wavio.choose_container(None, 1, "PCM_16") == "RF64"  # unknown length


def _magic(path):
    b = path.read_bytes()[:16]
    return b[:4], b[8:12], b[12:16]


def test_auto_small_file_is_plain_riff(tmp_path):
    p = tmp_path / "auto.wav"
    x = _signal(1000, 2)
    with WavWriter(p, 48000, 2, "PCM_24") as w:
        assert w.container == "auto"  # libsndfile accepted the downgrade request
        w.write(x)
    riff, wave, _ = _magic(p)
    assert (riff, wave) == (b"RIFF", b"WAVE")  # downgraded from RF64 on close
    with WavReader(p) as r:
        assert r.format in ("WAV", "WAVEX") and r.frames == 1000
    sr, d = _scipy_read(p)
    assert sr == 48000 and d.shape == (1000, 2)


def test_forced_rf64_small_file_reads_back(tmp_path):
    p = tmp_path / "big_style.wav"
    x = _signal(3000, 2)
    with WavWriter(p, 96000, 2, "FLOAT", container="RF64") as w:
        w.write(x)
    riff, wave, _ = _magic(p)
    assert (riff, wave) == (b"RF64", b"WAVE")  # EBU Tech 3306 file id
    with WavReader(p) as r:
        assert r.format == "RF64" and r.samplerate == 96000 and r.frames == 3000
        y = r.read()
    assert np.array_equal(y, x)
    sr, d = _scipy_read(p)  # scipy's own RF64 parser agrees
    assert sr == 96000 and np.array_equal(d, x)


def test_forced_wav_is_plain_riff(tmp_path):
    p = tmp_path / "plain.wav"
    with WavWriter(p, 44100, 1, "PCM_16", container="WAV") as w:
        w.write(np.zeros((10, 1), np.float32))
    assert _magic(p) == (b"RIFF", b"WAVE", b"fmt ")  # no JUNK placeholder
    with WavReader(p) as r:
        assert r.format == "WAV"


def test_fallback_without_downgrade_uses_hint(tmp_path, monkeypatch):
    monkeypatch.setattr(wavio, "_set_rf64_downgrade", lambda f: False)
    small = tmp_path / "small.wav"
    with WavWriter(small, 48000, 2, "PCM_16", frames_hint=100) as w:
        assert w.container == "WAV"
        w.write(_signal(100, 2))
    assert _magic(small) == (b"RIFF", b"WAVE", b"fmt ")
    unknown = tmp_path / "unknown.wav"
    with WavWriter(unknown, 48000, 2, "PCM_16") as w:
        assert w.container == "RF64"
        w.write(_signal(100, 2))
    assert _magic(unknown)[0] == b"RF64"
    for p in (small, unknown):
        y, _ = wavio.read_wav(p)
        assert y.shape == (100, 2)


def test_plain_wav_refuses_to_pass_limit(tmp_path, monkeypatch):
    p = tmp_path / "plain.wav"
    with pytest.raises(WavError) as e:
        WavWriter(p, 48000, 2, "FLOAT", frames_hint=2**30, container="WAV")
    assert "WAV limit" in _one_line(e, p)
    # The running check, with the limit shrunk so that no 4 GiB are written.
    monkeypatch.setattr(wavio, "WAV_DATA_LIMIT", 800)
    with pytest.raises(WavError) as e:
        with WavWriter(p, 48000, 2, "FLOAT", container="WAV") as w:
            w.write(np.zeros((100, 2), np.float32))  # 800 bytes: fits
            w.write(np.zeros((1, 2), np.float32))  # 808 bytes: does not
    assert "do not fit a plain WAV file" in _one_line(e, p)
    assert list(tmp_path.iterdir()) == []


def test_reader_closed_use(tmp_path):
    p = tmp_path / "c.wav"
    wavio.write_wav(p, np.zeros((10, 1), np.float32), 48000)
    r = WavReader(p)
    r.close()
    with pytest.raises(WavError, match="closed"):
        r.read()
    assert os.path.exists(p)

"""Fuzz tests (hypothesis) of the files livedyn reads: presets, automation files, WAV headers.

Whatever the bytes, a command ends in success or in exit code 2 with one error line: never a
traceback, a crash, a hang (each example runs under an alarm) or a large allocation (traced
with tracemalloc). Rules: the README's one-line error promise (common practice, no source).
"""
from __future__ import annotations

import io
import signal
import struct
import tracemalloc
from contextlib import contextmanager

import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from livedyn import cli

FS = 48000
HANG_SECONDS = 20  # far above what one example takes; only a hang gets near it
MAX_BYTES = 200 << 20  # traced allocation per example
FUZZ = settings(max_examples=15, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    d = tmp_path_factory.mktemp("fuzz")
    x = (0.3 * np.sin(np.arange(256) / 5)).astype(np.float32)
    sf.write(d / "in.wav", x, FS, subtype="FLOAT")
    buf = io.BytesIO()
    sf.write(buf, np.stack([x, x], 1), FS, subtype="PCM_16", format="WAV")
    (d / "ok16.bytes").write_bytes(buf.getvalue())
    # imports and kernel loading once, before any example is traced
    assert cli.main(["render", str(d / "in.wav"), "--out", str(d / "o.wav")]) == 0
    assert cli.main(["presets", "--show", "drums-tame"]) == 0
    return d


@contextmanager
def _bounded():
    def hang(*_):
        raise AssertionError(f"no answer within {HANG_SECONDS} s: a hang")

    old = signal.signal(signal.SIGALRM, hang)
    signal.alarm(HANG_SECONDS)
    tracemalloc.start()
    try:
        yield
    finally:
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)
    assert peak < MAX_BYTES, f"{peak} bytes allocated"


def _run(argv, capsys):
    with _bounded():
        code = cli.main(argv)
    cap = capsys.readouterr()
    assert "Traceback" not in cap.err + cap.out
    if code == 0:
        return 0
    lines = cap.err.strip().splitlines()
    assert code == 2, (code, cap.err[-500:])
    assert len(lines) == 1 and lines[0].startswith("livedyn: error: "), cap.err[-500:]
    assert len(lines[0]) < 1000
    return code


# -- presets ------------------------------------------------------------------------------
names = st.sampled_from(["threshold", "ratio", "knee", "attack", "release", "detector", "key",
                         "makeup", "range", "x", "", "a.b", "threshold.x", "k" * 200])
scalars = st.one_of(
    st.integers(min_value=-(10**30), max_value=10**30).map(str),
    st.just("1" + "0" * 400),
    st.floats(allow_nan=True, allow_infinity=True).map(lambda v: repr(v).replace("inf", "inf")),
    st.sampled_from(['"4:1"', '"inf"', '"rms"', '"off"', '"x"', "true", "1979-05-27", "nan",
                     "-inf", '""', "'lit'", '"""ml"""']),
)
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=3).map(lambda xs: "[" + ", ".join(xs) + "]"),
    st.lists(st.tuples(names, inner), max_size=2).map(
        lambda kv: "{" + ", ".join(f"{k or 'e'} = {v}" for k, v in kv) + "}")), max_leaves=8)
lines = st.one_of(
    st.tuples(names, values).map(lambda kv: f"{kv[0]} = {kv[1]}"),
    st.sampled_from(["[params]", "[values]", "preset_format = 1", "preset_format = 2",
                     'algorithm = "compressor"', 'algorithm = "nope"',
                     'algorithm_file = "nothing.py"', 'description = "d"', "[[params]]", "[",
                     "[" * 40, "# c"]),
    st.text(max_size=40),
)


@settings(FUZZ, max_examples=15)
@given(body=st.lists(lines, max_size=8), head=st.booleans())
def test_fuzz_presets(work, capsys, body, head):
    text = ("preset_format = 1\nalgorithm = \"compressor\"\n" if head else "") + "\n".join(body)
    p = work / "f.toml"
    p.write_bytes(text.encode("utf-8", "replace"))
    if _run(["presets", "--show", str(p)], capsys) == 0:  # a preset that loads: use it
        _run(["render", str(work / "in.wav"), "--out", str(work / "o.wav"), "--preset",
              str(p)], capsys)


# -- automation files ---------------------------------------------------------------------
frames = st.one_of(st.integers(min_value=0, max_value=10**12).map(str),
                   st.sampled_from(["-1", "9" * 40, "1e3", "0x10", "", "5..", "..5"]),
                   st.tuples(st.integers(0, 10**12), st.integers(0, 10**12)).map(
                       lambda ab: f"{ab[0]}..{ab[1]}"))
auto_lines = st.one_of(
    st.tuples(frames, names, scalars).map(lambda t: f"{t[0]} {t[1]} {t[2]}"),
    st.tuples(frames, names, scalars, scalars).map(lambda t: f"{t[0]} {t[1]} {t[2]} -> {t[3]}"),
    st.text(max_size=30),
)
headers = st.sampled_from([f"livedyn-automation 1 samplerate={FS}",
                           "livedyn-automation 1 samplerate=0",
                           "livedyn-automation 2 samplerate=48000",
                           "livedyn-automation 1 samplerate=" + "9" * 50, "", "x"])


@FUZZ
@given(header=headers, body=st.lists(auto_lines, max_size=6))
def test_fuzz_automation(work, capsys, header, body):
    p = work / "a.txt"
    p.write_bytes(("\n".join([header] + body) + "\n").encode("utf-8", "replace"))
    _run(["render", str(work / "in.wav"), "--out", str(work / "o.wav"), "--algorithm",
          "compressor", "--automation", str(p)], capsys)


# -- WAV headers --------------------------------------------------------------------------
@FUZZ
@given(edits=st.lists(st.tuples(st.integers(0, 79), st.integers(0, 255)), min_size=1,
                      max_size=6),
       cut=st.one_of(st.none(), st.integers(0, 200)),
       field=st.one_of(st.none(), st.tuples(st.sampled_from([4, 16, 22, 24, 28, 32, 34, 40]),
                                            st.sampled_from([0, 1, 0xFFFF, 0xFFFFFFFF, 3]))))
def test_fuzz_wav_headers(work, capsys, edits, cut, field):
    b = bytearray((work / "ok16.bytes").read_bytes())
    for i, v in edits:
        b[i] = v
    if field is not None:
        off, v = field
        size = 2 if off in (22, 32, 34) else 4
        b[off:off + size] = struct.pack("<H" if size == 2 else "<I", v & (0xFFFF if size == 2
                                                                         else 0xFFFFFFFF))
    if cut is not None:
        b = b[:cut]
    p = work / "h.wav"
    p.write_bytes(bytes(b))
    _run(["render", str(p), "--out", str(work / "o.wav"), "--algorithm", "compressor"], capsys)

"""The ``livedyn`` command line: user errors, help, presets, measure and demo.

Contract (livedyn.cli module docstring): every user error prints exactly one line
``livedyn: error: ...`` on stderr, exits with code 2, shows no traceback and overwrites nothing.

Sources of the checks
---------------------
* Static curve: Giannoulis, Massberg and Reiss, JAES 60(6) 2012, eq. (4), through the
  independent implementation in ``tests/reference.py``.
* One-pole step response ``1 - exp(-t / tau)``: 63.2 % at ``t = tau`` and a 10-90 % rise of
  ``tau ln 9 = 2.197 tau`` (README, "Parameters"; the arithmetic is done here).
* Latency: an impulse comes out ``round(lookahead * fs)`` samples later (DEVELOPERS.md,
  "Conventions the tests rely on": latency is reported, never hidden) - the reported and the
  measured value must agree.
* THD of a low tone falls as release gets longer: common practice, no source.
"""
from __future__ import annotations

import json
import math
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

import livedyn
from livedyn import cli, presets
from livedyn.meters import MeterSet
from tests.reference import gmr_static_curve

FS = 48000
LIVEDYN = Path(sys.executable).parent / "livedyn"
SHIPPED = {
    "bed-under-narrator": "ducker",
    "drums-ceiling": "limiter",
    "drums-tame": "compressor",
    "narrator-expand": "expander",
    "narrator-gate": "gate",
    "narrator-level": "compressor",
}


@pytest.fixture(scope="module", autouse=True)
def _warm_kernels():
    # Load (or compile) every kernel before the tests, so that no "compiling ..." notice joins
    # an error line on stderr.
    for name in ("compressor", "limiter"):
        livedyn.Processor(name, FS, 1)
    MeterSet(FS, 1).process(np.zeros((16, 1), np.float32))


def run(argv, capsys):
    """cli.main in this process: (exit code, stdout, stderr)."""
    try:
        rc = cli.main([str(a) for a in argv])
    except SystemExit as e:  # argparse: --help, usage errors
        rc = e.code
    out = capsys.readouterr()
    return rc, out.out, out.err


def assert_one_line_error(rc, err):
    assert rc == 2
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("livedyn: error: ") and len(lines[0]) > len("livedyn: error: ")
    assert "Traceback" not in err


# ---------------------------------------------------------------------------------------------
# User errors


@pytest.fixture
def work(tmp_path):
    """A folder with a valid input, a known OUT.wav and the bad files the cases need."""
    rng = np.random.default_rng(0)
    x = (0.1 * rng.standard_normal((4800, 2))).astype(np.float32)
    sf.write(str(tmp_path / "in.wav"), x, FS, subtype="FLOAT")
    sf.write(str(tmp_path / "key44.wav"), x[:, :1], 44100, subtype="FLOAT")
    sf.write(str(tmp_path / "key_short.wav"), x[:4000, :1], FS, subtype="FLOAT")
    sf.write(str(tmp_path / "in.aiff"), x, FS, format="AIFF")
    sf.write(str(tmp_path / "nine.wav"), np.zeros((100, 9), np.float32), FS, subtype="FLOAT")
    (tmp_path / "text.wav").write_text("this is not audio\n")
    (tmp_path / "folder.wav").mkdir()
    (tmp_path / "syntax.toml").write_text('preset_format = 1\nalgorithm = "compressor\n')
    (tmp_path / "unknown.toml").write_text(
        'preset_format = 1\nalgorithm = "compressor"\n[params]\nloudness = 3\n')
    (tmp_path / "bad.auto").write_text(
        "livedyn-automation 1 samplerate=48000\n0 threshold -20\n100 threshold\n")
    (tmp_path / "rate.auto").write_text(
        "livedyn-automation 1 samplerate=44100\n0 threshold -20\n")
    (tmp_path / "OUT.wav").write_bytes(b"known bytes, not a WAV file")
    return tmp_path


BAD = {
    "missing input": ["render", "{d}/nope.wav"],
    "directory as input": ["render", "{d}/folder.wav"],
    "text file named .wav": ["render", "{d}/text.wav"],
    "AIFF": ["render", "{d}/in.aiff"],
    "9 channels": ["render", "{d}/nine.wav"],
    "layout that does not fit": ["render", "{d}/in.wav", "--layout", "5.1"],
    "unknown algorithm": ["render", "{d}/in.wav", "--algorithm", "exciter"],
    "unknown parameter": ["render", "{d}/in.wav", "--set", "loudness=3"],
    "out of range": ["render", "{d}/in.wav", "--set", "ratio=0.5"],
    "no '='": ["render", "{d}/in.wav", "--set", "threshold"],
    "preset syntax error": ["render", "{d}/in.wav", "--preset", "{d}/syntax.toml"],
    "preset unknown key": ["render", "{d}/in.wav", "--preset", "{d}/unknown.toml"],
    "no such preset": ["render", "{d}/in.wav", "--preset", "no-such-preset"],
    "automation bad line": ["render", "{d}/in.wav", "--automation", "{d}/bad.auto"],
    "automation other rate": ["render", "{d}/in.wav", "--automation", "{d}/rate.auto"],
    "blocksize 0": ["render", "{d}/in.wav", "--blocksize", "0"],
    "ducker, key external, no --key": ["render", "{d}/in.wav", "--algorithm", "ducker",
                                       "--set", "key=external"],
    "ducker by default external, no --key": ["render", "{d}/in.wav", "--algorithm", "ducker"],
    "ducker preset, no --key": ["render", "{d}/in.wav", "--preset", "bed-under-narrator"],
    "limiter has no key": ["render", "{d}/in.wav", "--algorithm", "limiter",
                           "--key", "{d}/in.wav"],
    "trace folder is a file": ["render", "{d}/in.wav", "--trace", "{d}/text.wav"],
    "summary into a missing folder": ["render", "{d}/in.wav", "--summary-json",
                                      "{d}/nowhere/s.json"],
    "summary onto the input": ["render", "{d}/in.wav", "--summary-json", "{d}/in.wav"],
}
EXPECT = {  # a word the message must contain, so that it names what went wrong
    "missing input": "nope.wav", "directory as input": "directory", "text file named .wav":
    "text.wav", "AIFF": "AIFF", "9 channels": "9 channels", "layout that does not fit": "5.1",
    "unknown algorithm": "exciter", "unknown parameter":
    "loudness", "out of range": "ratio", "no '='": "name=value", "preset syntax error":
    "syntax.toml:2", "preset unknown key": "loudness", "no such preset": "no-such-preset",
    "automation bad line": "bad.auto:3", "automation other rate": "44100", "blocksize 0":
    "--blocksize", "ducker, key external, no --key": "key", "ducker by default external, "
    "no --key": "--key", "ducker preset, no --key": "--key", "limiter has no key": "--key",
    "trace folder is a file": "--trace", "summary into a missing folder": "--summary-json",
    "summary onto the input": "--summary-json",
}


@pytest.mark.parametrize("case", list(BAD))
def test_bad_input_one_line_exit_2_nothing_overwritten(case, work, capsys):
    before = {p.name: p.read_bytes() for p in work.iterdir() if p.is_file()}
    argv = [a.format(d=work) for a in BAD[case]] + ["--out", work / "OUT.wav"]
    rc, out, err = run(argv, capsys)
    assert_one_line_error(rc, err)
    assert EXPECT[case] in err
    after = {p.name: p.read_bytes() for p in work.iterdir() if p.is_file()}
    assert after == before  # OUT.wav untouched, no new or temporary file left
    assert not (work / "nowhere").exists()


def test_output_equal_to_input_is_refused(work, capsys):
    src = work / "in.wav"
    data = src.read_bytes()
    for out in (src, f"{work}/./in.wav"):
        rc, _, err = run(["render", src, "--out", out], capsys)
        assert_one_line_error(rc, err)
        assert "input" in err
        assert src.read_bytes() == data


def test_output_equal_to_key_is_refused(work, capsys):
    key = work / "key_same.wav"
    sf.write(str(key), np.zeros((4800, 1), np.float32), FS, subtype="FLOAT")
    data = key.read_bytes()
    rc, _, err = run(["render", work / "in.wav", "--algorithm", "ducker", "--key", key,
                      "--out", key], capsys)
    assert_one_line_error(rc, err)
    assert key.read_bytes() == data


def test_trace_folder_must_not_replace_the_input(work, capsys):
    src = work / "input.wav"  # the name of the input trace
    sf.write(str(src), np.zeros((480, 1), np.float32) + 0.1, FS, subtype="PCM_16")
    data = src.read_bytes()
    rc, _, err = run(["render", src, "--out", work / "o.wav", "--trace", work], capsys)
    assert_one_line_error(rc, err)
    assert src.read_bytes() == data and not (work / "o.wav").exists()


@pytest.mark.parametrize("argv", [["demo", "--seconds", "0"], ["demo", "--seconds", "-1"],
                                  ["measure", "latency", "--samplerate", "1000"],
                                  ["measure", "curve", "--json", "{d}/nowhere/c.json"],
                                  ["presets", "--show", "no-such-preset"],
                                  # OSC beyond this machine needs an allow list; checked
                                  # before anything starts or listens
                                  ["run", "--no-ui", "--osc", "--osc-bind", "0.0.0.0"],
                                  ["run", "--no-ui", "--osc-allow", "10.0.0.0/8"],
                                  ["run", "--no-ui", "--osc", "70000"],
                                  ["run", "--no-ui", "--osc", "--osc-allow", "10.0.0.300"],
                                  # test sources: above the -6 dBFS cap, unknown kind
                                  ["run", "--no-ui", "--test-main", "tone:1000:0"],
                                  ["run", "--no-ui", "--test-key", "hum"]])
def test_other_commands_one_line_errors(argv, tmp_path, capsys):
    argv = [a.format(d=tmp_path) for a in argv]
    if argv[0] == "demo":
        argv += ["--out", tmp_path / "demo"]
    rc, out, err = run(argv, capsys)
    assert_one_line_error(rc, err)
    assert not any(tmp_path.rglob("*.wav")) and not any(tmp_path.rglob("*.json"))


@pytest.mark.parametrize("argv,word", [
    (["render", "{d}/nope.wav", "--out", "{d}/OUT.wav"], "nope.wav"),
    (["render", "{d}/in.wav", "--out", "{d}/OUT.wav", "--set", "ratio=-3"], "ratio"),
])
def test_installed_command_errors(argv, word, work):
    """The installed entry point: one stderr line, exit 2, no traceback, OUT.wav kept."""
    before = (work / "OUT.wav").read_bytes()
    p = subprocess.run([str(LIVEDYN), *[a.format(d=work) for a in argv]], capture_output=True,
                       text=True, timeout=120)
    assert p.returncode == 2, p.stderr
    lines = [ln for ln in p.stderr.splitlines() if not ln.startswith("livedyn: compil")]
    assert len(lines) == 1 and lines[0].startswith("livedyn: error: ") and word in lines[0]
    assert "Traceback" not in p.stderr
    assert (work / "OUT.wav").read_bytes() == before


# ---------------------------------------------------------------------------------------------
# Help and presets


def test_help():
    p = subprocess.run([str(LIVEDYN), "--help"], capture_output=True, text=True, timeout=60)
    assert p.returncode == 0 and p.stderr == ""
    for word in ("render", "measure", "demo", "presets"):
        assert word in p.stdout
    p = subprocess.run([str(LIVEDYN), "render", "--help"], capture_output=True, text=True,
                       timeout=60)
    assert p.returncode == 0 and p.stderr == ""
    for opt in ("--out", "--key", "--preset", "--set", "--automation", "--trace", "--blocksize",
                "--keep-latency", "--format", "--summary-json"):
        assert opt in p.stdout


_UNIT_OR_DEFAULT = re.compile(r"default|dBFS|\bdB\b|\bms\b|\bHz\b|\bs\b|frames|"
                              r"channels|required|repeatable|instead of", re.I)


def test_every_option_has_help_with_unit_or_default():
    # README, "Commands": every option says what it takes; a value option also its unit or
    # default (a switch is off unless given, so its help says what it turns on).
    import argparse

    ap = cli.build_parser()
    sub = next(a for a in ap._actions if isinstance(a, argparse._SubParsersAction))
    missing, vague = [], []
    for name, p in sub.choices.items():
        for a in p._actions:
            if isinstance(a, argparse._HelpAction):
                continue
            label = f"{name} {'/'.join(a.option_strings) or a.dest}"
            if not a.help:
                missing.append(label)
            elif a.nargs != 0 and a.option_strings and a.choices is None and \
                    not _UNIT_OR_DEFAULT.search(a.help):
                vague.append(f"{label}: {a.help}")
    assert missing == []
    assert vague == []


def test_measure_without_a_measurement_lists_the_four(capsys):
    rc, out, err = run(["measure"], capsys)
    assert_one_line_error(rc, err)
    for what in ("curve", "timing", "latency", "distortion"):
        assert re.search(rf"^  {what} ", out, re.M), out


def test_set_accepts_a_unique_prefix(tmp_path, capsys):
    x = tmp_path / "in.wav"
    sf.write(x, np.zeros((4800, 1), np.float32), FS, subtype="FLOAT")
    rc, out, err = run(["render", x, "--out", tmp_path / "o.wav", "--set", "thresh=-10",
                        "--set", "rat=3", "--summary-json", tmp_path / "s.json"], capsys)
    assert rc == 0, err
    rc, out, err = run(["measure", "latency", "--set", "look=2"], capsys)
    assert rc == 0 and "reported 96 samples" in out, out  # 2 ms at 48 kHz
    rc, out, err = run(["measure", "latency", "--set", "key=main", "--set", "k=1"], capsys)
    assert_one_line_error(rc, err)
    assert "'k' could be knee, key, key_hpf" in err


@pytest.mark.parametrize("name", ["o.flac", "o.ogg", "o", "o.WAV.txt"])
def test_render_refuses_an_output_that_is_not_wav(tmp_path, capsys, name):
    x = tmp_path / "in.wav"
    sf.write(x, np.zeros((480, 1), np.float32), FS, subtype="FLOAT")
    rc, out, err = run(["render", x, "--out", tmp_path / name], capsys)
    assert_one_line_error(rc, err)
    assert "expected a name ending in .wav" in err
    assert not (tmp_path / name).exists()
    rc, out, err = run(["render", x, "--out", tmp_path / "o.WAV"], capsys)
    assert rc == 0 and sf.info(str(tmp_path / "o.WAV")).format in ("WAV", "WAVEX", "RF64")


def test_new_algorithm_copies_a_shipped_example(tmp_path, capsys):
    from livedyn.shipped import examples_folder

    rc, out, err = run(["new-algorithm", tmp_path / "mine", "--example", "program_release"],
                       capsys)
    assert rc == 0, err
    assert (tmp_path / "mine.py").read_bytes() == \
        (examples_folder() / "program_release.py").read_bytes()
    rc, out, err = run(["new-algorithm", tmp_path / "other", "--example", "nope"], capsys)
    assert_one_line_error(rc, err)
    assert "expected one of loudness_ducker, program_release, speech_key" in err
    assert not (tmp_path / "other.py").exists()


def test_no_command_prints_help_and_exits_2(capsys):
    rc, out, _ = run([], capsys)
    assert rc == 2 and "render" in out


def test_presets_lists_the_six_shipped(capsys):
    rc, out, err = run(["presets"], capsys)
    assert rc == 0 and err == ""
    rows = [ln.split(None, 2) for ln in out.splitlines() if ln.strip()]
    assert {r[0]: r[1] for r in rows} == SHIPPED
    assert {p.stem for p in presets.presets_dir().glob("*.toml")} == set(SHIPPED)


def test_presets_show(capsys):
    rc, out, err = run(["presets", "--show", "drums-tame"], capsys)
    assert rc == 0 and err == ""
    assert out.startswith("# livedyn preset")  # that preset alone, not the list before it
    doc = tomllib.loads(out)
    assert doc["algorithm"] == "compressor"
    assert doc["params"]["threshold"] == -20 and doc["params"]["ratio"] == "4:1"
    # the same settings as the shipped file, read with Python's own TOML parser
    shipped = tomllib.loads((presets.presets_dir() / "drums-tame.toml").read_text())
    assert doc == shipped


# ---------------------------------------------------------------------------------------------
# measure

_NUM = r"-?\d+(?:\.\d+)?"


def test_measure_curve_square_drums_tame(capsys):
    rc, out, err = run(["measure", "curve", "--preset", "drums-tame", "--signal", "square"],
                       capsys)
    assert rc == 0 and err == ""
    rows = [tuple(ln.split()) for ln in out.splitlines()
            if re.fullmatch(rf"\s*{_NUM}\s+square\s+{_NUM}\s+{_NUM}\s+{_NUM}\s*", ln)]
    assert len(rows) == 31  # -60 to 0 dBFS in 2 dB steps
    level = np.array([float(r[0]) for r in rows])
    measured = np.array([float(r[2]) for r in rows])
    theory = np.array([float(r[3]) for r in rows])
    error = np.array([float(r[4]) for r in rows])
    np.testing.assert_array_equal(level, np.arange(-60, 1, 2))
    # theory column: GMR 2012 eq. (4) with the preset's threshold -20, ratio 4, knee 6, plus
    # its 3 dB makeup
    np.testing.assert_allclose(theory, gmr_static_curve(level, -20, 4, 6) + 3, atol=0.006)
    assert np.abs(error).max() < 0.01
    np.testing.assert_allclose(measured - theory, error, atol=0.006)
    m = re.search(rf"largest square-wave error: ({_NUM}) dB", out)
    assert m and float(m.group(1)) == pytest.approx(np.abs(error).max(), abs=0.0011)


def test_measure_timing(capsys):
    rc, out, err = run(["measure", "timing", "--set", "attack=10", "--set", "release=150"],
                       capsys)
    assert rc == 0 and err == ""
    rows = {}
    for ln in out.splitlines():
        m = re.fullmatch(rf"\s*(attack|release)\s+({_NUM})\s+({_NUM})\s+({_NUM})\s+({_NUM})"
                         r"\s+one-pole\s*", ln)
        if m:
            rows[m.group(1)] = tuple(float(g) for g in m.groups()[1:])
    assert set(rows) == {"attack", "release"}
    for phase, setting in (("attack", 10.0), ("release", 150.0)):
        s, hold, tau, rise = rows[phase]
        assert s == setting and hold == 0.0
        # attack/release are one-pole tau: 63.2 % at tau, 10-90 % = tau ln 9
        assert tau == pytest.approx(setting, rel=0.02)
        assert rise == pytest.approx(tau * math.log(9), rel=0.02)


@pytest.mark.parametrize("argv,expected", [
    (["--set", "lookahead=5"], 240),
    (["--set", "lookahead=0"], 0),
    (["--algorithm", "limiter", "--set", "lookahead=2"], 96),
])
def test_measure_latency_measured_equals_reported(argv, expected, tmp_path, capsys):
    rc, out, err = run(["measure", "latency", *argv, "--json", tmp_path / "l.json"], capsys)
    assert rc == 0 and err == ""
    m = re.search(r"measured (-?\d+) samples from an impulse, reported (-?\d+) samples", out)
    assert m, out
    assert int(m.group(1)) == int(m.group(2)) == expected
    assert json.loads((tmp_path / "l.json").read_text())["latency"] == {
        "measured": expected, "reported": expected}


@pytest.mark.parametrize("argv,level", [([], -6.0),
                                         (["--algorithm", "limiter", "--set", "ceiling=-3"],
                                          3.0)])
def test_measure_distortion_falls_with_release(argv, level, capsys):
    # the limiter is driven 6 dB over its ceiling: below it there is nothing to measure
    rc, out, err = run(["measure", "distortion", *argv], capsys)
    assert rc == 0 and err == ""
    assert f"tone at {level:g} dBFS" in out
    rows = [tuple(float(v) for v in ln.split()) for ln in out.splitlines()
            if re.fullmatch(rf"\s*{_NUM}\s+{_NUM}\s+{_NUM}\s*", ln)]
    release = [r[0] for r in rows]
    thd = [r[1] for r in rows]
    assert release == [2, 5, 10, 20, 50, 100, 200, 500]
    # a release of a few periods of the 50 Hz tone lets the gain follow the waveform
    # (common practice, no source): THD falls at every step from 2 ms to 500 ms
    assert all(a > b for a, b in zip(thd, thd[1:])), thd
    assert thd[0] > 5 * thd[-1]


# ---------------------------------------------------------------------------------------------
# render and demo through the command line


def test_render_summary_json(tmp_path, capsys):
    x = (0.2 * np.random.default_rng(3).standard_normal((2 * FS, 2))).astype(np.float32)
    sf.write(str(tmp_path / "in.wav"), x, FS, subtype="PCM_24")
    rc, out, err = run(["render", tmp_path / "in.wav", "--out", tmp_path / "out.wav",
                        "--preset", "drums-tame", "--summary-json", tmp_path / "s.json"],
                       capsys)
    assert rc == 0 and err == ""
    s = json.loads((tmp_path / "s.json").read_text())
    assert s["algorithm"] == "compressor" and s["frames"] == 2 * FS
    assert s["parameters"]["threshold"] == "-20 dBFS"
    line = next(ln for ln in out.splitlines() if "integrated loudness" in ln)
    assert f"{s['output_meters']['integrated_lufs']:.1f} LUFS" in line
    assert sf.info(str(tmp_path / "out.wav")).subtype == "PCM_24"


def test_demo(tmp_path, capsys):
    out_dir = tmp_path / "demo"
    rc, out, err = run(["demo", "--out", out_dir, "--seconds", "4"], capsys)
    assert rc == 0, err
    for track in ("drums", "music", "narrator"):
        info = sf.info(str(out_dir / "scenario" / f"{track}.wav"))
        assert info.samplerate == FS and info.frames == 4 * FS
    for name, algo in SHIPPED.items():
        info = sf.info(str(out_dir / f"{name}.wav"))
        assert info.samplerate == FS and info.frames == 4 * FS
        assert f"{algo}: " in out
        y, _ = sf.read(str(out_dir / f"{name}.wav"), dtype="float32")
        assert np.isfinite(y).all() and np.abs(y).max() > 1e-3
    # the ceiling preset holds its -4 dBFS sample ceiling
    y, _ = sf.read(str(out_dir / "drums-ceiling.wav"), dtype="float32")
    assert np.abs(y).max() <= 10 ** (-4 / 20) * (1 + 1e-6)


@pytest.mark.parametrize("key, word", [("key44.wav", "resampled"), ("key_short.wav", "padded")])
def test_render_adapts_a_key_of_another_rate_or_length_with_a_note(key, word, work, capsys):
    rc, out, err = run(["render", str(work / "in.wav"), "--algorithm", "ducker", "--key",
                        str(work / key), "--out", str(work / "keyed.wav")], capsys)
    assert rc == 0 and err == ""
    notes = [line for line in out.splitlines() if line.strip().startswith("note:")]
    assert 1 <= len(notes) <= 2 and word in notes[0]


@pytest.mark.parametrize("what, name", [("timing", "timing.png"), ("latency", "latency.png")])
def test_measure_plots_are_written(what, name, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    rc, out, err = run(["measure", what, "--algorithm", "limiter", "--plot", tmp_path], capsys)
    assert rc == 0 and err == ""
    png = tmp_path / name
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and f"plot: {png}" in out

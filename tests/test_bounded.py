"""Work bounded by the input's real size: lazily expanded ramps, parsing limits, and the
last safety stage of ``render`` (non-finite output blocks muted and counted).

Sources: the README's automation format (ramps every RAMP_STEP frames); the live engine's
last stage (livedyn.engine.callback.safety_stage: a block with a non-finite sample is muted
and counted); limits are livedyn's own (common practice, no source).
"""
from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

from livedyn import algorithms, automation, cli
from livedyn.automation import RAMP_STEP, Automation

FS = 48000


@pytest.fixture
def work(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    x = (0.5 * np.sin(2 * np.pi * 440 * np.arange(FS) / FS)).astype(np.float32)
    sf.write(tmp_path / "in.wav", x, FS, subtype="FLOAT")
    return tmp_path


def _counting(monkeypatch):
    made = [0]
    real = automation.iter_ramp

    def counted(*a, **k):
        for ev in real(*a, **k):
            made[0] += 1
            yield ev

    monkeypatch.setattr(automation, "iter_ramp", counted)
    return made


def test_billion_frame_ramp_on_one_second_makes_only_the_steps_it_plays(work, monkeypatch,
                                                                        capsys):
    (work / "a.txt").write_text(f"livedyn-automation 1 samplerate={FS}\n"
                                "0..1000000000 threshold -40 -> 0\n")
    made = _counting(monkeypatch)
    schema = algorithms.get("compressor").schema
    a = Automation.load(work / "a.txt", schema)
    assert made[0] == 0  # nothing expanded on load
    assert len(a) == 1000000000 // RAMP_STEP + 1  # counted, not made
    assert cli.main(["render", "in.wav", "--out", "o.wav", "--automation", "a.txt",
                     "--algorithm", "compressor"]) == 0
    # the steps up to the end of the 1 s file (and the latency flush), no more
    assert FS // RAMP_STEP <= made[0] <= FS // RAMP_STEP + 1024 // RAMP_STEP + 2


def test_lazy_events_equal_the_expanded_ramp(work):
    schema = algorithms.get("compressor").schema
    (work / "a.txt").write_text(f"livedyn-automation 1 samplerate={FS}\n"
                                "100 ratio 2\n0..200 threshold -40 -> -20\n"
                                "200 threshold -10\n50..90 ratio 1 -> inf\n")
    a = Automation.load(work / "a.txt", schema)
    want = sorted(
        [(100, "ratio", 2.0), (200, "threshold", -10.0)]
        + automation.expand_ramp(schema["threshold"], 0, 200, -40.0, -20.0)
        + automation.expand_ramp(schema["ratio"], 50, 90, 1.0, float("inf")),
        key=lambda e: e[0])
    assert list(a) == [e for e in a.events]
    assert sorted(a) == sorted(want) and len(a) == len(want)
    assert [e[0] for e in a] == sorted(e[0] for e in want)
    # equal frames keep line order: the ramp (line 2) ends at 200 before the step (line 3)
    at200 = [e for e in a if e[0] == 200]
    assert at200 == [(200, "threshold", -20.0), (200, "threshold", -10.0)]
    assert a.events_between(60, 70) == [e for e in want if 60 <= e[0] < 70]
    # saved as ramp lines, read back the same
    a.save(work / "b.txt")
    assert "0..200 threshold" in (work / "b.txt").read_text()
    assert list(Automation.load(work / "b.txt", schema)) == list(a)


def test_render_mutes_and_counts_non_finite_output(work, monkeypatch, capsys):
    from livedyn import processor

    real = processor.Processor.process_traced
    calls = [0]

    def poisoned(self, x, key=None):
        y, tr = real(self, x, key)
        calls[0] += 1
        if calls[0] == 3:
            y = y.copy()
            y[5, 0] = np.nan
        return y, tr

    monkeypatch.setattr(processor.Processor, "process_traced", poisoned)
    code = cli.main(["render", "in.wav", "--out", "o.wav", "--blocksize", "1000",
                     "--summary-json", "s.json"])
    cap = capsys.readouterr()
    assert code == 4
    err = cap.err.strip().splitlines()
    assert len(err) == 1 and "1 blocks of non-finite output were muted" in err[0]
    assert "1 output blocks (1000 frames) held non-finite samples and were muted" in cap.out
    y, _ = sf.read(work / "o.wav", dtype="float32")
    assert np.isfinite(y).all() and np.all(y[2000:3000] == 0) and np.any(y[1000:2000] != 0)
    import json

    assert json.loads((work / "s.json").read_text())["muted_blocks"] == 1
    calls[0] = 0
    assert cli.main(["render", "in.wav", "--out", "o2.wav", "--blocksize", "1000",
                     "--accept-muted"]) == 0


def _one_line_2(argv, capsys):
    code = cli.main(argv)
    cap = capsys.readouterr()
    lines = cap.err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and lines[0].startswith("livedyn: error: "), cap.err
    assert len(lines[0]) < 400
    return lines[0]


PRESET_HEAD = 'preset_format = 1\nalgorithm = "compressor"\n'


@pytest.mark.parametrize("body,word", [
    ("[params]\nthreshold = 1" + "0" * 400 + "\n", "digits, expected at most"),
    ("[params]\nratio = -" + "9" * 30 + "\n", "digits, expected at most"),
    ("[params]\nthreshold = " + "[" * 1000 + "]" * 1000 + "\n", "nested more than"),
    ("[params]\nthreshold = [\n" + "[\n" * 3000 + "]\n" * 3001, "nested more than"),
    (".".join(["a"] * 50000) + " = 1\n", "characters, expected at most 4096"),
    ("k" * 200 + " = 1\n", "characters, expected at most 128"),
    ("[params]\nthreshold = 1e999\n", "out of range"),
])
def test_hostile_presets_are_one_line(work, capsys, body, word):
    (work / "h.toml").write_text(PRESET_HEAD + body)
    assert word in _one_line_2(["render", "in.wav", "--out", "o.wav", "--preset", "h.toml"],
                               capsys)
    assert not (work / "o.wav").exists()


@pytest.mark.parametrize("line,word", [
    ("9" * 30 + " threshold -20", "digits: too large"),
    ("9" * 5000 + " threshold -20", "characters, expected at most 4096"),
    ("0 threshold " + "1" * 900000, "characters, expected at most 4096"),
    ("0.." + "9" * 40 + " threshold -40 -> 0", "too large"),
])
def test_hostile_automation_is_one_line(work, capsys, line, word):
    (work / "a.txt").write_text(f"livedyn-automation 1 samplerate={FS}\n{line}\n")
    assert word in _one_line_2(["render", "in.wav", "--out", "o.wav", "--automation", "a.txt"],
                               capsys)


@pytest.mark.parametrize("argv,word", [
    (["new-algorithm", ""], "expected a file name"),
    (["new-algorithm", "/"], "expected a file name"),
    (["measure", "distortion", "--frequency", "0"], "--frequency 0: expected a tone"),
    (["measure", "distortion", "--frequency", "nan"], "--frequency nan"),
    (["measure", "distortion", "--frequency", "1e9"], "below a quarter"),
    (["measure", "distortion", "--frequency", "-50"], "--frequency -50"),
    (["run", "--key-demo", "--no-ui", "--seconds", "601"], "at most 600"),
    (["run", "--key-demo", "--no-ui", "--seconds", "inf"], "at most 600"),
    (["run", "--key-demo", "--no-ui", "--seconds", "1e9"], "at most 600"),
    (["run", "--key-demo", "--no-ui", "--samplerate", "0"], "--samplerate 0"),
    (["run", "--key-demo", "--no-ui", "--samplerate", "nan"], "--samplerate nan"),
    (["run", "--key-demo", "--no-ui", "--samplerate", "8000"], "from 32000"),
])
def test_listed_tracebacks_are_one_line(work, capsys, argv, word):
    assert word in _one_line_2(argv, capsys)


def test_long_values_are_shortened_in_the_error_line(work, capsys):
    line = _one_line_2(["render", "in.wav", "--out", "o.wav", "--set",
                        "threshold=" + "x" * 900000], capsys)
    assert "characters)" in line

"""Tests for livedyn.automation: the text format, ramps, and splitting blocks at event frames.

The checks are against the format's own specification in the module docstring (our design,
no outside source) and against independent arithmetic written out here:
* a ramp is linear in the value, except ratio, which is linear in slope = 1 - 1/ratio
  (so halfway between 1:1 and inf:1 is 2:1: 1 / (1 - 0.5) = 2);
* a change stamped at frame F is in force from frame F on, whatever the block size.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from livedyn import algorithms
from livedyn.automation import (
    RAMP_STEP,
    Automation,
    AutomationCursor,
    AutomationError,
    expand_ramp,
    run_with_automation,
)
from livedyn.params import ParamError, ratio_to_slope

SCHEMA = algorithms.get("compressor").schema
HEADER = "livedyn-automation 1 samplerate=48000\n"


def _write(tmp_path, text, name="a.auto"):
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return p


# ---------------------------------------------------------------------------------------------
# Parsing and saving


def test_parse(tmp_path):
    p = _write(tmp_path, "# a comment first\n\n" + HEADER + """\
# frame parameter value
96000 detector rms
0     threshold -20         # trailing comment
48000 ratio 4:1
48000 threshold -18 dBFS
48000 threshold -19
120000 key_hpf off
130000 key_hpf 120 Hz
140000 ratio inf
""")
    a = Automation.load(p, SCHEMA)
    assert a.samplerate == 48000
    assert a.source == p
    assert a.events == [
        (0, "threshold", -20.0),
        (48000, "ratio", 4.0),
        (48000, "threshold", -18.0),  # same frame: file order kept, the last one wins
        (48000, "threshold", -19.0),
        (96000, "detector", 1.0),  # lines need not be in frame order: sorted
        (120000, "key_hpf", 0.0),
        (130000, "key_hpf", 120.0),
        (140000, "ratio", math.inf),
    ]


def test_header_only_is_empty(tmp_path):
    a = Automation.load(_write(tmp_path, HEADER), SCHEMA)
    assert a.events == [] and len(a) == 0


def test_round_trip(tmp_path):
    a = Automation(44100, schema=SCHEMA)
    a.add(10, "threshold", -17.333333333333332)
    a.add(0, "ratio", "inf")
    a.add(10, "detector", "rms")
    a.add(5, "key_hpf", "off")
    a.add(5, "key_hpf", 80.0)
    a.add(7, "release", 1000 / 3)
    a.add(10, "threshold", -3.0000000000000004)
    p = tmp_path / "rec.auto"
    a.save(p)
    b = Automation.load(p, SCHEMA)
    assert b.samplerate == 44100
    assert b.events == a.events  # exact values, same order
    p2 = tmp_path / "rec2.auto"
    b.save(p2)
    assert p2.read_bytes() == p.read_bytes()
    text = p.read_text()
    assert text.startswith("livedyn-automation 1 samplerate=44100\n")
    assert "0 ratio inf\n" in text and "10 detector rms\n" in text and "5 key_hpf off\n" in text


def test_save_is_atomic(tmp_path, monkeypatch):
    import livedyn.presets as presets_mod

    p = _write(tmp_path, HEADER + "0 threshold -3\n")
    before = p.read_bytes()
    a = Automation(48000, [(0, "ratio", 2.0)], SCHEMA)

    def boom(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(presets_mod.os, "replace", boom)
    with pytest.raises(AutomationError) as e:
        a.save(p)
    assert str(e.value).startswith(str(p)) and "No space left" in str(e.value)
    assert p.read_bytes() == before
    assert [q.name for q in tmp_path.iterdir()] == ["a.auto"]


def test_add_keeps_order_and_checks():
    a = Automation(48000, schema=SCHEMA)
    a.add(100, "threshold", -10)
    a.add(50, "threshold", -20)
    a.add(100, "threshold", "-5 dBFS")
    a.add(100, "ratio", "2:1")
    assert a.events == [(50, "threshold", -20.0), (100, "threshold", -10.0),
                        (100, "threshold", -5.0), (100, "ratio", 2.0)]
    with pytest.raises(AutomationError, match="unknown parameter 'loudness'"):
        a.add(0, "loudness", 1.0)
    with pytest.raises(AutomationError, match=r"frame -1: expected a whole number >= 0"):
        a.add(-1, "threshold", -10)
    with pytest.raises(AutomationError, match="ratio = 0.5: out of range"):
        a.add(0, "ratio", 0.5)
    with pytest.raises(AutomationError, match="threshold = nan"):
        a.add(0, "threshold", math.nan)
    assert isinstance(AutomationError("x"), ParamError)


def test_events_between():
    a = Automation(48000, [(0, "mix", 1.0), (10, "mix", 2.0), (10, "mix", 3.0), (20, "mix", 4.0)])
    assert a.events_between(0, 10) == [(0, "mix", 1.0)]
    assert a.events_between(10, 20) == [(10, "mix", 2.0), (10, "mix", 3.0)]
    assert a.events_between(11, 20) == []
    assert a.events_between(0, 100) == a.events
    assert a.events_between(20, 5) == []


# ---------------------------------------------------------------------------------------------
# Ramps


def test_linear_ramp(tmp_path):
    a = Automation.load(_write(tmp_path, HEADER + "1000..1100 threshold -40 -> -20\n"), SCHEMA)
    frames = [f for f, _, _ in a.events]
    # every RAMP_STEP (16) frames from the start, plus an exact final step at the end
    assert RAMP_STEP == 16
    assert frames == [1000, 1016, 1032, 1048, 1064, 1080, 1096, 1100]
    for f, name, v in a.events:
        assert name == "threshold"
        assert v == pytest.approx(-40 + 20 * (f - 1000) / 100, abs=1e-12)
    assert a.events[0][2] == -40.0 and a.events[-1][2] == -20.0


def test_ratio_ramp_one_to_inf_in_slope_space(tmp_path):
    a = Automation.load(_write(tmp_path, HEADER + "0..64 ratio 1 -> inf\n"), SCHEMA)
    frames = [f for f, _, _ in a.events]
    values = [v for _, _, v in a.events]
    assert frames == [0, 16, 32, 48, 64]
    # slope 0, 1/4, 1/2, 3/4, 1  ->  ratio 1, 4/3, 2, 4, inf
    assert values[0] == 1.0
    assert values[1] == pytest.approx(4 / 3, rel=1e-12)
    assert values[2] == pytest.approx(2.0, rel=1e-12)  # halfway is 2:1, not "inf/2"
    assert values[3] == pytest.approx(4.0, rel=1e-12)
    assert math.isinf(values[4])


def test_ratio_ramp_linear_in_slope():
    p = SCHEMA["ratio"]
    ev = expand_ramp(p, 0, 1000, 2.0, 8.0)
    s0, s1 = ratio_to_slope(2.0), ratio_to_slope(8.0)
    for f, _, v in ev:
        assert ratio_to_slope(v) == pytest.approx(s0 + (s1 - s0) * f / 1000, abs=1e-12)
    # falling ramps work the same way
    ev = expand_ramp(p, 0, 32, math.inf, 1.0)
    assert [v for _, _, v in ev][0] == math.inf
    assert [v for _, _, v in ev][1] == pytest.approx(2.0)
    assert ev[-1][2] == 1.0


def test_short_ramp_and_step_count():
    p = SCHEMA["mix"]
    assert expand_ramp(p, 5, 10, 0.0, 100.0) == [(5, "mix", 0.0), (10, "mix", 100.0)]
    for length in (1, 15, 16, 17, 31, 32, 33, 1000):
        ev = expand_ramp(p, 0, length, 0.0, 100.0)
        assert len(ev) == math.ceil(length / RAMP_STEP) + 1
        assert [f for f, _, _ in ev[:-1]] == list(range(0, length, RAMP_STEP))
        assert ev[-1] == (length, "mix", 100.0)
        assert all(0.0 <= v <= 100.0 for _, _, v in ev)


def test_ramp_and_steps_interleave(tmp_path):
    a = Automation.load(_write(tmp_path, HEADER + "0..32 mix 0 -> 100\n20 threshold -6\n"
                               "32 mix 50\n"), SCHEMA)
    assert a.events == [(0, "mix", 0.0), (16, "mix", 50.0), (20, "threshold", -6.0),
                        (32, "mix", 100.0), (32, "mix", 50.0)]


# ---------------------------------------------------------------------------------------------
# Malformed files: one line, FILE:LINE: first.

MALFORMED = [
    ("no-header", "0 threshold -3\n", 1, "not an automation header"),
    ("wrong-name", "dyn-auto 1 samplerate=48000\n", 1, "not an automation header"),
    ("version", "livedyn-automation 2 samplerate=48000\n", 1, "version '2': unsupported"),
    ("rate-zero", "livedyn-automation 1 samplerate=0\n", 1, "samplerate=0: expected a whole"),
    ("rate-text", "livedyn-automation 1 samplerate=44.1k\n", 1, "samplerate=44.1k"),
    ("rate-missing", "livedyn-automation 1\n", 1, "expected 'livedyn-automation 1 samplerate"),
    ("bad-frame", HEADER + "12a threshold -3\n", 2, "frame '12a': expected a whole number"),
    ("negative-frame", HEADER + "-5 threshold -3\n", 2, "frame '-5'"),
    ("float-frame", HEADER + "# c\n1.5 threshold -3\n", 3, "frame '1.5'"),
    ("unknown-param", HEADER + "0 loudness 3\n", 2, "unknown parameter 'loudness'"),
    ("bad-value", HEADER + "0 threshold loud\n", 2, "threshold = 'loud': expected a number"),
    ("out-of-range", HEADER + "0 ratio 0.5\n", 2, "ratio = 0.5: out of range"),
    ("nan", HEADER + "0 attack nan\n", 2, "attack = nan"),
    ("bad-choice", HEADER + "0 detector loudest\n", 2, "detector = 'loudest'"),
    ("missing-value", HEADER + "\n0 threshold\n", 3, "expected 'FRAME PARAMETER VALUE'"),
    ("ramp-backwards", HEADER + "100..50 threshold -3 -> -6\n", 2, "ramp 100..50: expected"),
    ("ramp-empty", HEADER + "100..100 threshold -3 -> -6\n", 2, "ramp 100..100"),
    ("ramp-choice", HEADER + "0..100 detector peak -> rms\n", 2, "a choice cannot be ramped"),
    ("ramp-no-arrow", HEADER + "0..100 threshold -3 -6\n", 2, "expected 'A -> B'"),
    ("ramp-off", HEADER + "0..100 key_hpf off -> 100\n", 2, "cannot ramp from or to off"),
    ("ramp-bad-end", HEADER + "0..100 ratio 1 -> 0\n", 2, "ratio = 0: out of range"),
    ("ramp-bad-frame", HEADER + "0..x threshold -3 -> -6\n", 2, "frame 'x'"),
    ("step-with-arrow", HEADER + "5 threshold -3 -> -6\n", 2, "a ramp needs frames 'F0..F1'"),
    ("overlapping-ramps", HEADER + "0..100 mix 0 -> 100\n50..150 mix 100 -> 0\n", 3,
     "overlaps the ramp 0..100 on line 2"),
    ("step-inside-ramp", HEADER + "0..100 mix 0 -> 100\n50 mix 10\n", 3,
     "step of mix at frame 50 falls inside the ramp 0..100 on line 2"),
]


@pytest.mark.parametrize("text, line, needle", [m[1:] for m in MALFORMED],
                         ids=[m[0] for m in MALFORMED])
def test_malformed(tmp_path, text, line, needle):
    p = _write(tmp_path, text)
    with pytest.raises(AutomationError) as e:
        Automation.load(p, SCHEMA)
    msg = str(e.value)
    assert "\n" not in msg
    assert msg.startswith(f"{p}:{line}: "), msg
    assert needle in msg, msg


@pytest.mark.parametrize(
    "content, needle",
    [
        ("", "empty file"),
        ("# only a comment\n", "no header"),
        (b"\x00\x01\x02binary", "binary data"),
        (HEADER.encode() + b"0 threshold -3 \xff\n", ":2: not UTF-8 text"),
    ],
)
def test_bad_files(tmp_path, content, needle):
    p = _write(tmp_path, content)
    with pytest.raises(AutomationError) as e:
        Automation.load(p, SCHEMA)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(str(p)) and needle in msg, msg


def test_missing_and_directory(tmp_path):
    with pytest.raises(AutomationError, match="no such file"):
        Automation.load(tmp_path / "none.auto", SCHEMA)
    (tmp_path / "d.auto").mkdir()
    with pytest.raises(AutomationError, match="is a directory"):
        Automation.load(tmp_path / "d.auto", SCHEMA)


def test_schema_decides_what_is_known(tmp_path):
    # threshold is not a limiter parameter
    p = _write(tmp_path, HEADER + "0 threshold -3\n")
    with pytest.raises(AutomationError, match=r":2: unknown parameter 'threshold'"):
        Automation.load(p, algorithms.get("limiter").schema)


# ---------------------------------------------------------------------------------------------
# Splitting blocks at event frames

N = 10000
EVENTS = [
    (0, "mix", 10.0),
    (0, "threshold", -10.0),
    (1, "mix", 20.0),
    (62, "mix", 30.0),
    (63, "mix", 40.0),
    (64, "mix", 50.0),
    (64, "mix", 55.0),  # same frame: applied in order
    (4096, "mix", 60.0),
    (4097, "mix", 70.0),
    (8193, "threshold", -20.0),
    (N - 1, "mix", 80.0),
    (N, "mix", 90.0),  # at the end: never applied
    (N + 500, "mix", 95.0),  # after the end: never applied
]


def _automation():
    a = Automation(48000, EVENTS, SCHEMA)
    # and a ramp, expanded the way the loader does it
    for ev in expand_ramp(SCHEMA["ratio"], 5000, 5300, 1.0, math.inf):
        a.add(*ev)
    return a


def _run(blocksize, automation):
    x = (np.arange(N, dtype=np.float32) / N).reshape(-1, 1)
    key = np.arange(N, dtype=np.float32).reshape(-1, 1) * 2.0
    done = [0]
    calls = []
    state = {"mix": 100.0}

    def set_fn(name, value):
        calls.append((done[0], name, value))
        state[name] = value

    def process_fn(xp, kp):
        assert xp.dtype == np.float32 and xp.ndim == 2
        # key parts stay aligned with the main parts
        assert np.array_equal(kp[:, 0], np.arange(done[0], done[0] + xp.shape[0]) * 2.0)
        done[0] += xp.shape[0]
        return xp * np.float32(state["mix"] / 100.0)

    y = run_with_automation(process_fn, set_fn, x, key, automation, blocksize)
    assert done[0] == N
    return calls, y, x


@pytest.mark.parametrize("blocksize", [1, 63, 64, 4097, N + 3])
def test_split_exactly_at_event_frames(blocksize):
    a = _automation()
    calls, y, x = _run(blocksize, a)
    # Each event is applied exactly when the frames processed so far equal its frame.
    expected = [(f, n, v) for f, n, v in a.events if f < N]
    assert calls == expected
    # Independent reconstruction of the output: the mix in force at each frame.
    mix_frames = np.array([f for f, n, _ in a.events if n == "mix" and f < N])
    mix_values = np.array([v for f, n, v in a.events if n == "mix" and f < N])
    idx = np.searchsorted(mix_frames, np.arange(N), side="right") - 1
    gain = np.where(idx >= 0, mix_values[np.maximum(idx, 0)], 100.0)
    expect_y = x[:, 0] * (gain / 100.0).astype(np.float32)
    assert np.array_equal(y[:, 0], expect_y)


def test_same_sequence_for_every_block_size():
    a = _automation()
    ref_calls, ref_y, _ = _run(1, a)
    for bs in (63, 64, 4097):
        calls, y, _ = _run(bs, a)
        assert calls == ref_calls, bs
        assert np.array_equal(y, ref_y), bs


def test_cursor_ranges():
    evs = [(10, "mix", 1.0), (150, "mix", 2.0), (150, "mix", 3.0), (199, "mix", 4.0),
           (200, "mix", 5.0)]
    c = AutomationCursor(evs)
    # events before the first block are applied at its start
    assert c.split(100, 200) == [
        (100, 150, [(10, "mix", 1.0)]),
        (150, 199, [(150, "mix", 2.0), (150, "mix", 3.0)]),
        (199, 200, [(199, "mix", 4.0)]),
    ]
    assert c.pending == 1 and c.position == 200
    assert c.split(200, 200) == []  # an empty block applies nothing
    assert c.split(200, 264) == [(200, 264, [(200, "mix", 5.0)])]
    assert c.split(264, 300) == [(264, 300, [])]
    with pytest.raises(ValueError, match="before the end of the previous block"):
        c.split(100, 120)


def test_run_without_automation_and_no_key():
    x = np.ones((100, 2), np.float32)
    seen = []
    y = run_with_automation(lambda xp, kp: seen.append(kp) or xp * 2, None, x, None, None, 30)
    assert np.array_equal(y, x * 2)
    assert seen == [None] * 4  # 30 + 30 + 30 + 10


def test_run_checks_arguments():
    x = np.zeros((10, 1), np.float32)
    with pytest.raises(ValueError, match="blocksize = 0"):
        run_with_automation(lambda a, b: a, None, x, None, None, 0)
    with pytest.raises(ValueError, match="key has shape"):
        run_with_automation(lambda a, b: a, None, x, np.zeros((9, 1), np.float32), None, 4)
    with pytest.raises(ValueError, match="process_fn returned shape"):
        run_with_automation(lambda a, b: a[:1], None, x, None, None, 4)

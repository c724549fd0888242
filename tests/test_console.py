"""Tests of the text console (livedyn.console): commands, taper-following steps, slots, undo,
level matching, rendering at two terminal sizes, resize, and the Application driven by keys.

Most tests run against FakeEngine, which holds a real Processor (so values are validated and
combinations refused exactly as the engine does) and records every set() call. One test runs
the console model against a real Engine on a headless JACK server.

Where a check is against the outside world, the source is written beside it. Most checks here
are against the console's own documented rules (livedyn/console/model.py step_value, the help
text) and say so.
"""
from __future__ import annotations

import asyncio
import io
import math
import os
import shutil
import time

import numpy as np
import pytest

import livedyn
from livedyn import loader, presets
from livedyn.console import commands as cmds
from livedyn.console.model import (
    COARSE_FACTOR, FINE_FACTOR, LOG_FLOOR, RATIO_TOP, ConsoleModel, step_value,
)
from livedyn.params import ALL, OUTPUT_LEVEL, ParamError
from tests.waiting import stream_for

FS = 48000


class FakeEngine:
    """The Engine control surface over a real Processor, recording set() calls."""

    def __init__(self, algorithm="compressor", channels=2, key_channels=0, **params):
        self.proc = livedyn.Processor(loader.get(algorithm), FS, channels, key_channels,
                                      **params)
        self.calls = []
        self.seq = 0
        self.bypassed = self.muted = False
        self.monitored = "out"
        self.stopped = False
        self.snapshots = 0
        self.snap = {
            "peak_in_dbfs": [-12.0] * channels, "peak_out_dbfs": [-16.0] * channels,
            "peak_key_dbfs": [-30.0] * key_channels, "gain_reduction_db": 4.0,
            "callback_load": {"median": 0.015, "p99": 0.2, "max": 0.88}, "late_blocks": 3,
            "flagged_blocks": 1, "stream_latency_s": {"input": 0.0, "output": 0.00133},
            "lookahead_samples": 0, "samplerate": FS,
            "meters": {w: {"momentary_lufs": -18.2, "short_term_lufs": -19.0,
                           "true_peak_dbtp": [-3.1] * channels, "max_true_peak_dbtp": -1.2,
                           "peak_dbfs": [-12.0] * channels,
                           "peak_hold_dbfs": [-10.0] * channels,
                           "rms_dbfs": [-20.0] * channels} for w in ("in", "out")},
        }

    output_level = 0.0  # dB, the engine's own control (livedyn.params.OUTPUT_LEVEL)

    def set(self, name, value):
        if name == OUTPUT_LEVEL.name:
            self.output_level = OUTPUT_LEVEL.parse(value)
        else:
            self.proc.set(name, value)
        self.calls.append((name, value))
        self.seq += 1
        return self.seq

    def get(self, name):
        if name == OUTPUT_LEVEL.name:
            return self.output_level
        return self.proc.get(name)

    def wait_applied(self, seq, timeout=1.0):
        return 0

    def snapshot(self):
        self.snapshots += 1
        s = dict(self.snap)
        s.update(muted=self.muted, bypassed=self.bypassed, param_seq=self.seq)
        return s

    def load_preset(self, name_or_path):
        pr = presets.load(name_or_path)
        if pr.algorithm != self.proc.algorithm.name:
            raise ParamError(f"{name_or_path}: a {pr.algorithm} preset, but this engine runs "
                             f"the {self.proc.algorithm.name}")
        for n, v in pr.values.items():
            if self.get(n) != v:
                self.set(n, v)
        return pr

    def bypass(self, on=True):
        self.bypassed = bool(on)

    def mute(self, on=True):
        self.muted = bool(on)

    def monitor(self, mode):
        if mode not in ("out", "key", "delta"):
            raise ParamError(f"monitor {mode!r}: expected one of out, key, delta")
        self.monitored = mode

    def stop(self):
        self.stopped = True


def values_of(engine):
    return {n: engine.get(n) for n in engine.proc.schema.names()}


def assert_one_error_line(m, *words):
    assert m.status.kind == "error", m.status
    assert "\n" not in m.status.text and m.status.text.strip()
    for w in words:
        assert w in m.status.text, (w, m.status.text)


def test_model_and_commands_import_no_screen_library():
    import subprocess
    import sys

    code = ("import sys, livedyn.console.model, livedyn.console.commands; "
            "sys.exit(1 if any(k.startswith('prompt_toolkit') for k in sys.modules) else 0)")
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0


# ---------------------------------------------------------------------------------------------
# steps follow the taper (rules documented in livedyn.console.model.step_value)

def test_linear_steps_are_fixed_db():
    thr = ALL["threshold"]
    # documented rule: dB/dBFS step 0.5 dB small, 3 dB large
    assert step_value(thr, -20.0, +1) == -19.5
    assert step_value(thr, -20.0, -1) == -20.5
    assert step_value(thr, -20.0, +1, coarse=True) == -17.0
    assert step_value(thr, -1.0, +1, coarse=True) == 0.0  # clamped at the top of the range
    mix = ALL["mix"]
    assert step_value(mix, 50.0, -1) == 49.0 and step_value(mix, 50.0, +1, True) == 60.0
    la = ALL["lookahead"]  # linear ms: 0.1 and 1 ms, no float fuzz after three steps
    v = 0.0
    for _ in range(3):
        v = step_value(la, v, +1)
    assert v == 0.3


def test_log_steps_are_geometric_with_floor_and_off():
    att = ALL["attack"]
    v, seq = 10.0, [10.0]
    for _ in range(20):
        v = step_value(att, v, +1)
        seq.append(v)
    ratios = np.array(seq[1:]) / np.array(seq[:-1])
    # geometric: every ratio equals the factor up to the 4-digit rounding (5e-4 relative)
    assert np.allclose(ratios, FINE_FACTOR, rtol=1.2e-3)
    # 20 small steps = one decade (documented: 20 steps per decade)
    assert seq[-1] == pytest.approx(100.0, rel=2e-3)
    assert step_value(att, 10.0, +1, coarse=True) == pytest.approx(10 * COARSE_FACTOR, rel=5e-4)
    assert step_value(att, 10.0, -1) == pytest.approx(10 / FINE_FACTOR, rel=5e-4)
    # a range starting at 0: down from the floor gives 0, up from 0 gives the floor
    assert step_value(att, LOG_FLOOR, -1) == 0.0
    assert step_value(att, 0.0, +1) == LOG_FLOOR
    hpf = ALL["key_hpf"]  # a filter: below its lowest frequency it goes off, and back
    assert step_value(hpf, hpf.lo, -1) == hpf.off_value
    assert step_value(hpf, hpf.off_value, +1) == hpf.lo
    assert step_value(hpf, hpf.off_value, -1) == hpf.off_value
    assert step_value(ALL["release"], 5000.0, +1) == 5000.0  # top of range


def test_ratio_steps_are_geometric_in_slope_space_and_reach_inf():
    ratio = ALL["ratio"]
    r, seq = 1.0, [1.0]
    while not math.isinf(r) and len(seq) < 100:
        r = step_value(ratio, r, +1)
        seq.append(r)
    assert math.isinf(seq[-1])
    finite = np.array(seq[:-1])
    u = 1.0 / finite  # output slope 1 - s, with s = 1 - 1/ratio (livedyn.params.ratio_to_slope)
    s = np.array([livedyn.params.ratio_to_slope(x) for x in finite])
    assert np.allclose(1.0 - s, u)
    assert np.allclose(u[:-1] / u[1:], FINE_FACTOR, rtol=1.2e-3)  # geometric in slope space
    assert finite[-1] <= RATIO_TOP < finite[-1] * FINE_FACTOR * 1.001
    assert step_value(ratio, math.inf, -1) == RATIO_TOP
    assert step_value(ratio, 1.0, -1) == 1.0
    assert step_value(ratio, 4.0, +1) == pytest.approx(4 * FINE_FACTOR, rel=5e-4)
    assert step_value(ratio, 4.0, +1, True) == pytest.approx(4 * COARSE_FACTOR, rel=5e-4)


def test_choices_cycle_and_skip_what_is_refused():
    e = FakeEngine("compressor")
    m = ConsoleModel(e)
    m.select("detector")
    m.nudge(+1)
    assert e.calls[-1] == ("detector", 1.0) and e.get("detector") == 1.0
    m.nudge(+1)  # wraps around
    assert e.get("detector") == 0.0
    m.nudge(-1)
    assert e.get("detector") == 1.0
    # no key input: key external is refused by the processor, and there is no other choice
    m.select("key")
    n = len(e.calls)
    m.nudge(+1)
    assert_one_error_line(m, "key")
    assert e.get("key") == 0.0 and len(e.calls) == n
    # the limiter refuses link = mean: cycling from max goes to none and names the skip
    lim = FakeEngine("limiter")
    ml = ConsoleModel(lim)
    ml.select("link")
    ml.nudge(+1)
    assert lim.get("link") == 2.0 and "skipped mean" in ml.status.text


def test_nudges_call_set_with_taper_values():
    e = FakeEngine()
    m = ConsoleModel(e)
    m.select("threshold")
    m.nudge(+1)
    m.nudge(+1, coarse=True)
    m.move(+1)  # ratio
    m.nudge(+1)
    m.select("release")
    m.nudge(-1, coarse=True)
    assert e.calls == [("threshold", -19.5), ("threshold", -16.5),
                       ("ratio", pytest.approx(4 * FINE_FACTOR, rel=5e-4)),
                       ("release", pytest.approx(150 / COARSE_FACTOR, rel=5e-4))]
    m.run_command("threshold 0")
    n = len(e.calls)
    m.nudge(+1)  # at the top: a warning, no call
    assert len(e.calls) == n and m.status.kind == "warn" and "top" in m.status.text


# ---------------------------------------------------------------------------------------------
# commands

def test_commands_set_parameters():
    e = FakeEngine(key_channels=1)
    m = ConsoleModel(e)
    m.run_command("threshold -18")
    m.run_command("ratio 3:1")
    m.run_command("thr=-12.5")  # unique prefix and NAME=VALUE
    m.run_command("set knee 3 dB")
    m.run_command("key external")
    m.run_command("attack 7.5 ms")
    assert e.calls == [("threshold", -18.0), ("ratio", 3.0), ("threshold", -12.5),
                       ("knee", 3.0), ("key", 1.0), ("attack", 7.5)]
    assert m.param.name == "attack"  # the list follows the command
    assert m.status.kind == "info"
    m.run_command("bypass")
    assert e.bypassed and m.bypassed
    m.run_command("bypass off")
    assert not e.bypassed
    m.run_command("mute on")
    assert e.muted
    m.run_command("mute")
    assert not e.muted
    m.run_command("monitor delta")
    assert e.monitored == "delta" and m.monitor_mode == "delta"
    m.run_command("quit")
    assert m.quit_requested and not e.stopped


@pytest.mark.parametrize("line, words", [
    ("threshold -100", ["threshold", "out of range", "expected -80 to 0"]),
    ("ratio abc", ["ratio", "expected"]),
    ("ratio 0.5", ["ratio", "out of range"]),
    ("frobnicate 3", ["unknown command", "frobnicate", "load"]),
    ("k 3", ["could be", "knee", "key_hpf"]),
    ("monitor loud", ["monitor", "out|key|delta"]),
    ("slot c", ["slot", "a|b"]),
    ("threshold", ["threshold", "give a value"]),
    ("save", ["save", "missing"]),
    ("undo now", ["undo takes no argument"]),
    ("key external", ["key = external", "no key input"]),
    ("detector loud", ["detector", "peak, rms"]),
    ("load /nonexistent/x.toml", ["/nonexistent/x.toml", "no such file"]),
    ("match on", ["recent_input"]),
])
def test_bad_commands_give_one_line_and_change_nothing(line, words):
    e = FakeEngine()
    m = ConsoleModel(e)
    before = values_of(e)
    m.run_command(line)
    assert_one_error_line(m, *words)
    assert e.calls == [] and values_of(e) == before


def test_unexpected_engine_failure_is_one_status_line():
    e = FakeEngine()

    def broken(name, value):
        raise RuntimeError("device went away\nsecond line")

    e.set = broken
    m = ConsoleModel(e)
    m.run_command("threshold -10")
    assert_one_error_line(m, "RuntimeError", "device went away")
    m.nudge(+1)
    assert_one_error_line(m, "device went away")
    e.snapshot = lambda: 1 / 0
    m.tick()  # never raises
    assert_one_error_line(m, "meters", "ZeroDivisionError")


def test_limiter_has_no_key_or_makeup_commands():
    m = ConsoleModel(FakeEngine("limiter"))
    m.run_command("key main")
    assert_one_error_line(m, "no key input choice")
    m.engine.recent_input = lambda s: (np.zeros((FS * 4, 2), np.float32), None)
    m.run_command("match on")
    assert_one_error_line(m, "limiter", "makeup")


def test_completion_and_history():
    e = FakeEngine()
    m = ConsoleModel(e)
    assert m.complete("thr") == "threshold "
    assert m.complete("detector r") == "detector rms "
    assert m.complete("mon") == "monitor "
    line = m.complete("monitor ")
    assert line == "monitor " and set(m.status.text.split()) == {"out", "key", "delta"}
    assert m.complete("key_") == "key_"  # several fit: listed, common part kept
    assert {"key_hpf", "key_lpf", "key_bpf", "key_q"} <= set(m.status.text.split())
    assert m.complete("key_hpf o") == "key_hpf off "
    assert m.complete("ratio i") == "ratio inf "
    assert m.complete("sl") == "slot "
    m.run_command("knee 3")
    m.run_command("threshold -18")
    assert m.history_back("draft") == "threshold -18"
    assert m.history_back() == "knee 3"
    assert m.history_back() == "knee 3"
    assert m.history_forward() == "threshold -18"
    assert m.history_forward() == "draft"


def test_completion_of_files_and_preset_names(tmp_path, monkeypatch):
    pdir = tmp_path / "presets"
    pdir.mkdir()
    presets.save(presets.Preset("compressor", {"threshold": -30.0}), pdir / "soft-one.toml")
    presets.save(presets.Preset("gate", {"threshold": -50.0}), pdir / "other-gate.toml")
    monkeypatch.setenv(presets.ENV_DIR, str(pdir))
    (tmp_path / "mine.toml").write_text("x")
    (tmp_path / "sub").mkdir()
    monkeypatch.chdir(tmp_path)
    m = ConsoleModel(FakeEngine())
    assert m.complete("load so") == "load soft-one "  # a compressor preset for a compressor
    assert m.complete("load oth") == "load oth"  # the gate preset is not offered
    assert m.complete("load mi") == "load mine.toml "
    assert m.complete("load su") == "load sub/"
    assert m.complete("load presets/s") == "load presets/soft-one.toml "


# ---------------------------------------------------------------------------------------------
# slots and undo restore exact values

def test_slots_restore_exact_values():
    e = FakeEngine()
    m = ConsoleModel(e)
    m.run_command("threshold -18.37")
    m.run_command("ratio 3.71")
    m.select("attack")
    for _ in range(3):
        m.nudge(+1)
    a_vals = values_of(e)
    m.run_command("slot b")
    assert values_of(e) == m.slots["b"]
    m.run_command("threshold -31.13")
    m.run_command("ratio inf")
    m.run_command("detector rms")
    m.select("release")
    m.nudge(-1, coarse=True)
    b_vals = values_of(e)
    assert b_vals != a_vals
    for _ in range(3):
        m.run_command("compare")
        assert values_of(e) == a_vals  # exact, float for float
        m.compare()
        assert values_of(e) == b_vals
    m.run_command("slot a")
    assert values_of(e) == a_vals and m.active == "a"
    assert m.differs("threshold") and not m.differs("knee")


def test_slot_switch_orders_changes_the_processor_would_refuse():
    # slot A: key main + feedback topology; slot B: key external + feedforward. Setting B's
    # key first would be refused (livedyn.processor: feedback needs key = main).
    e = FakeEngine(key_channels=1)
    m = ConsoleModel(e)
    m.run_command("topology feedback")
    a_vals = values_of(e)
    m.run_command("slot b")
    m.run_command("topology feedforward")
    m.run_command("key external")
    b_vals = values_of(e)
    m.run_command("slot a")
    assert values_of(e) == a_vals
    m.run_command("slot b")
    assert values_of(e) == b_vals and m.status.kind == "info"


def test_undo_restores_exact_previous_values_per_slot(tmp_path):
    e = FakeEngine()
    m = ConsoleModel(e)
    states = [values_of(e)]
    for line in ("threshold -18.3", "ratio 5.5", "knee 1.25"):
        m.run_command(line)
        states.append(values_of(e))
    m.select("attack")
    m.nudge(+1)
    states.append(values_of(e))
    path = tmp_path / "p.toml"
    presets.save(presets.Preset("compressor", {"threshold": -40.0, "ratio": math.inf,
                                               "release": 333.3, "detector": 1.0}), path)
    m.run_command(f"load {path}")
    assert e.get("release") == 333.3 and e.get("knee") == 6.0  # left out: default
    states.append(values_of(e))
    m.run_command("slot b")
    m.run_command("threshold -50")
    m.run_command("undo")
    assert e.get("threshold") == states[0]["threshold"]
    m.run_command("undo")
    assert m.status.kind == "warn" and "nothing to undo on slot B" in m.status.text
    m.run_command("slot a")
    assert values_of(e) == states[-1]
    for want in reversed(states[:-1]):
        m.run_command("undo")
        assert values_of(e) == want
    m.run_command("undo")
    assert "nothing to undo" in m.status.text


def test_load_by_name_and_refused_preset(tmp_path, monkeypatch):
    monkeypatch.setenv(presets.ENV_DIR, str(tmp_path))
    presets.save(presets.Preset("compressor", {"threshold": -33.0}), tmp_path / "mine.toml")
    presets.save(presets.Preset("gate", {"threshold": -50.0}), tmp_path / "agate.toml")
    e = FakeEngine()
    m = ConsoleModel(e)
    m.run_command("load mine")
    assert e.get("threshold") == -33.0 and m.value("threshold") == -33.0
    before = values_of(e)
    m.run_command("load agate")
    assert_one_error_line(m, "gate preset", "compressor")
    assert values_of(e) == before
    m.run_command("load nothere")
    assert_one_error_line(m, "no preset named 'nothere'", "mine")


def test_save_is_atomic_and_a_failed_save_keeps_the_old_file(tmp_path, monkeypatch):
    e = FakeEngine()
    m = ConsoleModel(e)
    m.run_command("threshold -27.25")
    m.run_command("ratio 2.5")
    m.run_command(f"save {tmp_path / 'first'}")  # .toml is added
    path = tmp_path / "first.toml"
    assert m.status.kind == "info" and path.exists()
    back = presets.load(path)
    assert back.values == m.slots["a"]  # everything round-trips exactly
    old = path.read_bytes()
    m.run_command("threshold -10")

    def no_space(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", no_space)
    m.run_command(f"save {path}")
    assert m.question is not None and "exists" in m.status.text  # replacing asks first
    m.answer(True)
    monkeypatch.undo()
    assert_one_error_line(m, "first.toml", "No space left")
    assert path.read_bytes() == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["first.toml"]  # no temp file left
    m.run_command(f"save {tmp_path / 'nofolder' / 'x.toml'}")
    assert_one_error_line(m, "does not exist")


# ---------------------------------------------------------------------------------------------
# level-matched comparison

def programme(seconds, seed=7):
    """Loud and quiet quarter seconds of a tone plus noise, stereo (synthesised here)."""
    rng = np.random.default_rng(seed)
    n = int(seconds * FS)
    t = np.arange(n) / FS
    env = np.where((t * 4).astype(int) % 2 == 0, 10 ** (-6 / 20), 10 ** (-32 / 20))
    x = env * (0.5 * np.sin(2 * np.pi * 220 * t) + 0.25 * rng.standard_normal(n))
    return np.stack([x, 0.7 * x], 1).astype(np.float32)


def test_level_match_trims_the_louder_slot_by_the_bs1770_difference(tmp_path):
    pyloudnorm = pytest.importorskip("pyloudnorm")
    from livedyn.meters import integrated_loudness

    x = programme(5.0)
    e = FakeEngine()
    asked = []

    def recent_input(seconds):
        asked.append(seconds)
        return x[-int(seconds * FS):], None

    e.recent_input = recent_input
    m = ConsoleModel(e)
    m.run_command("ratio 2")
    m.run_command("threshold -20")
    m.run_command("makeup 1.5")
    m.run_command("slot b")
    m.run_command("ratio 8")
    m.run_command("threshold -34")
    m.run_command("match on")
    assert m.match and m.status.kind == "info", m.status
    seg = x[-int(asked[-1] * FS):]
    # reference: both settings rendered offline, measured with pyloudnorm (a BS.1770-4
    # implementation) and with livedyn.meters.integrated_loudness (cross-check)
    ref = {}
    for s, (ratio, thr, mk) in {"a": (2, -20, 1.5), "b": (8, -34, 0.0)}.items():
        y = livedyn.Processor("compressor", FS, 2, ratio=ratio, threshold=thr,
                              makeup=mk).process(seg)
        lp = pyloudnorm.Meter(FS).integrated_loudness(y.astype(np.float64))
        lm = integrated_loudness(y, FS)
        assert lm == pytest.approx(lp, abs=0.1)  # the two BS.1770 implementations agree
        ref[s] = lp
    diff = ref["a"] - ref["b"]
    assert diff > 3.0  # the slots really differ in loudness on this programme
    assert m.trims["a"] == pytest.approx(-diff, abs=0.5)
    assert m.trims["b"] == 0.0
    assert m.match_trim == 0.0  # on B, the quieter slot
    assert m.match_text() == f"level matched by 0.0 dB (slot A {m.trims['a']:+.1f} dB)"
    assert e.get("makeup") == 0.0
    m.run_command("slot a")
    assert m.match_trim == pytest.approx(-diff, abs=0.5)
    assert e.get("makeup") == pytest.approx(1.5 + m.trims["a"])  # applied as a makeup offset
    assert m.value("makeup") == 1.5  # the user's value is kept
    # the trimmed A render now measures like B (pyloudnorm), to 0.5 dB
    ya = livedyn.Processor("compressor", FS, 2, ratio=2, threshold=-20,
                           makeup=e.get("makeup")).process(seg)
    la = pyloudnorm.Meter(FS).integrated_loudness(ya.astype(np.float64))
    assert la == pytest.approx(ref["b"], abs=0.5)
    # shown clearly
    from livedyn.console.app import build_app, screen_text
    from prompt_toolkit.input import create_pipe_input
    from prompt_toolkit.output import DummyOutput

    with create_pipe_input() as inp:
        text = screen_text(build_app(e, input=inp, output=DummyOutput(), model=m), 100, 30)
    assert f"level matched by {m.match_trim:+.1f} dB" in text.splitlines()[0]
    # a save writes the user's makeup, not the trimmed one
    m.run_command(f"save {tmp_path / 'a.toml'}")
    assert presets.load(tmp_path / "a.toml").values["makeup"] == 1.5
    # switching off restores the exact makeup; A/B still restore exactly
    m.run_command("match off")
    assert e.get("makeup") == 1.5 and m.trims == {"a": 0.0, "b": 0.0}


def test_level_match_needs_enough_input_and_a_key_when_keyed():
    e = FakeEngine("ducker", key_channels=1)
    m = ConsoleModel(e)
    e.recent_input = lambda s: (np.zeros((FS // 4, 2), np.float32), None)
    m.run_command("match on")
    assert_one_error_line(m, "need at least")
    e.recent_input = lambda s: (programme(4.0), None)
    m.run_command("match on")
    assert_one_error_line(m, "key input is needed")
    e.recent_input = lambda s: (np.zeros((4 * FS, 2), np.float32), np.zeros((4 * FS, 1)))
    m.run_command("match on")
    assert_one_error_line(m, "below the -70 LUFS gate")  # BS.1770-4 absolute gate, -70 LUFS
    assert not m.match and e.get("makeup") == 0.0
    x = programme(4.0)
    e.recent_input = lambda s: (x, x[:, :1] * 2)
    m.run_command("match on")
    assert m.match and m.status.kind == "info", m.status


# ---------------------------------------------------------------------------------------------
# the screen

@pytest.fixture()
def pipe():
    from prompt_toolkit.input import create_pipe_input

    with create_pipe_input() as inp:
        yield inp


def render(engine, pipe, cols, rows, model=None, ticks=3):
    from prompt_toolkit.output import DummyOutput

    from livedyn.console.app import build_app, screen_text

    app = build_app(engine, input=pipe, output=DummyOutput(), model=model)
    for _ in range(ticks):
        app.console_model.tick()
    return app, screen_text(app, cols, rows)


def test_screen_80x24_shows_parameters_meters_and_curve(pipe):
    e = FakeEngine()
    app, text = render(e, pipe, 80, 24)
    lines = text.splitlines()
    assert len(lines) == 24 and max(len(s) for s in lines) <= 80
    assert "compressor" in lines[0] and "slot A" in lines[0]
    for name in ("threshold", "ratio", "knee", "attack"):
        assert name in text
    assert "-20 dBFS" in text and "4:1" in text
    for label in ("in  1", "in  2", "out 1", "out 2", "LUFS", "dBTP", "GR", "load", "late 3",
                  "flagged 1", "lookahead"):
        assert label in text, label
    assert "-12.0" in text and "-18.2" in text  # peak and momentary loudness from the snapshot
    assert "curve" in text and text.count("*") > 20 and "@" in text
    assert "hearing" in text  # the caution is the first status line


def test_screen_120x40_shows_every_parameter(pipe):
    e = FakeEngine()
    app, text = render(e, pipe, 120, 40)
    lines = text.splitlines()
    assert len(lines) == 40 and max(len(s) for s in lines) <= 120
    for name in e.proc.schema.names():
        assert f" {name} " in text or f">{name} " in text, name
    assert "feedforward" in text and "dBFS" in text
    assert "latency" in text  # the wide form of the stats line


def _curve_rows(text):
    return [ln for ln in text.splitlines() if "|" in ln and ln.count("|") >= 2]


def test_operating_point_moves_with_the_meters(pipe):
    e = FakeEngine()
    m = ConsoleModel(e, clock=lambda: 0.0)

    def at(pk_in, pk_out):
        e.snap["peak_in_dbfs"] = [pk_in, pk_in]
        e.snap["peak_out_dbfs"] = [pk_out, pk_out]
        m._point = {"x": None, "y": None, "key": None, "t": None}
        _, text = render(e, pipe, 120, 40, model=m, ticks=1)
        for row, ln in enumerate(text.splitlines()):
            if "@" in ln.replace("@ now", ""):
                return row, ln.replace("@ now", "").index("@")
        raise AssertionError("no operating point drawn")

    r1, c1 = at(-50.0, -50.0)
    r2, c2 = at(-6.0, -16.0)
    assert c2 > c1 and r2 < r1  # right and up: louder in, louder out
    assert m.operating_point() == (-6.0, -16.0)


def test_curve_follows_the_static_curve():
    # The curve is livedyn.analysis.theory_output_db of the live values. At 0 dBFS in, with a
    # -40 dBFS hard-knee threshold, the output is 0, -20 and -40 dBFS for ratios 1, 2 and inf
    # (Giannoulis et al. 2012, eq. 2): the '*' of the last column must sit on those rows.
    from livedyn.console.layout import draw_curve

    def last_column_star_row(ratio):
        m = ConsoleModel(FakeEngine(threshold=-40.0, ratio=ratio, knee=0.0))
        lines = ["".join(t for _, t in ln) for ln in draw_curve(m, 66, 33)]
        plot = lines[1:-1]  # title above, x axis below; y from 0 (top) to -60 dBFS (bottom)
        rows = [i for i, ln in enumerate(plot) if ln[-1] == "*"]
        assert rows, lines
        return min(rows), len(plot)

    for ratio, out_db in ((1.0, 0.0), (2.0, -20.0), (math.inf, -40.0)):
        row, h = last_column_star_row(ratio)
        assert row == round(-out_db / 60.0 * (h - 1)), (ratio, row)


def test_gain_reduction_strip_shows_recent_history():
    e = FakeEngine()
    t = [0.0]
    m = ConsoleModel(e, clock=lambda: t[0])
    for i in range(100):  # 5 s at 20 Hz: no reduction, then 12 dB in the last second
        e.snap["gain_reduction_db"] = 12.0 if i >= 80 else 0.0
        m.tick()
        t[0] += 0.05
    strip = m.gr_strip(50, 5.0)
    assert max(strip[:35]) == 0.0 and min(strip[-8:]) == 12.0
    t[0] += 0.4  # a late redraw: columns with no reading take the value before them
    e.snap["gain_reduction_db"] = 3.0
    m.tick()
    strip = m.gr_strip(50, 5.0)
    assert None not in strip and strip[-1] == 3.0 and strip[-2] == 12.0
    from livedyn.console.layout import draw_strip

    line = "".join(text for _, text in draw_strip(m, 70, 1)[0])
    assert "█" in line and "0-12 dB" in line


def test_garbage_meters_do_not_break_the_screen(pipe):
    e = FakeEngine()
    e.snap["meters"] = {"in": {"peak_dbfs": [None, "x"]}, "out": None}
    e.snap["callback_load"] = None
    e.snap["peak_key_dbfs"] = [float("nan")]
    app, text = render(e, pipe, 80, 24)
    assert "threshold" in text  # the parameter list still draws
    for cols, rows in ((30, 8), (12, 3), (200, 60)):
        from livedyn.console.app import screen_text

        screen_text(app, cols, rows)


def test_help_lists_every_command_key_and_the_cautions(pipe):
    e = FakeEngine()
    m = ConsoleModel(e)
    text = "\n".join(m.help_lines())
    for verb in cmds.VERBS:
        assert f"  {verb}" in text, verb
    for key, _ in cmds.LIST_KEYS + cmds.CMD_KEYS:
        assert key in text
    for name in e.proc.schema.names():
        assert f"  {name}" in text
    assert "damage hearing" in text and "feedback" in text and "venue" in text
    assert "level matched by X dB" in text
    m.run_command("help")
    assert m.view == "help"
    _, screen = render(e, pipe, 80, 24, model=m)
    assert "Monitoring cautions" in screen and "more lines" in screen


# ---------------------------------------------------------------------------------------------
# the Application, driven by keys through a pipe

UP, DOWN, RIGHT, LEFT = "\x1b[A", "\x1b[B", "\x1b[C", "\x1b[D"
S_RIGHT, PGUP, PGDN, TAB, F2 = "\x1b[1;2C", "\x1b[5~", "\x1b[6~", "\t", "\x1bOQ"


def drive(engine, steps, size=(24, 80), model=None, timeout=20.0, **app_args):
    """Run the Application on a pipe; ``steps`` is a list of text to send or callables
    (called with the app, e.g. to resize). Returns (app, output text, screens)."""
    from prompt_toolkit.data_structures import Size
    from prompt_toolkit.input import create_pipe_input
    from prompt_toolkit.output.vt100 import Vt100_Output

    from livedyn.console.app import build_app, screen_to_text

    cur = list(size)
    buf = io.StringIO()
    out = Vt100_Output(buf, lambda: Size(rows=cur[0], columns=cur[1]), term="xterm")
    screens = []
    with create_pipe_input() as inp:
        app = build_app(engine, input=inp, output=out, model=model, **app_args)

        async def feed():
            await asyncio.sleep(0.15)
            for s in steps:
                if callable(s):
                    s(app, cur)
                else:
                    inp.send_text(s)
                # a lone Esc is told from an Esc sequence by a 50 ms pause (app.ttimeoutlen)
                await asyncio.sleep(0.2 if not callable(s) and s.endswith("\x1b") else 0.06)
                scr = app.renderer.last_rendered_screen
                if scr is not None:
                    screens.append(screen_to_text(scr, cur[1], cur[0]))

        async def main():
            task = asyncio.ensure_future(feed())
            await asyncio.wait_for(app.run_async(), timeout)
            await task

        asyncio.run(main())
    return app, buf.getvalue(), screens


def test_keys_drive_the_console():
    e = FakeEngine()
    app, _, _ = drive(e, [RIGHT, S_RIGHT, DOWN, RIGHT, DOWN, LEFT, PGUP, PGDN, PGDN, UP, UP,
                          "q", "q"])  # while sound plays, quitting asks: q again
    assert e.calls == [("threshold", -19.5), ("threshold", -16.5),
                       ("ratio", pytest.approx(4 * FINE_FACTOR, rel=5e-4)),
                       ("knee", 5.5), ("knee", 8.5), ("knee", 5.5), ("knee", 2.5)]
    assert app.console_model.param.name == "threshold"
    assert not e.stopped  # quitting stops nothing


def test_typed_values_commands_completion_and_history():
    e = FakeEngine()
    steps = [DOWN, "\r", "3:1\r",  # Enter on ratio, type a value
             ":", "thr", TAB, "-18\r",  # Tab completes the name
             ":knee 2\r", ":knee 4\r", ":", UP, UP, "\r",  # history: knee 2 again
             ":monitor nonsense\r",  # a bad command: one status line, app keeps running
             "b", "m", "c", "c", "u",
             F2,  # mute again, from anywhere
             ":quit\r"]
    app, _, screens = drive(e, steps)
    m = app.console_model
    assert e.calls[:5] == [("ratio", 3.0), ("threshold", -18.0), ("knee", 2.0), ("knee", 4.0),
                           ("knee", 2.0)]
    assert any("monitor 'nonsense'" in s for s in screens)
    assert e.bypassed and e.muted is False and m.active == "a"  # b, m, c, c, F2
    assert e.get("knee") == 4.0  # u undid the last change on A (knee 4 -> 2 from history)
    assert e.get("ratio") == 3.0 and e.get("threshold") == -18.0
    assert m.quit_requested and not e.stopped


def test_escape_help_and_resize_redraw():
    e = FakeEngine()

    def resize(rows, cols):
        def go(app, cur):
            cur[:] = [rows, cols]
            app._on_resize()  # what SIGWINCH triggers
        return go

    steps = [":thr", "\x1b", "?", PGDN, "\x1b", resize(40, 120), resize(20, 60), resize(24, 80),
             "q", "q"]
    app, _, screens = drive(e, steps)
    assert e.calls == []  # Esc cancelled the typed command
    assert any("Monitoring cautions" in s for s in screens)
    widths = {max(len(x) for x in s.splitlines()) for s in screens if s}
    assert any(w > 100 for w in widths) and any(w <= 60 for w in widths)
    big = [s for s in screens if max(len(x) for x in s.splitlines()) > 100][-1]
    assert " link " in big and "dBTP" in big and "@" in big  # all parameters fit at 120x40
    assert app.console_model.view == "list"


def test_meters_refresh_at_20_hz_or_more():
    e = FakeEngine()
    from livedyn.console.app import REFRESH_HZ

    assert REFRESH_HZ >= 20
    ran = []
    drive(e, [lambda app, cur: ran.append(time.monotonic())] * 10 + ["q", "q"])
    # a ratio measured here: snapshots read against the refresh rate times the time the app
    # ran (first to last step), at least half of it on a busy 2-core machine
    assert e.snapshots >= 0.5 * REFRESH_HZ * (ran[-1] - ran[0]) and e.snapshots > 0


def test_quit_after_and_problems_from_check():
    e = FakeEngine()
    problem = []
    app, _, screens = drive(e, [lambda app, cur: problem.append("the JACK server stopped")] +
                            [lambda app, cur: None] * 4, quit_after=0.6,
                            check=lambda: problem[0] if problem else None)
    m = app.console_model
    assert m.quit_requested and not e.stopped  # left by itself, stopped nothing
    assert any("the JACK server stopped (quit with q)" in s for s in screens)


# ---------------------------------------------------------------------------------------------
# a real engine on a headless JACK server

def test_model_on_a_real_engine():
    if shutil.which("jackd") is None:
        pytest.skip("jackd is not installed (DEVELOPERS.md, Real time without a soundcard)")
    from livedyn.engine import stream as st
    from livedyn.engine.engine import ArraySource, Engine
    from livedyn.engine.jackserver import JackServer

    server = JackServer(FS, 64, capture=2, playback=2).start()
    st.reinitialise()
    eng = None
    try:
        t = np.arange(2 * FS) / FS
        x = np.repeat((0.5 * np.sin(2 * np.pi * 440 * t)).astype(np.float32)[:, None], 2, 1)
        proc = livedyn.Processor("compressor", FS, 2, threshold=-20, knee=0)
        eng = Engine(proc, 64, device="system", main_source=ArraySource(x, loop=True))
        eng.start()
        m = ConsoleModel(eng)
        m.run_command("threshold -30")
        assert eng.wait_applied(m.last_seq) is not None
        m.run_command("slot b")
        m.run_command("ratio 2")
        m.run_command("compare")
        assert eng.get("ratio") == 4.0 and eng.get("threshold") == -30.0
        stream_for(eng, 0.4)
        m.tick()
        # a -6 dBFS sine (AES17 sine reference) against -30 dBFS at 4:1, hard knee: 18 dB of
        # reduction on the static curve (Giannoulis et al. 2012, eq. 2); ballistics take some
        assert 14.0 < m.snap["gain_reduction_db"] < 19.0
        assert m.snap["meters"]["in"]["momentary_lufs"] > -12.0
        stream_for(eng, 1.2)
        m.tick()
        m.run_command("match on")  # measured on the engine's recent input
        assert m.status.kind != "error", m.status
        assert eng.alive()
    finally:
        if eng is not None:
            eng.stop()
        st.terminate()
        server.stop()


def test_a_swapped_in_version_and_its_notices_reach_the_console(tmp_path):
    """With --watch the engine swaps in a new version of a file (maybe with new parameters) and
    posts one-line notices; the console shows them and lists the new version's parameters."""
    v1 = tmp_path / "mine.py"
    v1.write_text("PARAMS = ['threshold', 'attack', 'release']\n"
                  "def gain_curve(x, p):\n    return min(0.0, p[P.threshold] - x)\n")
    e = FakeEngine(str(v1), threshold=-25)
    e.notices = []
    e.take_notices = lambda: [e.notices.pop(0)] if e.notices else []
    m = ConsoleModel(e)
    assert "depth" not in m.names
    v2 = tmp_path / "mine2.py"
    v2.write_text("PARAMS = ['threshold', 'attack', 'release', Param('depth', 'dB', 0, 30, 9)]\n"
                  "def gain_curve(x, p):\n    return max(-p[P.depth], min(0.0, p[P.threshold] - x))\n")
    new = livedyn.Processor(livedyn.load_algorithm(v2), FS, 2, threshold=-25)
    e.proc = new
    e.notices.append(("info", "mine.py: version 2 running (loaded, checked and swapped in)"))
    m.tick()
    assert "version 2 running" in m.status.text and m.status.kind == "info"
    assert "depth" in m.names and m.schema is new.schema
    assert m.value("threshold") == -25
    m.run_command("depth 12")
    assert e.calls[-1] == ("depth", 12.0)
    e.notices.append(("error", "mine.py:3: syntax error: invalid syntax -- still running the "
                               "previous version"))
    m.tick()
    assert_one_error_line(m, "mine.py:3", "still running the previous version")


def test_save_from_a_user_file_writes_a_preset_naming_the_file(tmp_path):
    from livedyn import presets as pr_mod

    f = tmp_path / "algos" / "mine.py"
    f.parent.mkdir()
    f.write_text("PARAMS = ['threshold', 'attack', 'release']\n"
                 "def gain_curve(x, p):\n    return min(0.0, p[P.threshold] - x)\n")
    e = FakeEngine(str(f), threshold=-31)
    m = ConsoleModel(e)
    m.run_command(f"save {tmp_path / 'mine-preset'}")
    assert m.status.kind == "info", m.status
    back = pr_mod.load(tmp_path / "mine-preset.toml")
    assert back.algorithm_file == f.resolve()
    assert back.values["threshold"] == -31
    text = (tmp_path / "mine-preset.toml").read_text()
    assert 'algorithm_file = "algos/mine.py"' in text  # relative to the preset's folder


def test_curve_of_a_user_gain_curve_follows_the_files_equation(tmp_path, pipe):
    from livedyn.analysis import theory_output_db

    f = tmp_path / "half.py"
    f.write_text("PARAMS = ['threshold', 'attack', 'release']\n"
                 "def gain_curve(x, p):\n    return min(0.0, 0.5 * (p[P.threshold] - x))\n")
    e = FakeEngine(str(f), threshold=-30)
    m = ConsoleModel(e)
    m.run_command("threshold -20")
    # the curve the console draws: 10 dB over the (new) threshold -> 5 dB of reduction
    assert theory_output_db(m.curve_view(), -10.0) == pytest.approx(-15.0)
    _, text = render(e, pipe, 120, 40, model=m)
    assert "panel error" not in text and "curve" in text.lower()

"""The console as a show runs it, at 80x24 and 120x40 through prompt_toolkit's pipe input:
quit asks while sound plays, a long message read back whole from the log, MIDI learn, the
output level, save/load by bare name into the user folder. Checks are against the console's
own documented rules (README "The console", livedyn/console/*.py docstrings)."""
from __future__ import annotations

import pytest

from livedyn import presets
from livedyn.control.hub import Controls
from livedyn.control.midi import MidiControl
from livedyn.console.model import ConsoleModel

from tests.test_console import FakeEngine, drive


@pytest.mark.parametrize("size", [(24, 80), (40, 120)])
def test_quit_asks_then_a_second_q_leaves(size):
    e = FakeEngine()
    m = ConsoleModel(e)
    screens_asked = []
    app, _, screens = drive(e, ["q", lambda app, cur: screens_asked.append(m.question), "b", "b",
                                "q", "q"], size=size, model=m)
    assert screens_asked[0] is not None and screens_asked[0][0] == "quit"
    assert any("press q (or Ctrl+C) again" in s.replace("\n", " ") or "press q" in s
               for s in screens)
    assert any("not quitting" in text for _, _, text, _ in m.log.entries)  # b said no (and toggled bypass)
    assert m.quit_requested and not e.stopped


def test_ctrl_c_asks_like_q():
    e = FakeEngine()
    app, _, _ = drive(e, ["\x03", "\x03"])
    assert app.console_model.quit_requested


def test_a_stray_key_says_no_so_a_later_q_asks_again():
    e = FakeEngine()
    m = ConsoleModel(e)
    asked = []
    app, _, _ = drive(e, ["\x03", "x", lambda a, c: asked.append(m.question), "q",
                          lambda a, c: asked.append(m.question), "q"], model=m)
    assert asked[0] is None and asked[1] is not None  # x said no; the next q asked again
    assert any("not quitting" in t for _, _, t, _ in m.log.entries)
    assert m.quit_requested


@pytest.mark.parametrize("size", [(24, 80), (40, 120)])
def test_a_long_message_is_whole_on_screen_and_in_the_log(size):
    e = FakeEngine()
    m = ConsoleModel(e)
    app, _, screens = drive(e, [":xyz\r", "l", "\x1b", ":quit\r"], size=size, model=m)
    msg = [t for _, k, t, _ in m.log.entries if t.startswith("unknown command 'xyz'")][0]
    assert msg.endswith("type help")  # the whole message, as raised
    flat = [" ".join(s.split()) for s in screens]
    assert any(" ".join(msg.split()) in f for f in flat)  # wrapped, never cut
    assert any("message log" in s for s in screens)


def test_output_level_keys_command_and_fader():
    e = FakeEngine()
    m = ConsoleModel(e)
    app, _, screens = drive(e, ["-", "-", "+", ":output -30\r", ":quit\r"], model=m)
    assert [c for c in e.calls if c[0] == "output_level"] == \
        [("output_level", -1.0), ("output_level", -2.0), ("output_level", -1.0),
         ("output_level", -30.0)]
    assert any("output level" in s and "-30 dB" in s for s in screens)
    m.run_command("output off")
    assert e.output_level == float("-inf")
    m.run_command("output 3")
    assert m.status.kind == "error" and "output_level" in m.status.text


def test_learn_from_the_console_maps_a_control_and_shows_it():
    e = FakeEngine()
    e.fs, e.blocksize = 48000, 64
    controls = Controls(e)
    midi = MidiControl(controls)
    m = ConsoleModel(e, controls=controls)
    controls.attach_console()

    def move_knob(app, cur):
        midi.feed([0xB0, 74, 30])
        controls.flush()

    def turn_knob(app, cur):  # past the value (soft takeover), to a value with decimals
        midi.feed([0xB0, 74, 100])
        midi.feed([0xB0, 74, 90])
        controls.flush()
        controls.take_for_console()  # (the console's tick reads them too)
        m.slots[m.active]["threshold"] = e.get("threshold")

    app, _, screens = drive(e, ["L", move_knob, lambda a, c: None, turn_knob, "", ":quit\r"],
                            model=m)
    assert midi.label("threshold") == "cc74/1"
    assert e.get("threshold") == pytest.approx(-80 + 80 * 90 / 127)
    assert any("cc74" in s for s in screens)  # beside the parameter
    # a long value (-23.3071 dBFS) at 80x24 still has its label beside it
    assert any(">threshold" in s and "-23.3071 ~cc74/1" in s for s in screens), screens[-2]
    assert any("now drives threshold" in t for _, _, t, _ in m.log.entries)


def test_save_and_load_by_bare_name_and_replacing_asks():
    e = FakeEngine()
    m = ConsoleModel(e)
    m.run_command("threshold -31")
    m.run_command("save mine")
    path = presets.user_presets_dir() / "mine.toml"
    assert path.exists() and m.status.kind == "info", m.status
    m.run_command("threshold -10")
    m.run_command("load mine")
    assert e.get("threshold") == -31.0
    m.run_command("threshold -12")
    m.run_command("save mine")
    assert m.question is not None and "press y" in m.status.text
    m.answer(False)
    assert presets.load("mine").values["threshold"] == -31.0  # kept
    m.run_command("save mine")
    m.answer(True)
    assert presets.load("mine").values["threshold"] == -12.0
    shipped = presets.list_presets(presets.presets_dir())[0][0]
    m.run_command(f"save {presets.presets_dir() / (shipped + '.toml')}")
    assert m.status.kind == "error" and "shipped" in m.status.text


@pytest.mark.parametrize("size", [(24, 80), (40, 120)])
def test_a_test_source_switched_from_the_command_line(size):
    from livedyn.control.sources import TestSource
    from livedyn.engine.engine import ArraySource
    import numpy as np

    e = FakeEngine()
    e.main_source = TestSource(48000, 2, inner=ArraySource(np.zeros((4800, 2), np.float32)))
    m = ConsoleModel(e)
    app, _, screens = drive(e, [":source main tone 440 -18\r", ":source main tone 440 0\r",
                                ":source main pink\r", ":source key tone\r",
                                ":source main input\r", ":quit\r"], size=size, model=m)
    texts = [t for _, _, t, _ in m.log.entries]
    assert any(t.startswith("main input: tone 440 Hz at -18 dBFS") for t in texts)
    assert any("above the test sources' limit, expected at most -6 dBFS" in t for t in texts)
    assert any("main input: pink noise" in t for t in texts)
    assert any("the key input is not a test source" in t for t in texts)
    assert e.main_source.kind == "input"
    flat = [" ".join(s.split()) for s in screens]
    assert any("tone 440 Hz at -18 dBFS" in f for f in flat)

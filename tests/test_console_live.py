"""The console with real transports, through prompt_toolkit's pipe input: the algorithm
changed from the command line on a running Engine (a built-in name and an algorithm file),
a MIDI action reaching the console's model, and the MIDI input port changed from the console
on a headless JACK server. Checks are against the console's own documented rules (README
"The console", "MIDI control"; livedyn/console/model.py)."""
from __future__ import annotations

import shutil
import time
from pathlib import Path

import numpy as np
import pytest

import livedyn
from livedyn.console.model import ConsoleModel
from livedyn.control.hub import Controls
from livedyn.control.midi import Mapping, MidiControl

from tests.test_console import FakeEngine, drive

FS = 48000
EXAMPLE = Path(livedyn.__file__).parent / "examples" / "program_release.py"


def _wait(cond, timeout=5.0):
    t_end = time.monotonic() + timeout
    while time.monotonic() < t_end:
        if cond():
            return True
        time.sleep(0.005)
    return False


def test_a_midi_action_reaches_the_console_model():
    e = FakeEngine()
    c = Controls(e, period_s=0.001).start()
    midi = MidiControl(c, mappings=[Mapping("slot", "note", 1, 60), Mapping("mute", "note", 1, 61),
                                    Mapping("threshold", "cc", 1, 21)])
    m = ConsoleModel(e, controls=c)
    seen = {}

    def press(note):
        return lambda app, cur: (midi.feed([0x90, note, 100]), midi.feed([0x80, note, 0]))

    def look(app, cur):
        seen["slot"], seen["muted"] = m.active, m.muted

    def wait_for(cond):
        return lambda app, cur: _wait(cond, 2.0)

    try:
        app, _, screens = drive(e, [press(60), press(61), "", "", look,
                                    lambda app, cur: midi.feed([0xB0, 21, 95]),  # near -20: taken
                                    wait_for(lambda: e.get("threshold") != -20.0), "", "",
                                    ":quit\r"], model=m, controls=c)
    finally:
        c.stop()
    assert seen == {"slot": "b", "muted": True}
    assert e.muted
    want = -80 + 80 * 95 / 127  # README: a control follows the taper (linear over -80..0 dB)
    assert e.get("threshold") == pytest.approx(want)
    assert m.value("threshold") == pytest.approx(want)  # shown in the active slot
    assert any("slot B" in s and "MUTED" in s for s in screens)


@pytest.mark.jack(capture=2, playback=2)
def test_the_midi_port_changed_from_the_console(jack_server):
    if shutil.which("jackd") is None:
        pytest.skip("jackd not installed")
    import rtmidi

    outs = []
    for name in ("desk-left", "desk-right"):
        o = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, name=name)
        o.open_virtual_port(name)
        outs.append(o)
    e = FakeEngine()
    c = Controls(e, period_s=0.001).start()
    m = ConsoleModel(e, controls=c)

    def send(i, msg):
        return lambda app, cur: outs[i].send_message(msg)

    def wait_for(cond):
        return lambda app, cur: _wait(cond, 3.0)

    try:
        app, _, screens = drive(e, [
            ":midi\r", ":midi desk-left\r", wait_for(lambda: c.midi is not None),
            ":learn threshold\r", send(0, [0xB0, 40, 96]),
            wait_for(lambda: c.midi.label("threshold") == "cc40/1"), "",
            ":midi desk-right\r", wait_for(lambda: "desk-right" in (c.midi.port_name or "")),
            send(1, [0xB0, 40, 96]), send(1, [0xB0, 40, 64]),  # takes over, then -40 dB
            wait_for(lambda: e.get("threshold") == pytest.approx(-80 + 80 * 64 / 127)), "",
            ":midi nosuch\r", ":midi off\r", ":quit\r"], model=m, controls=c, timeout=30)
    finally:
        c.stop()
        for o in outs:
            o.close_port()
            o.delete()
    texts = [t for _, _, t, _ in m.log.entries]
    listed = [t for t in texts if t.startswith("MIDI inputs:")][0]
    assert "desk-left" in listed and "desk-right" in listed and "reading: none" in listed
    assert any(t.startswith("MIDI: reading") and "desk-left" in t for t in texts)
    assert any("now drives threshold" in t for t in texts)
    assert any("desk-right" in t and "(1 mapping kept)" in t for t in texts)
    assert e.get("threshold") == pytest.approx(-80 + 80 * 64 / 127)
    assert any(t.startswith("midi nosuch: matches no MIDI input port") for t in texts)
    assert any(t.startswith("MIDI: stopped reading") for t in texts) and c.midi is None
    flat = [" ".join(s.split()) for s in screens]
    assert any("~cc40/1" in f for f in flat)  # the mapping beside the parameter


def _console_on_a_compressor(keys, seed):
    """Type ``keys`` into the console of a running compressor (threshold -30) on the system
    device; returns the model, the stopped engine and the screens."""
    if shutil.which("jackd") is None:
        pytest.skip("jackd not installed")
    from livedyn.engine import callback as cb
    from livedyn.engine.engine import ArraySource, Engine

    rng = np.random.default_rng(seed)
    music = (0.1 * rng.standard_normal((FS, 2))).astype(np.float32)
    eng = Engine(livedyn.Processor("compressor", FS, 2, threshold=-30), 64, device="system",
                 main_source=ArraySource(music, loop=True))
    eng.start()
    m = ConsoleModel(eng)
    try:
        assert _wait(lambda: eng.stats[cb.S_BLOCKS] > 20)
        _, _, screens = drive(eng, keys, model=m, timeout=60)
    finally:
        eng.stop()
    return m, eng, screens


@pytest.mark.jack(capture=2, playback=2)
def test_the_algorithm_changed_from_the_console_by_name_and_by_file(jack_server):
    m, eng, screens = _console_on_a_compressor(
        [":algorithm limiter\r", "", ":algorithm nosuch\r", f":algorithm {EXAMPLE}\r", "",
         ":quit\r"], seed=8)
    texts = [t for _, _, t, _ in m.log.entries]
    assert any(t.startswith("algorithm limiter crossfaded in (was compressor)") for t in texts)
    assert any("nosuch" in t for _, k, t, _ in m.log.entries if k == "error")
    alg = eng.proc.algorithm
    assert alg.source is not None and Path(alg.source).resolve() == EXAMPLE.resolve()
    assert any(t.startswith(f"algorithm {alg.name} crossfaded in (was limiter)") for t in texts)
    assert [s["algorithm"] for s in eng.swap_log] == ["limiter", alg.name]
    assert "release_fast" in m.names  # the console took the file's parameters
    flat = [" ".join(s.split()) for s in screens]
    assert any("release_fast" in f for f in flat)


@pytest.mark.jack(capture=2, playback=2)
def test_the_precision_changed_from_the_console(jack_server):
    """README "Precision": `precision float32` at the console is a crossfaded swap of the
    running algorithm; the title says (float32); a wrong word is one line."""
    m, eng, screens = _console_on_a_compressor(
        [":precision float32\r", "", ":precision half\r", ":precision float32\r", "",
         ":quit\r"], seed=9)
    texts = [t for _, _, t, _ in m.log.entries]
    assert any(t.startswith("precision float32 crossfaded in (was float64)") for t in texts)
    assert any(t == "precision: already float32" for t in texts)
    errors = [t for _, k, t, _ in m.log.entries if k == "error"]
    assert any("half" in t for t in errors), errors
    assert eng.proc.precision == "float32" and eng.get("threshold") == -30.0
    assert [s["precision"] for s in eng.swap_log] == ["float32"]
    flat = [" ".join(s.split()) for s in screens]
    assert any("compressor (float32)" in f for f in flat)

"""The device and channel picker (livedyn.console.picker) on a headless JACK server through
prompt_toolkit's pipe input at 80x24 and 120x40: devices with channel counts and default rates,
a live meter per input channel (a 0.25-amplitude tone patched into two of the four inputs
reads 20 log10 0.25 = -12.04 dBFS, silence elsewhere), main and key channels chosen, the
choice written to the XDG configuration folder and preselected the next time, and
``run --picked`` taking it. Checks are against the picker's documented rules (its module
docstring, README "Choosing devices and channels")."""
from __future__ import annotations

import argparse
import asyncio
import io
import math
import shutil
import time

import numpy as np
import pytest

from livedyn.console.picker import (DeviceChoice, PickerError, PickerModel, build_picker_app,
                                    config_path, load_choice, save_choice)

DOWN, ENTER, ESC = "\x1b[B", "\r", "\x1b"


def run_picker(model, steps, size):
    from prompt_toolkit.data_structures import Size
    from prompt_toolkit.input import create_pipe_input
    from prompt_toolkit.output.vt100 import Vt100_Output

    from livedyn.console.app import screen_to_text

    out = Vt100_Output(io.StringIO(), lambda: Size(rows=size[0], columns=size[1]), term="xterm")
    screens = []
    with create_pipe_input() as inp:
        app = build_picker_app(model, input=inp, output=out, refresh_hz=20)

        async def feed():
            await asyncio.sleep(0.15)
            for s in steps:
                if callable(s):
                    s()
                else:
                    inp.send_text(s)
                await asyncio.sleep(0.25 if s == ESC else 0.08)
                scr = app.renderer.last_rendered_screen
                if scr is not None:
                    screens.append(screen_to_text(scr, size[1], size[0]))
                if model.done:
                    return

        async def main():
            task = asyncio.ensure_future(feed())
            await asyncio.wait_for(app.run_async(), 20)
            await task

        asyncio.run(main())
    return screens


@pytest.mark.parametrize("size", [(24, 80), (40, 120)])
@pytest.mark.jack(capture=4, playback=2)
def test_pick_devices_and_channels_with_meters_on_the_headless_server(jack_server, size):
    if shutil.which("jackd") is None:
        pytest.skip("jackd not installed")
    from livedyn.engine import stream as st

    devices = st.list_devices()
    model = PickerModel(devices)
    jack = [i for i, d in enumerate(model.inputs) if d["name"] == "system"][0]
    sd = st._sd()
    tone = {}

    def patch_a_tone():  # a stream of this process plays a tone into inputs 1 and 2
        ph = [0]

        def cb(out, frames, t, status):
            n = np.arange(frames) + ph[0]
            ph[0] += frames
            out[:] = (0.25 * np.sin(2 * np.pi * 1000 * n / 48000))[:, None]

        o = sd.OutputStream(device=model.input_dev["index"], channels=2, samplerate=48000,
                            callback=cb)
        o.start()
        time.sleep(0.2)
        jack_server.loopback()
        tone["stream"] = o
        t_end = time.monotonic() + 3
        while time.monotonic() < t_end and math.isinf(model.meter.levels[0]):
            time.sleep(0.02)
        time.sleep(0.3)
        tone["levels"] = list(model.meter.levels)

    try:
        screens = run_picker(model, [DOWN] * jack + [ENTER, ENTER, patch_a_tone, "", DOWN, DOWN,
                                                     "k", DOWN, "m", ENTER], size)
    finally:
        if "stream" in tone:
            tone["stream"].stop()
            tone["stream"].close()
    lv = tone["levels"]
    print("meters:", lv)
    assert lv[0] == pytest.approx(20 * math.log10(0.25), abs=0.05)
    assert lv[1] == pytest.approx(20 * math.log10(0.25), abs=0.05)
    assert math.isinf(lv[2]) and math.isinf(lv[3])  # the dummy capture ports are silent
    flat = [" ".join(s.split()) for s in screens]
    assert any("system JACK Audio Connect 4 2 48000" in f for f in flat)  # counts, rate
    assert any("in 1 main -12.0 dBFS |#" in f for f in flat)
    assert any("in 3 silent" in f or "in 3 key silent" in f for f in flat)
    c = model.choice
    assert c == DeviceChoice("system", "system", 48000.0, [1, 2, 4], [3])
    assert model.meter is None  # closed once chosen
    path = save_choice(c)
    import os

    assert path == config_path() == \
        __import__("pathlib").Path(os.environ["XDG_CONFIG_HOME"]) / "livedyn" / "devices.toml"
    again = PickerModel(devices, load_choice())
    assert again.cursor == jack  # preselected
    run_picker(again, [ENTER, ENTER, ENTER], size)
    assert again.choice == c


def test_picker_model_rules_and_the_config_file(tmp_path):
    devs = [{"index": 0, "name": "card", "hostapi": "ALSA", "inputs": 2, "outputs": 2,
             "samplerate": 44100.0},
            {"index": 1, "name": "speakers", "hostapi": "ALSA", "inputs": 0, "outputs": 8,
             "samplerate": 48000.0}]

    class NoMeter:
        levels = [-math.inf, -20.0]

        def close(self):
            pass

    m = PickerModel(devs, open_meter=lambda d: NoMeter())
    assert [d["name"] for d in m.inputs] == ["card"] and len(m.outputs) == 2
    m.enter()
    m.move(+1)
    m.enter()
    assert m.output_dev["name"] == "speakers" and m.main == [1, 2]
    m.toggle("main")
    m.move(+1)
    m.toggle("main")
    m.enter()
    assert not m.done and "at least one main" in m.message  # nothing chosen as main
    m.back()
    assert m.step == "output" and m.meter is None
    bad = tmp_path / "devices.toml"
    bad.write_text("devices_format = 9\n")
    with pytest.raises(PickerError, match="devices_format = 9"):
        load_choice(bad)
    with pytest.raises(PickerError, match="no input or no output"):
        PickerModel([devs[1]])


def test_run_picked_takes_the_remembered_choice(capsys):
    from livedyn import cli

    ns = argparse.Namespace(picked=True, headless=False, device=None, input_device=None,
                            output_device=None, main_inputs=None, key_inputs=None)
    with pytest.raises(cli.CliError, match="no device choice"):
        cli._apply_picked(ns)
    save_choice(DeviceChoice("card", "speakers", 48000, [1], [2]))
    cli._apply_picked(ns)
    assert (ns.input_device, ns.output_device, ns.main_inputs, ns.key_inputs) == \
        ("card", "speakers", "1", "2")
    ns2 = argparse.Namespace(picked=True, headless=True, device=None, input_device=None,
                             output_device=None, main_inputs="3", key_inputs=None)
    cli._apply_picked(ns2)  # headless: its own device; the command line wins
    assert (ns2.input_device, ns2.main_inputs, ns2.key_inputs) == (None, "3", "2")

"""The device and channel picker (``livedyn pick``): choose the input and output devices and
which input channels are the main and the key input, watching a meter per input channel
before any processor runs; the choice is remembered in the user's configuration folder and
``livedyn run --picked`` uses it.

Steps: the input device (a list with host API, channel counts and default rate), the output
device, then the input channels with a live peak meter each (``m`` toggles a channel as main,
``k`` as key, Enter confirms, Esc goes back a step, ``q`` leaves without saving).

The meter reads the input device through a blocking PortAudio input stream on a thread of
its own (no Python callback on the audio thread); it shows the peak of the last 0.1 s.

:class:`PickerModel` has no screen and is testable alone; :func:`build_picker_app` builds the
prompt_toolkit Application around it. The file (``$XDG_CONFIG_HOME/livedyn/devices.toml``,
``~/.config/livedyn/devices.toml`` by default, per the XDG Base Directory Specification 0.8)
is TOML of livedyn's own layout::

    devices_format = 1
    input_device = "USB Audio"
    output_device = "USB Audio"
    samplerate = 48000
    main_inputs = [1, 2]
    key_inputs = [3]
"""
from __future__ import annotations

import math
import os
import threading
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..params import ParamError

DEVICES_FORMAT = 1
METER_FLOOR_DB = -70.0
MAX_METER_CHANNELS = 32


class PickerError(ParamError):
    """A device choice that cannot be used; one line."""


@dataclass
class DeviceChoice:
    input_device: str
    output_device: str
    samplerate: float
    main_inputs: list = field(default_factory=list)
    key_inputs: list = field(default_factory=list)

    def run_options(self, headless=False) -> str:
        """The ``livedyn run`` options this choice stands for."""
        dev = "" if headless else f"--input-device '{self.input_device}' --output-device " \
                                  f"'{self.output_device}' "
        key = f" --key-inputs {','.join(map(str, self.key_inputs))}" if self.key_inputs else ""
        return f"{dev}--main-inputs {','.join(map(str, self.main_inputs))}{key}"


def config_path() -> Path:
    xdg = os.environ.get("XDG_CONFIG_HOME", "")
    base = Path(xdg) if xdg and Path(xdg).is_absolute() else Path.home() / ".config"
    return base / "livedyn" / "devices.toml"


def save_choice(choice: DeviceChoice, path=None) -> Path:
    import tomli_w

    from ..presets import write_text_atomic

    path = Path(path) if path else config_path()
    path.parent.mkdir(parents=True, exist_ok=True)
    doc = {"devices_format": DEVICES_FORMAT, "input_device": choice.input_device,
           "output_device": choice.output_device, "samplerate": float(choice.samplerate),
           "main_inputs": list(choice.main_inputs), "key_inputs": list(choice.key_inputs)}
    write_text_atomic(path, "# livedyn device choice (livedyn pick; run --picked uses it)\n"
                      + tomli_w.dumps(doc))
    return path


def load_choice(path=None) -> DeviceChoice | None:
    """The remembered choice, or None when there is none; a broken file raises PickerError."""
    from ..presets import read_text_file

    path = Path(path) if path else config_path()
    if not path.exists():
        return None
    text = read_text_file(path, PickerError, "device choice")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise PickerError(f"{path}: invalid TOML: {' '.join(str(e).split())}") from None
    if doc.get("devices_format") != DEVICES_FORMAT:
        raise PickerError(f"{path}: devices_format = {doc.get('devices_format')!r}, expected "
                          f"{DEVICES_FORMAT}")
    try:
        c = DeviceChoice(str(doc["input_device"]), str(doc["output_device"]),
                         float(doc.get("samplerate", 48000)),
                         [int(x) for x in doc.get("main_inputs", [])],
                         [int(x) for x in doc.get("key_inputs", [])])
    except (KeyError, TypeError, ValueError) as e:
        raise PickerError(f"{path}: {e}: expected input_device, output_device, main_inputs "
                          "(channel numbers from 1)") from None
    if not c.main_inputs or any(x < 1 for x in c.main_inputs + c.key_inputs):
        raise PickerError(f"{path}: main_inputs = {c.main_inputs}: expected channel numbers "
                          "from 1")
    return c


class InputMeter:
    """Peak per input channel of one device, read on a thread of its own (blocking reads)."""

    def __init__(self, device_index, channels, samplerate, block=1024):
        from ..engine.stream import _sd

        sd = _sd()
        self.channels = min(int(channels), MAX_METER_CHANNELS)
        self.levels = [-math.inf] * self.channels
        self.error = None
        self._stop = threading.Event()
        self._block = int(block)
        self.stream = sd.InputStream(device=device_index, channels=self.channels,
                                     samplerate=samplerate, dtype="float32")
        self.stream.start()
        self._thread = threading.Thread(target=self._run, name="livedyn-pick-meter",
                                        daemon=True)
        self._thread.start()

    def _run(self):
        fs = self.stream.samplerate
        hold = max(1, int(0.1 * fs / self._block))
        recent = []
        while not self._stop.is_set():
            try:
                data, _ = self.stream.read(self._block)
            except Exception as e:  # the device went away: say so, stop reading
                self.error = str(e).splitlines()[0] if str(e) else type(e).__name__
                return
            recent.append(np.max(np.abs(data), axis=0) if len(data) else
                          np.zeros(self.channels, np.float32))
            recent = recent[-hold:]
            peak = np.max(recent, axis=0)
            self.levels = [20 * math.log10(p) if p > 0 else -math.inf for p in peak]

    def close(self):
        self._stop.set()
        self._thread.join(timeout=2.0)
        try:
            self.stream.stop()
            self.stream.close()
        except Exception:
            pass


class PickerModel:
    """What the picker shows and does, with no screen.

    Parameters
    ----------
    devices : list of dict
        As :func:`livedyn.engine.stream.list_devices` gives them.
    remembered : DeviceChoice, optional
        Preselected when its devices are still there.
    open_meter : callable, optional
        ``open_meter(device_dict) -> InputMeter``-like (``levels``, ``close()``); tests may
        pass their own.
    """

    def __init__(self, devices, remembered=None, open_meter=None):
        self.inputs = [d for d in devices if d["inputs"] > 0]
        self.outputs = [d for d in devices if d["outputs"] > 0]
        if not self.inputs or not self.outputs:
            raise PickerError("no input or no output device: check the sound system, or use "
                              "livedyn pick --headless")
        self.remembered = remembered
        self.step = "input"
        self.input_dev = self.output_dev = None
        self.cursor = self._find(self.inputs, remembered and remembered.input_device)
        self.main, self.key = [], []
        self.meter = None
        self.message = "Up/Down choose, Enter next, Esc back, q leave without saving"
        self.done = False
        self.choice = None
        self._open_meter = open_meter or (lambda d: InputMeter(d["index"], d["inputs"],
                                                               d["samplerate"]))

    @staticmethod
    def _find(devs, name):
        for i, d in enumerate(devs):
            if name is not None and d["name"] == name:
                return i
        return 0

    @property
    def rows(self):
        if self.step == "input":
            return self.inputs
        if self.step == "output":
            return self.outputs
        return list(range(1, min(self.input_dev["inputs"], MAX_METER_CHANNELS) + 1))

    def move(self, d):
        n = len(self.rows)
        self.cursor = max(0, min(n - 1, self.cursor + d))

    def enter(self):
        if self.step == "input":
            self.input_dev = self.inputs[self.cursor]
            self.step = "output"
            name = self.remembered.output_device if self.remembered else self.input_dev["name"]
            self.cursor = self._find(self.outputs, name)
        elif self.step == "output":
            self.output_dev = self.outputs[self.cursor]
            self.step = "channels"
            self.cursor = 0
            n = min(self.input_dev["inputs"], MAX_METER_CHANNELS)
            r = self.remembered
            if r is not None and r.input_device == self.input_dev["name"]:
                self.main = [c for c in r.main_inputs if c <= n]
                self.key = [c for c in r.key_inputs if c <= n and c not in self.main]
            else:
                self.main, self.key = list(range(1, min(2, n) + 1)), []
            try:
                self.meter = self._open_meter(self.input_dev)
                self.message = "m: main, k: key, Enter: use these channels, Esc: back"
            except Exception as e:
                self.meter = None
                self.message = (f"no meter: {self.input_dev['name']!r} cannot be opened for "
                                f"input ({str(e).splitlines()[0] if str(e) else e}); m, k, "
                                "Enter still work")
        elif self.step == "channels":
            if not self.main:
                self.message = "choose at least one main input channel (m)"
                return
            self.choice = DeviceChoice(self.input_dev["name"], self.output_dev["name"],
                                       float(self.input_dev["samplerate"]), sorted(self.main),
                                       sorted(self.key))
            self._close_meter()
            self.step = "done"
            self.done = True

    def back(self):
        if self.step == "output":
            self.step = "input"
            self.cursor = self.inputs.index(self.input_dev)
        elif self.step == "channels":
            self._close_meter()
            self.step = "output"
            self.cursor = self.outputs.index(self.output_dev)

    def toggle(self, which):
        if self.step != "channels":
            return
        ch = self.rows[self.cursor]
        mine, other = (self.main, self.key) if which == "main" else (self.key, self.main)
        if ch in mine:
            mine.remove(ch)
        else:
            mine.append(ch)
            if ch in other:
                other.remove(ch)
        self.message = (f"main {','.join(map(str, sorted(self.main))) or '-'}, key "
                        f"{','.join(map(str, sorted(self.key))) or '-'}")

    def cancel(self):
        self._close_meter()
        self.done = True
        self.choice = None

    def _close_meter(self):
        if self.meter is not None:
            self.meter.close()
            self.meter = None

    # ---- text ----------------------------------------------------------------------------------
    def lines(self, width=80):
        """The screen's lines: (style, text) pairs, one per line."""
        out = [("class:title", f" livedyn pick: {self._heading()} ")]
        if self.step in ("input", "output"):
            kind = "inputs" if self.step == "input" else "outputs"
            out.append(("", f"  {'device':34} {'host API':18} {'in':>3} {'out':>4} {'rate':>7}"))
            for i, d in enumerate(self.rows):
                mark = ">" if i == self.cursor else " "
                out.append(("class:selected" if i == self.cursor else "",
                            f"{mark} {d['name'][:34]:34} {d['hostapi'][:18]:18} {d['inputs']:>3} "
                            f"{d['outputs']:>4} {d['samplerate']:>7.0f}"[:width]))
            out.append(("", f"  ({len(self.rows)} devices with {kind})"))
        else:
            levels = self.meter.levels if self.meter is not None else []
            bar_w = max(10, width - 34)
            out.append(("", f"  input channels of {self.input_dev['name']!r} (peak, last "
                            "0.1 s)"[:width]))
            for i, ch in enumerate(self.rows):
                lv = levels[i] if i < len(levels) else -math.inf
                role = "main" if ch in self.main else ("key " if ch in self.key else "    ")
                fill = 0 if math.isinf(lv) else int(round(bar_w * max(0.0, 1 - lv / METER_FLOOR_DB)))
                text = "silent" if math.isinf(lv) else f"{lv:6.1f} dBFS"
                mark = ">" if i == self.cursor else " "
                out.append(("class:selected" if i == self.cursor else "",
                            f"{mark} in {ch:<2} {role} {text:>11} |{'#' * fill}"
                            f"{'.' * (bar_w - fill)}|"[:width]))
        out.append(("class:message", self.message[:width]))
        return out

    def _heading(self):
        return {"input": "input device", "output": "output device",
                "channels": "main and key channels", "done": "done"}[self.step]


def build_picker_app(model, input=None, output=None, refresh_hz=10.0):
    """The picker's prompt_toolkit Application around ``model``."""
    import asyncio

    from prompt_toolkit import Application
    from prompt_toolkit.key_binding import KeyBindings
    from prompt_toolkit.layout import HSplit, Layout, Window
    from prompt_toolkit.layout.controls import FormattedTextControl
    from prompt_toolkit.styles import Style

    def text():
        frags = []
        for style, line in model.lines(app.output.get_size().columns):
            frags.append((style, line + "\n"))
        return frags

    kb = KeyBindings()

    def act(f):
        def handler(event):
            f()
            if model.done:
                event.app.exit()
        return handler

    kb.add("up")(act(lambda: model.move(-1)))
    kb.add("down")(act(lambda: model.move(+1)))
    kb.add("enter")(act(model.enter))
    kb.add("escape")(act(model.back))
    kb.add("m")(act(lambda: model.toggle("main")))
    kb.add("k")(act(lambda: model.toggle("key")))
    kb.add("q")(act(model.cancel))
    kb.add("c-c")(act(model.cancel))
    app = Application(layout=Layout(HSplit([Window(FormattedTextControl(text))])),
                      key_bindings=kb, full_screen=True, input=input, output=output,
                      style=Style.from_dict({"title": "reverse bold", "selected": "reverse",
                                             "message": "italic"}))
    app.ttimeoutlen = 0.05

    async def redraw():
        while not model.done:
            app.invalidate()
            await asyncio.sleep(1.0 / refresh_hz)

    app.pre_run_callables.append(lambda: app.create_background_task(redraw()))
    return app

"""The one way in for remote controls (MIDI, OSC): :class:`Controls`.

Every parameter change from a remote control goes through :meth:`Controls.offer` from any
thread. Offers are coalesced — the latest value per parameter wins — and a publisher thread
hands them to ``engine.set`` (the same call the console makes, which validates, publishes
through the parameter sequence lock and records the change, frame-stamped, for the automation
file) at most once per block period: a flood of messages costs one publication per block,
never a wait on the audio thread, which only reads the published array.

Actions (mute, bypass, slot, compare, presets) go through :meth:`Controls.act`: with a console
attached they run in the console (which owns the slots), otherwise here on the engine. The
console reads what happened with :meth:`Controls.take_for_console`.
"""
from __future__ import annotations

import threading
import time
from collections import deque
from dataclasses import dataclass, field

from ..params import OUTPUT_LEVEL, ParamError

#: Actions a remote control can trigger, beside parameters: name -> argument form.
ACTIONS = {"mute": "on|off|toggle", "bypass": "on|off|toggle", "slot": "a|b|toggle",
           "compare": "", "preset": "NAME"}


@dataclass
class ConsoleTake:
    """What remote controls did since the console last looked."""

    values: list = field(default_factory=list)  # (name, value) applied to the engine
    actions: list = field(default_factory=list)  # (verb, arg) for the console to run
    notices: list = field(default_factory=list)  # (level, text)


class Controls:
    """Coalescing publisher of remote changes to ``engine`` (its control surface).

    Parameters
    ----------
    engine : livedyn.engine.engine.Engine (or its control surface)
    period_s : float, optional
        Least time between two publications (default: the engine's block period).
    """

    def __init__(self, engine, period_s=None):
        self.engine = engine
        if period_s is None:
            fs = float(getattr(engine, "fs", 48000.0))
            period_s = float(getattr(engine, "blocksize", 64)) / fs
        self.period_s = float(period_s)
        self._lock = threading.Lock()
        self._wake = threading.Condition(self._lock)
        self._pending = {}  # name -> value (the latest offer)
        self._console = False
        self._take = ConsoleTake()
        self._state = {"mute": False, "bypass": False}
        self.offered = 0  # offers taken (every message that asked for a value)
        self.published = 0  # engine.set calls made for them
        self.refused = 0  # values the engine refused
        self.midi = None  # livedyn.control.midi.MidiControl, when one runs
        self.osc = None  # livedyn.control.osc.OscControl, when one runs
        self.console_state = None  # a callable giving {"slot": "a"|"b"} when a console runs
        self._stop = threading.Event()
        self._thread = None
        self._last_flush = 0.0

    # ---- what may be controlled ------------------------------------------------------------
    def param(self, name):
        """The Param for ``name``: the running algorithm's, or the output level."""
        if name == OUTPUT_LEVEL.name:
            return OUTPUT_LEVEL
        return self.engine.proc.schema[name]

    def targets(self):
        return list(self.engine.proc.schema.names()) + [OUTPUT_LEVEL.name] + list(ACTIONS)

    def check_target(self, target):
        """Raise ParamError unless ``target`` is a parameter, the output level or an action
        (``preset NAME`` included)."""
        head = str(target).split(" ", 1)[0]
        if head in ACTIONS or head == OUTPUT_LEVEL.name or head in self.engine.proc.schema:
            return
        raise ParamError(f"{target!r}: expected a parameter ({', '.join(self.engine.proc.schema.names()[:4])}, ...), "
                         f"{OUTPUT_LEVEL.name}, or one of {', '.join(ACTIONS)}")

    def value(self, name) -> float:
        """The value in force (an offer not yet published counts)."""
        with self._lock:
            if name in self._pending:
                return self._pending[name]
        return float(self.engine.get(name))

    # ---- parameter changes -------------------------------------------------------------------
    def offer(self, name, value):
        """Ask for ``name`` = ``value`` (a number in the parameter's unit) from any thread.
        Never blocks on the audio thread; the latest offer per parameter is published at the
        next publication (at most one per block period)."""
        with self._lock:
            self._pending[name] = float(value)
            self.offered += 1
            self._wake.notify()

    def start(self):
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="livedyn-controls",
                                            daemon=True)
            self._thread.start()
        return self

    def stop(self):
        self._stop.set()
        with self._lock:
            self._wake.notify()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
        for part in (self.midi, self.osc):
            if part is not None:
                part.stop()

    def _run(self):
        while not self._stop.is_set():
            with self._lock:
                while not self._pending and not self._stop.is_set():
                    self._wake.wait(0.5)
            wait = self._last_flush + self.period_s - time.monotonic()
            if wait > 0:  # one publication per block period: later offers join this one
                self._stop.wait(wait)
            self.flush()

    def flush(self):
        """Publish the pending offers now (the publisher thread calls this)."""
        with self._lock:
            todo, self._pending = self._pending, {}
        self._last_flush = time.monotonic()
        for name, v in todo.items():
            try:
                self.engine.set(name, v)
            except Exception as e:  # a refused value is a notice, never a dead thread
                self.refused += 1
                self.notice("warn", f"remote {name} {v:g} refused: {str(e).splitlines()[0]}")
                continue
            self.published += 1
            with self._lock:
                if self._console:
                    self._take.values.append((name, v))

    # ---- actions -------------------------------------------------------------------------------
    def act(self, verb, arg=""):
        """Trigger an action from any thread: mute/bypass (on, off, toggle), slot (a, b, toggle),
        compare, preset NAME."""
        if verb not in ACTIONS:
            raise ParamError(f"{verb!r}: expected one of {', '.join(ACTIONS)}")
        if arg == "toggle":
            arg = ""
        if verb == "slot" and arg == "":
            verb = "compare"
        if verb == "preset":
            verb = "load"
        with self._lock:
            if self._console:  # the console owns the slots and knows mute/bypass
                self._take.actions.append((verb, arg))
                return
        if verb in ("mute", "bypass"):
            self._state[verb] = (not self._state[verb]) if arg == "" else arg == "on"
            arg = "on" if self._state[verb] else "off"
        # no console: act on the engine here (slots belong to the console)
        try:
            if verb == "mute":
                self.engine.mute(arg == "on")
            elif verb == "bypass":
                self.engine.bypass(arg == "on")
            elif verb == "load":
                self.engine.load_preset(arg)
            else:
                self.notice("warn", f"remote {verb}: the settings slots live in the console "
                            "(run without --no-ui)")
        except Exception as e:
            self.notice("warn", f"remote {verb} {arg}: {str(e).splitlines()[0]}")

    # ---- for the console and the status lines -------------------------------------------------
    def attach_console(self):
        """A console now runs: actions go to it (see :meth:`take_for_console`)."""
        with self._lock:
            self._console = True

    def notice(self, level, text):
        """A one-line message: to the console when one runs, else to the engine's notices."""
        with self._lock:
            if self._console:
                self._take.notices.append((level, str(text)))
                return
        post = getattr(self.engine, "notice", None)
        if callable(post):
            post(level, text)

    def state(self) -> dict:
        """Mute, bypass (0/1) and, with a console, the settings slot: what a remote surface
        shows beside the values."""
        snap = getattr(self.engine, "snapshot", None)
        out = dict(self._state)
        if callable(snap):
            try:
                s = snap()
                out = {"mute": s["muted"], "bypass": s["bypassed"]}
            except Exception:
                pass
        out = {k: int(bool(v)) for k, v in out.items()}
        if callable(self.console_state):
            try:
                out.update(self.console_state())
            except Exception:
                pass
        return out

    def take_for_console(self) -> ConsoleTake:
        with self._lock:
            take, self._take = self._take, ConsoleTake()
        return take

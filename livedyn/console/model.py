"""The console's settings and what the user does with them, with no screen: testable alone.

:class:`ConsoleModel` owns the parameter list (the chosen parameter, scrolling), the two
settings slots with undo and redo, the level-matched comparison, presets (load, save by bare
name into the user's folder, asking before replacing), bypass, mute, monitor, the output level,
the algorithm change, test sources, MIDI learn (through :mod:`livedyn.control`), and quitting
(asked twice while sound plays). The command line and its views are in
:mod:`livedyn.console.cmdline`, the meter readings in :mod:`livedyn.console.metering`, the
messages and their log in :mod:`livedyn.console.messages`, the steps in
:mod:`livedyn.console.steps`.

It talks to the engine only through its control surface, duck-typed:
``set(name, value) -> seq``, ``get(name)``, ``snapshot() -> dict``, ``load_preset(name_or_path)``,
``bypass(on)``, ``mute(on)``, ``monitor(mode)`` and ``proc`` (``schema``, ``algorithm``,
``samplerate``, ``channels``, ``key_channels``). Optional: ``recent_input(seconds) ->
(main, key)`` (the last ``seconds`` of main input, float32 (frames, channels), and of the key
input or None) for level matching; ``watch()`` and ``error`` to notice a stream that stopped;
``swap(algorithm)`` to change algorithm; ``set("output_level", dB)``; ``main_source`` and
``key_source`` (a :class:`livedyn.control.sources.TestSource` can be reprogrammed).
The console never calls ``stop()``: quitting leaves the engine to its owner.

Every public method that acts on the user's behalf either succeeds or leaves one line in
:attr:`ConsoleModel.status` saying what was wrong and what is allowed; none raises.
"""
from __future__ import annotations

import math
import time
from pathlib import Path

from ..params import KEY_EXTERNAL, LAW_DUCKER, OUTPUT_LEVEL, ParamError
from . import commands as cmds
from .cmdline import HISTORY_DEPTH, CommandLine  # noqa: F401  (re-exported)
from .messages import ConsoleError, MessageLog, Status, one_line  # noqa: F401
from .metering import FLOOR_DB, GR_HISTORY_SECONDS, POINT_FALL_DB_PER_S, Metering  # noqa: F401
from .steps import (  # noqa: F401  (re-exported: the steps are part of the console's rules)
    COARSE_FACTOR, FINE_FACTOR, LINEAR_STEPS, LOG_FLOOR, RATIO_TOP, step_value,
)

#: Seconds of input the level match measures, and the least it accepts.
MATCH_SECONDS = 4.0
MATCH_MIN_SECONDS = 1.0
UNDO_DEPTH = 200
#: Seconds a question (quit while sound plays, replace a preset) waits for its answer.
ASK_SECONDS = 8.0
#: Step of the output level keys, dB.
OUTPUT_STEP_DB = 1.0
HISTORY_DEPTH = 200


class _CurveView:
    """What :func:`livedyn.analysis.theory_output_db` reads from a Processor: the algorithm and
    its values (here the live values of the active slot)."""

    def __init__(self, algorithm, values, p=None, schema=None):
        self.algorithm = algorithm
        self._values = values
        self.p = None  # the parameter array with these values (a user gain curve reads it)
        if p is not None:
            import numpy as np

            self.p = np.array(p, dtype=np.float64)
            for name, v in values.items():
                if name in schema:
                    self.p[schema[name].slot] = v

    def values(self):
        return dict(self._values)


class ConsoleModel(CommandLine, Metering):
    """State and commands of the console over an engine's control surface.

    Parameters
    ----------
    engine : object
        Anything with the control surface described in the module docstring.
    title : str
        Shown in the header.
    clock : callable
        Seconds, monotonic (tests pass their own).
    check : callable, optional
        Called on each :meth:`tick`; returns None while all is well, or a one-line message
        (e.g. "the JACK server stopped") that the console then shows.
    match_seconds : float
        Seconds of recent input the level match measures.
    controls : livedyn.control.hub.Controls, optional
        Remote controls (MIDI, OSC): their changes show here, and learn maps a MIDI control.
    """

    def __init__(self, engine, title="livedyn console", clock=time.monotonic, check=None,
                 match_seconds=MATCH_SECONDS, controls=None):
        self.engine = engine
        self.proc = engine.proc
        self.schema = self.proc.schema
        self.algorithm = self.proc.algorithm
        self.names = list(self.schema.names())
        self.title = title
        self.clock = clock
        self.check = check
        self.match_seconds = float(match_seconds)
        self.samplerate = float(getattr(self.proc, "samplerate", 48000.0))

        self.view = "list"  # "list", "command", "help" or "log"
        self.selected = 0
        self.list_top = 0
        self.quit_requested = False
        self.question = None  # (kind, text, action, deadline): waits for y (or q for quit)
        self.controls = controls
        current = {n: float(engine.get(n)) for n in self.names}
        self.slots = {"a": dict(current), "b": dict(current)}
        self.active = "a"
        self.undo_stacks = {"a": [], "b": []}
        self.redo_stacks = {"a": [], "b": []}
        self.match = False
        self.trims = {"a": 0.0, "b": 0.0}
        self.loudness = {"a": None, "b": None}
        self.trim_limited = False
        self._match_measured_s = 0.0
        self.last_seq = None
        self.log = MessageLog()
        self._status = Status("")
        self._init_command_line()
        self._init_metering()
        snap = self._safe_snapshot() or {}
        self.bypassed = bool(snap.get("bypassed", False))
        self.muted = bool(snap.get("muted", False))
        self.monitor_mode = str(snap.get("monitor", "out"))
        self.status = Status("Loud monitoring can damage hearing; beware feedback; follow "
                             "venue rules (? help)", "warn")

    @property
    def status(self) -> Status:
        """The latest message (the message area shows it whole); each one also goes to the
        log."""
        return self._status

    @status.setter
    def status(self, st: Status):
        self._status = st
        self.log.add(st)

    def _rebind(self):
        """The engine swapped in another version of the algorithm: take its parameters."""
        self.proc = self.engine.proc
        self.schema = self.proc.schema
        self.algorithm = self.proc.algorithm
        chosen = self.names[self.selected] if self.names else None
        self.names = list(self.schema.names())
        self.selected = self.names.index(chosen) if chosen in self.names else 0
        self.list_top = 0
        current = {n: float(self.engine.get(n)) for n in self.names}
        for slot in ("a", "b"):
            self.slots[slot] = {n: self.slots[slot].get(n, current[n]) for n in self.names}
            self.undo_stacks[slot] = []
            self.redo_stacks[slot] = []
        self.slots[self.active] = dict(current)

    # ---- reading ------------------------------------------------------------------------------
    @property
    def param(self):
        """The selected Param."""
        return self.schema[self.names[self.selected]]

    def value(self, name) -> float:
        """The active slot's value (the user's value; makeup without the match trim)."""
        return self.slots[self.active][name]

    def live_value(self, name, value=None) -> float:
        """What the engine runs for ``name``: the slot value, plus the trim for makeup."""
        v = self.value(name) if value is None else float(value)
        if name == "makeup" and self.trims[self.active] != 0.0:
            prm = self.schema["makeup"]
            return min(max(v + self.trims[self.active], prm.lo), prm.hi)
        return v

    def live_values(self) -> dict:
        return {n: self.live_value(n) for n in self.names}

    def differs(self, name) -> bool:
        """True when slots A and B hold different values for ``name``."""
        return self.slots["a"][name] != self.slots["b"][name]

    @property
    def match_trim(self) -> float:
        """Trim of the active slot in dB (0 unless matching is on and this slot is louder)."""
        return self.trims[self.active] if self.match else 0.0

    def match_text(self) -> str:
        """'level matched by -8.0 dB' (the active slot's trim); on the quieter slot the other
        slot's trim is named too."""
        def signed(v):
            return "0.0" if abs(v) < 0.05 else f"{v:+.1f}"

        other = self._other()
        text = f"level matched by {signed(self.match_trim)} dB"
        if abs(self.match_trim) < 0.05 and abs(self.trims[other]) >= 0.05:
            text += f" (slot {other.upper()} {signed(self.trims[other])} dB)"
        return text

    def curve_view(self):
        """An object for :func:`livedyn.analysis.theory_output_db` with the live values."""
        return _CurveView(self.algorithm, self.live_values(), getattr(self.proc, "p", None),
                          self.schema)

    def curve_output_db(self, level_db) -> float:
        from ..analysis import theory_output_db

        return float(theory_output_db(self.curve_view(), float(level_db)))

    @property
    def key_driven(self) -> bool:
        """True when the detector listens to the external key input."""
        return "key" in self.schema and int(self.value("key")) == KEY_EXTERNAL

    @property
    def curve_x_label(self) -> str:
        if self.algorithm.law == LAW_DUCKER and self.algorithm.kind != "limiter":
            return "key dBFS"
        return "key dBFS" if self.key_driven else "in dBFS"

    @property
    def curve_y_label(self) -> str:
        if self.algorithm.law == LAW_DUCKER and self.algorithm.kind != "limiter":
            from ..analysis import DUCKER_MAIN_DB

            return f"out dBFS (main {DUCKER_MAIN_DB:g})"
        return "out dBFS"

    def operating_point(self):
        """(x, y) of the operating point on the curve, dB, or None before any signal."""
        x, y = self._point["x"], self._point["y"]
        if x is None or y is None or x <= FLOOR_DB + 1:
            return None
        return x, y

    def visible_params(self, rows: int):
        """(first index, names) of the parameter rows that fit in ``rows`` lines, keeping the
        selection in view."""
        rows = max(1, int(rows))
        if self.selected < self.list_top:
            self.list_top = self.selected
        elif self.selected >= self.list_top + rows:
            self.list_top = self.selected - rows + 1
        self.list_top = max(0, min(self.list_top, max(0, len(self.names) - rows)))
        return self.list_top, self.names[self.list_top:self.list_top + rows]

    @property
    def pending(self) -> bool:
        """True while the last change has not yet reached the audio callback."""
        seq = self.snap.get("param_seq")
        return self.last_seq is not None and seq is not None and seq < self.last_seq

    # ---- status -------------------------------------------------------------------------------
    def info(self, text):
        self.status = Status(text, "info")

    def warn(self, text):
        self.status = Status(text, "warn")

    def fail(self, err):
        self.status = Status(one_line(err), "error")

    # ---- moving and stepping ------------------------------------------------------------------
    def move(self, delta):
        """Choose the parameter ``delta`` rows away (clamped)."""
        self.selected = max(0, min(len(self.names) - 1, self.selected + int(delta)))

    def select(self, name):
        self.selected = self.names.index(name)

    def nudge(self, direction, coarse=False):
        """Step the selected parameter up (+1) or down (-1); see :func:`step_value`."""
        try:
            prm = self.param
            old = self.value(prm.name)
            if prm.taper == "choice":
                self._cycle_choice(prm, old, direction)
                return
            new = step_value(prm, old, direction, coarse)
            if new == old:
                end = "top" if direction > 0 else "bottom"
                self.warn(f"{prm.name} is at the {end} of its range ({prm.format(old)}; "
                          f"{prm.describe_range()})")
                return
            self._change({prm.name: new})
            self.info(f"{prm.name} {prm.format(new)}")
        except Exception as e:  # never out of the console
            self.fail(e)

    def _cycle_choice(self, prm, old, direction):
        """Next/previous choice; a choice the engine refuses (e.g. key external without a key
        input) is skipped and named."""
        skipped = []
        v = old
        for _ in range(len(prm.choices) - 1):
            v = step_value(prm, v, direction)
            try:
                self._change({prm.name: v})
            except (ParamError, ConsoleError) as e:
                skipped.append(f"{prm.choices[int(v)]} ({one_line(e)})")
                continue
            msg = f"{prm.name} {prm.format(v)}"
            if skipped:
                msg += "; skipped " + "; ".join(skipped)
            self.info(msg)
            return
        raise ConsoleError(f"{prm.name}: no other choice is allowed now: " + "; ".join(skipped))

    # ---- changing values ----------------------------------------------------------------------
    def set_param(self, name, value):
        """Set a parameter from text or a number (``"4:1"``, ``"-18 dBFS"``, ``"off"``)."""
        prm = self.schema[name]
        v = prm.parse(value)
        self._change({name: v})
        self.info(f"{name} {prm.format(v)}" + self._trim_note(name))

    def _trim_note(self, name):
        if name == "makeup" and self.match_trim:
            return f" (running {self.live_value('makeup'):+.1f} dB with the match trim)"
        return ""

    def _change(self, values):
        """Apply user values to the active slot with one undo entry; re-measure the match."""
        before = self._apply(values, record_partial=True)
        if before:
            stack = self.undo_stacks[self.active]
            stack.append(before)
            del stack[:-UNDO_DEPTH]
            self.redo_stacks[self.active].clear()
            self._after_change()
        return before

    def _push(self, name, value):
        seq = self.engine.set(name, float(self.live_value(name, value)))
        if isinstance(seq, int):
            self.last_seq = seq

    def _apply(self, values, record_partial=False):
        """Bring the engine and the active slot to ``values`` (user values by name).

        Parameters are applied in passes so that a combination that is only valid once another
        value has changed (say key = external after topology = feedforward) still gets through.
        Returns the previous slot values of what changed. Raises the first refusal if some value
        could not be applied at all (the others stay applied and, with ``record_partial``, get
        an undo entry).
        """
        slot = self.slots[self.active]
        pending = {}
        for n, v in values.items():
            v = float(v)
            if slot[n] != v or float(self.engine.get(n)) != self.live_value(n, v):
                pending[n] = v
        before, errors = {}, {}
        progress = True
        while pending and progress:
            progress = False
            for n in list(pending):
                v = pending[n]
                try:
                    self._push(n, v)
                except ParamError as e:
                    errors[n] = e
                    continue
                if slot[n] != v:
                    before[n] = slot[n]
                slot[n] = v
                del pending[n]
                errors.pop(n, None)
                progress = True
        if pending:
            if before and record_partial:
                self.undo_stacks[self.active].append(before)
                before = {}
            raise errors[next(iter(pending))]
        return before

    def _after_change(self):
        if self.match:
            try:
                self._measure_match()
            except Exception as e:
                self.warn(f"match: kept the previous trim ({one_line(e)})")
        self._apply_trim()

    def _apply_trim(self):
        if "makeup" not in self.schema:
            return
        want = self.live_value("makeup")
        if float(self.engine.get("makeup")) != want:
            self._push("makeup", self.value("makeup"))

    def undo(self):
        """Put back the values before the last change on the active slot."""
        try:
            stack = self.undo_stacks[self.active]
            if not stack:
                self.warn(f"nothing to undo on slot {self.active.upper()}")
                return
            entry = stack.pop()
            now = {n: self.value(n) for n in entry}
            self._apply(entry)
            self.redo_stacks[self.active].append(now)
            self._after_change()
            shown = ", ".join(f"{n} {self.schema[n].format(v)}" for n, v in entry.items())
            self.info(f"undo: {shown} (r redoes)")
        except Exception as e:
            self.fail(e)

    def redo(self):
        """Put back what the last undo on the active slot took away."""
        try:
            stack = self.redo_stacks[self.active]
            if not stack:
                self.warn(f"nothing to redo on slot {self.active.upper()}")
                return
            entry = stack.pop()
            now = {n: self.value(n) for n in entry}
            self._apply(entry)
            self.undo_stacks[self.active].append(now)
            self._after_change()
            shown = ", ".join(f"{n} {self.schema[n].format(v)}" for n, v in entry.items())
            self.info(f"redo: {shown}")
        except Exception as e:
            self.fail(e)

    # ---- slots --------------------------------------------------------------------------------
    def switch_slot(self, slot):
        """Make slot ``"a"`` or ``"b"`` active: the engine takes its exact values."""
        slot = str(slot).lower()
        if slot not in self.slots:
            raise ConsoleError(f"slot {slot!r}: expected a or b")
        if slot == self.active:
            self.info(f"already on slot {slot.upper()}")
            return
        self.active = slot
        note = ""
        if self.match:
            try:
                self._measure_match()
            except Exception as e:
                note = f"; match kept the previous trim ({one_line(e)})"
        self._apply(self.slots[slot])
        ndiff = sum(self.differs(n) for n in self.names)
        msg = f"slot {slot.upper()} ({ndiff} value{'s' if ndiff != 1 else ''} differ from " \
              f"slot {self._other().upper()})"
        if self.match:
            msg += "; " + self.match_text()
        self.info(msg + note)

    def _other(self):
        return "b" if self.active == "a" else "a"

    def compare(self):
        """Switch to the other slot."""
        self.switch_slot(self._other())

    # ---- level-matched comparison -------------------------------------------------------------
    def set_match(self, on=True):
        """Switch the level-matched comparison on (measuring again if it is on) or off."""
        if not on:
            self.match = False
            self.trims = {"a": 0.0, "b": 0.0}
            self._apply_trim()
            self.info("match off: both slots run their own makeup")
            return
        if "makeup" not in self.schema:
            raise ConsoleError(f"match: the {self.algorithm.name} has no makeup control to "
                               "trim, so level matching is not available")
        self._measure_match()
        self.match = True
        self._apply_trim()
        la, lb = self.loudness["a"], self.loudness["b"]
        louder = "a" if la > lb else "b" if lb > la else None
        what = (f"slot {louder.upper()} is turned down by {-self.trims[louder]:.1f} dB"
                if louder else "no trim needed")
        self.info(f"{self.match_text()} on slot {self.active.upper()} "
                  f"({what}; A {la:.1f} LUFS, B {lb:.1f} LUFS on the last "
                  f"{self._match_measured_s:.1f} s of input)"
                  + ("; trim limited by the makeup range" if self.trim_limited else ""))

    def _recent_input(self):
        fn = getattr(self.engine, "recent_input", None)
        if fn is None:
            raise ConsoleError("match: this engine keeps no recent input (it has no "
                               "recent_input(seconds)), so the slots cannot be measured")
        got = fn(self.match_seconds)
        if isinstance(got, tuple):
            main, key = (got + (None,))[:2]
        else:
            main, key = got, None
        import numpy as np

        if main is None or len(main) < MATCH_MIN_SECONDS * self.samplerate:
            have = 0.0 if main is None else len(main) / self.samplerate
            raise ConsoleError(f"match: only {have:.1f} s of input so far, need at least "
                               f"{MATCH_MIN_SECONDS:g} s; try again in a moment")
        main = np.ascontiguousarray(np.asarray(main, np.float32).reshape(len(main), -1))
        if key is not None:
            key = np.ascontiguousarray(np.asarray(key, np.float32).reshape(len(key), -1))
            n = min(len(main), len(key))
            main, key = main[-n:], key[-n:]
        return main, key

    def render_slot(self, slot, main, key=None):
        """Process ``main`` (and ``key``) offline with a fresh Processor holding ``slot``'s
        values (without any match trim); :func:`livedyn.analysis.render_with` does it."""
        from ..analysis import LevelMatchError, render_with

        try:
            return render_with(self.algorithm, self.samplerate, self.proc.channels,
                               getattr(self.proc, "key_channels", 0), self.slots[slot], main,
                               key)
        except LevelMatchError as e:
            raise ConsoleError(f"match: {e}") from None

    def _measure_match(self):
        """Measure both slots on the recent input and set :attr:`trims`.

        :func:`livedyn.analysis.level_match` processes the same recent input offline with each
        slot's values, compares the integrated loudness of the outputs (ITU-R BS.1770-4) and
        gives the louder slot a negative trim of the difference, applied on its makeup.
        """
        from ..analysis import LevelMatchError, level_match

        main, key = self._recent_input()
        try:
            m = level_match(self.algorithm, self.samplerate, self.proc.channels,
                            getattr(self.proc, "key_channels", 0),
                            {s: self.slots[s] for s in ("a", "b")}, main, key)
        except LevelMatchError as e:
            raise ConsoleError(f"match: {e}") from None
        self.loudness = m.loudness
        self.trims = m.trims
        self._match_measured_s = m.seconds
        mk = self.schema["makeup"]
        self.trim_limited = any(
            not (mk.lo <= self.slots[s]["makeup"] + self.trims[s] <= mk.hi) for s in "ab")

    # ---- presets ------------------------------------------------------------------------------
    def load(self, name_or_path):
        """Apply a preset through the engine; one undo entry; a failed load changes nothing."""
        slot = self.slots[self.active]
        before = dict(slot)
        try:
            pr = self.engine.load_preset(name_or_path)
        except Exception:
            self._resync()
            raise
        for n in self.names:
            slot[n] = float(self.engine.get(n))
        changed = {n: before[n] for n in self.names if before[n] != slot[n]}
        if changed:
            self.undo_stacks[self.active].append(changed)
        self._after_change()
        src = getattr(pr, "source", None) or name_or_path
        self.info(f"loaded {src} into slot {self.active.upper()}: {len(changed)} value"
                  f"{'s' if len(changed) != 1 else ''} changed (u undoes)")

    def _resync(self):
        """After a refused engine call: make the engine run the slot's values again."""
        try:
            self._apply(self.slots[self.active])
        except Exception:
            pass

    def save(self, path):
        """Write the active slot's values (makeup without the match trim) as a preset.

        A bare name (``save mine``) goes to the user's presets folder
        (:func:`livedyn.presets.user_presets_dir`), where ``load mine`` finds it; anything
        else is a file path (``.toml`` added when it has no suffix). The shipped presets are
        never written. Replacing an existing file asks first (y replaces)."""
        from .. import algorithms, presets

        name = getattr(self.algorithm, "name", "")
        source = getattr(self.algorithm, "source", None)
        if name not in algorithms.BUILTINS and source is None:
            raise ConsoleError(f"save: {name!r} is neither built in nor an algorithm file")
        text = str(path).strip()
        if presets._is_bare_name(text):
            target = presets.user_preset_path(text)
        else:
            target = Path(text).expanduser()
            if target.suffix == "":
                target = target.with_name(target.name + presets.SUFFIX)
        if presets.is_shipped(target):
            raise ConsoleError(f"save: {target} is a shipped preset, which stays as it is; "
                               f"save under another name, or 'save {target.stem}' to keep "
                               "your own copy in your presets folder")
        desc = f"saved from the console, slot {self.active.upper()}"
        values = dict(self.slots[self.active])
        if source is not None:  # the preset names the file and carries its values
            pr = presets.Preset(Path(source).stem, values, desc, algorithm_file=Path(source))
        else:
            pr = presets.Preset(name, values, desc)
        slot = self.active.upper()

        if source is not None:
            from ..outputs import OutputError, Outputs

            g = Outputs()  # never save over the algorithm file itself
            g.read("algorithm", source)
            g.write("save", target)
            try:
                g.check()
            except OutputError as e:
                raise ConsoleError(str(e)) from None

        def write():
            presets.save(pr, target)
            self.info(f"saved slot {slot} to {target}")

        if target.exists():
            self.ask("save", f"{target} exists: press y to replace it, any other key keeps it",
                     write)
            return
        write()

    # ---- questions ----------------------------------------------------------------------------
    def ask(self, kind, text, action):
        """Ask a yes/no question in the message area; :meth:`answer` runs ``action`` on yes.
        Unanswered after :data:`ASK_SECONDS`, the question lapses (nothing is done)."""
        self.question = (kind, text, action, float(self.clock()) + ASK_SECONDS)
        self.warn(text)

    def answer(self, yes) -> bool:
        """Answer the pending question; returns True when there was one."""
        q, self.question = self.question, None
        if q is None:
            return False
        if yes:
            try:
                q[2]()
            except Exception as e:
                self.fail(e)
        else:
            self.info({"quit": "not quitting: the sound goes on",
                       "save": "not saved: the file stays as it was"}.get(q[0], "cancelled"))
        return True

    # ---- quitting -----------------------------------------------------------------------------
    @property
    def sound_playing(self) -> bool:
        """True unless the engine says its stream is not running (an engine that cannot say
        counts as playing, so quitting asks)."""
        eng = self.engine
        if getattr(eng, "error", None):
            return False
        return getattr(eng, "stream", True) is not None

    def request_quit(self):
        """q or Ctrl+C: leave at once when no sound plays, otherwise ask first (a second q or
        Ctrl+C, or y, confirms; ``:quit`` typed out needs no question)."""
        if self.question is not None and self.question[0] == "quit":
            self.answer(True)
            return
        if not self.sound_playing:
            self.quit_requested = True
            return

        def leave():
            self.quit_requested = True
            self.info("quit")

        self.ask("quit", "sound is playing: press q (or Ctrl+C) again to stop it and leave, "
                 "any other key carries on", leave)

    # ---- output level -------------------------------------------------------------------------
    @property
    def output_level(self):
        """The output (monitor) level in dB (``-inf``: off), or None when the engine has none."""
        try:
            return float(self.engine.get(OUTPUT_LEVEL.name))
        except Exception:
            return None

    def set_output_level(self, value):
        """Set the output level from text or a number (dB, -60 to 0, or off)."""
        if self.output_level is None:
            raise ConsoleError("output: this engine has no output level control")
        v = OUTPUT_LEVEL.parse(value)
        self.engine.set(OUTPUT_LEVEL.name, v)
        self.info(f"output level {OUTPUT_LEVEL.format(v)}")

    def step_output(self, direction):
        """One :data:`OUTPUT_STEP_DB` step up or down; below -60 dB it is off."""
        cur = self.output_level
        if cur is None:
            raise ConsoleError("output: this engine has no output level control")
        lo, hi = OUTPUT_LEVEL.lo, OUTPUT_LEVEL.hi
        if direction > 0:
            new = lo if math.isinf(cur) else min(hi, cur + OUTPUT_STEP_DB)
        else:
            new = -math.inf if (math.isinf(cur) or cur - OUTPUT_STEP_DB < lo) else \
                cur - OUTPUT_STEP_DB
        self.set_output_level(new)

    # ---- algorithm, test sources --------------------------------------------------------------
    def change_algorithm(self, name_or_file):
        """Crossfade to another algorithm (a built-in name or an algorithm file) through the
        engine's swap; parameters both share keep their values."""
        swap = getattr(self.engine, "swap", None)
        if not callable(swap):
            raise ConsoleError("algorithm: this engine cannot change algorithm")
        old = self.algorithm.name
        info = swap(str(name_or_file).strip())
        self._rebind()
        carried = info.get("carried", []) if isinstance(info, dict) else []
        self.info(f"algorithm {self.algorithm.name} crossfaded in (was {old}); "
                  f"{len(carried)} shared value{'s' if len(carried) != 1 else ''} kept, "
                  "the others at their defaults")

    def change_precision(self, precision):
        """Crossfade to the running algorithm compiled in ``precision`` (float64 or float32):
        the engine's primed swap, the variant compiled before the callback sees it."""
        swap = getattr(self.engine, "swap", None)
        proc = getattr(self.engine, "proc", None)
        if not callable(swap) or proc is None:
            raise ConsoleError("precision: this engine cannot change precision")
        old = proc.precision
        if precision == old:
            self.info(f"precision: already {old}")
            return
        self.info(f"precision: compiling {self.algorithm.name} in {precision} ...")
        swap(proc.algorithm, precision=precision)
        self._rebind()
        self.info(f"precision {precision} crossfaded in (was {old}); values kept")

    def set_source(self, text):
        """``main|key KIND [ARGS]``: reprogram a test source (see
        :mod:`livedyn.control.sources`)."""
        which, _, rest = str(text).strip().partition(" ")
        which = which.lower()
        if which not in ("main", "key"):
            raise ConsoleError(f"source {which!r}: expected source main|key KIND, e.g. "
                               "source main tone 1000 -20")
        src = getattr(self.engine, f"{which}_source", None)
        if not hasattr(src, "program"):
            raise ConsoleError(f"source {which}: the {which} input is not a test source; start "
                               f"livedyn run with --test-{which} KIND to switch test signals")
        desc = src.program(rest)
        self.info(f"{which} input: {desc} (heard after the input buffer, up to 1 s)")

    # ---- MIDI learn and mappings ----------------------------------------------------------------
    def _midi(self, what):
        midi = getattr(self.controls, "midi", None)
        if midi is None:
            raise ConsoleError(f"{what}: no MIDI input; start livedyn run with --midi PORT "
                               "(livedyn devices lists the ports)")
        return midi

    def learn(self, target=None):
        """Map the next MIDI control that moves to ``target`` (default: the chosen
        parameter)."""
        midi = self._midi("learn")
        target = target or self.names[self.selected]
        self.controls.check_target(target)
        midi.learn(target)
        self.info(f"learn {target}: move a MIDI control (knob, fader, key or program change);"
                  " Esc cancels")

    def forget(self, target=None):
        midi = self._midi("forget")
        target = target or self.names[self.selected]
        n = midi.forget(target)
        self.info(f"{target}: {n} MIDI mapping{'s' if n != 1 else ''} removed")

    def mappings_command(self, text):
        midi = self._midi("mappings")
        verb, _, where = str(text).strip().partition(" ")
        if verb not in ("save", "load") or not where.strip():
            raise ConsoleError(f"mappings {text!r}: expected mappings save|load FILE")
        if verb == "save":
            path = midi.save_mappings(where.strip())
            self.info(f"saved {len(midi.mappings)} MIDI mappings to {path}")
        else:
            path = midi.load_mappings(where.strip())
            self.info(f"loaded {len(midi.mappings)} MIDI mappings from {path}")

    def midi_port(self, text=""):
        """``midi`` lists the MIDI input ports; ``midi PORT`` reads from that port instead
        (the mappings stay); ``midi off`` stops reading MIDI."""
        from ..control import midi as m

        text = str(text or "").strip()
        if not text:
            ports = m.list_ports()
            now = getattr(getattr(self.controls, "midi", None), "port_name", "") or "none"
            listed = "; ".join(f"{i}: {p['api']}: {p['name']}" for i, p in enumerate(ports))
            self.info(f"MIDI inputs: {listed or 'none (no JACK server or ALSA sequencer)'}; "
                      f"reading: {now}")
            return
        if self.controls is None:
            raise ConsoleError("midi: this console has no remote controls")
        old = self.controls.midi
        if text.lower() == "off":
            if old is None:
                raise ConsoleError("midi off: no MIDI input is open")
            old.stop()
            self.controls.midi = None
            self.info(f"MIDI: stopped reading {old.port_name} (its mappings are forgotten; "
                      "mappings save FILE keeps them)")
            return
        try:
            port, name = m.open_port(text, client="livedyn")
        except m.MidiError as e:
            raise ConsoleError(str(e).replace("--midi ", "midi ", 1)) from None
        kept = list(old.mappings) if old is not None else []
        if old is not None:
            old.stop()
        m.MidiControl(self.controls, port, kept, name).start()
        self.info(f"MIDI: reading {name} ({len(kept)} mapping{'s' if len(kept) != 1 else ''} "
                  "kept)")

    def mapping_label(self, name) -> str:
        midi = getattr(self.controls, "midi", None)
        return midi.label(name) if midi is not None else ""

    def _after_tick(self, now):
        q = self.question
        if q is not None and now > q[3]:
            self.answer(False)
        if self.controls is not None:
            self._take_remote()

    def _take_remote(self):
        """Changes and actions from MIDI and OSC: values show in the active slot, actions
        (slot, compare, presets, mute, bypass) run here as if typed."""
        take = self.controls.take_for_console()
        for name, v in take.values:
            if name in self.slots[self.active]:
                self.slots[self.active][name] = float(v)
        for verb, arg in take.actions:
            try:
                self._dispatch(cmds.Command(verb, arg))
            except Exception as e:
                self.fail(e)
        for level, text in take.notices:
            self.status = Status(one_line(text), level if level in ("info", "warn")
                                 else "error")

    def preset_names(self):
        from .. import presets

        try:
            return [n for n, _, alg in presets.list_presets(on_error=lambda m: None)
                    if alg == self.algorithm.name]
        except Exception:
            return []

    # ---- bypass, mute, monitor ----------------------------------------------------------------
    def set_bypass(self, on=None):
        on = (not self.bypassed) if on is None else bool(on)
        self.engine.bypass(on)
        self.bypassed = on
        self.info("bypass on: the input passes unprocessed" if on else "bypass off")

    def set_mute(self, on=None):
        on = (not self.muted) if on is None else bool(on)
        self.engine.mute(on)
        self.muted = on
        self.info("muted: every output is silent" if on else "mute off: mind the level")

    def set_monitor(self, mode):
        self.engine.monitor(mode)
        self.monitor_mode = mode
        what = {"out": "the processed output", "key": "the key input",
                "delta": "the delta (what the processor removes)"}[mode]
        self.info(f"monitor {mode}: you hear {what}")


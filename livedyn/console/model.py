"""Console state and commands, with no screen: testable alone.

:class:`ConsoleModel` holds what the console shows and does: the chosen parameter, two settings
slots, undo, the level-matched comparison, the command history, the status line and the latest
meter readings. It talks to the engine only through its control surface, duck-typed:

``set(name, value) -> seq``, ``get(name)``, ``snapshot() -> dict``, ``load_preset(name_or_path)``,
``bypass(on)``, ``mute(on)``, ``monitor(mode)`` and ``proc`` (``schema``, ``algorithm``,
``samplerate``, ``channels``, ``key_channels``). Optional: ``recent_input(seconds) ->
(main, key)`` (the last ``seconds`` of main input, float32 (frames, channels), and of the key
input or None) for level matching; ``watch()`` and ``error`` to notice a stream that stopped.
The console never calls ``stop()``: quitting leaves the engine to its owner.

Every public method that acts on the user's behalf either succeeds or leaves one line in
:attr:`ConsoleModel.status` saying what was wrong and what is allowed; none raises.

Steps (``nudge``) follow each parameter's taper; see :func:`step_value`.
"""
from __future__ import annotations

import math
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path

from ..params import KEY_EXTERNAL, LAW_DUCKER, ParamError
from . import commands as cmds

#: Small and large steps of a linear parameter by unit (a choice of this console).
LINEAR_STEPS = {"dBFS": (0.5, 3.0), "dB": (0.5, 3.0), "%": (1.0, 10.0), "ms": (0.1, 1.0)}
#: Factor of a small and a large geometric step: 20 and 5 steps per decade.
FINE_FACTOR = 10.0 ** (1.0 / 20.0)
COARSE_FACTOR = 10.0 ** (1.0 / 5.0)
#: Smallest non-zero value a log-taper parameter with a lower bound of 0 steps to (ms).
LOG_FLOOR = 0.1
#: Largest finite ratio a step reaches; one more step up gives an infinite ratio.
RATIO_TOP = 100.0
#: Seconds of input the level match measures, and the least it accepts.
MATCH_SECONDS = 4.0
MATCH_MIN_SECONDS = 1.0
#: Seconds of gain-reduction history kept for the strip.
GR_HISTORY_SECONDS = 6.0
#: Fall rate of the displayed operating point, dB/s (like the level meter's bar; common
#: practice, no source).
POINT_FALL_DB_PER_S = 20.0
#: Gate of BS.1770-4 (absolute, LUFS): a render quieter than this cannot be measured.
ABS_GATE_LUFS = -70.0
FLOOR_DB = -200.0
UNDO_DEPTH = 200
HISTORY_DEPTH = 200


class ConsoleError(Exception):
    """A console action that cannot be done; the message is one line for the status area."""


@dataclass
class Status:
    """The one status line: ``kind`` is "info", "warn" or "error"."""

    text: str
    kind: str = "info"


def _round_sig(v: float, digits: int = 4) -> float:
    if v == 0 or math.isinf(v):
        return v
    return round(v, digits - 1 - int(math.floor(math.log10(abs(v)))))


def step_value(prm, v: float, direction: int, coarse: bool = False) -> float:
    """The value one step up (``direction`` > 0) or down from ``v``, following the taper.

    * ``linear``: add or subtract a fixed step (:data:`LINEAR_STEPS` by unit, otherwise 1/100
      and 1/10 of the range), rounded to 1e-6.
    * ``log`` (times, frequencies, Q): multiply or divide by :data:`FINE_FACTOR` or
      :data:`COARSE_FACTOR`, rounded to 4 significant digits. A parameter whose range starts at
      0 steps between 0 and :data:`LOG_FLOOR`; a filter with an off value goes off below its
      lowest frequency and comes back at it.
    * ``slope`` (ratio): the step acts in slope space, on ``u = 1 - s = 1/ratio`` (the output dB
      per input dB above threshold): up divides ``u`` by the factor, down multiplies it, so the
      ratio moves geometrically; past :data:`RATIO_TOP` the slope reaches 1 (ratio inf) and one
      step down from inf gives :data:`RATIO_TOP`. The ratio is rounded to 4 significant digits.
    * ``choice``: the next or previous choice, wrapping around.

    The result is clamped to the parameter's range.
    """
    d = 1 if direction > 0 else -1
    v = float(v)
    if prm.taper == "choice":
        return float((int(v) + d) % len(prm.choices))
    factor = COARSE_FACTOR if coarse else FINE_FACTOR
    if prm.taper == "slope":
        u = 0.0 if math.isinf(v) else 1.0 / v
        if d > 0:
            u = u / factor
            if u < (1.0 / RATIO_TOP) * (1.0 - 1e-9):
                u = 0.0
        else:
            u = 1.0 / RATIO_TOP if u == 0.0 else min(1.0, u * factor)
        r = math.inf if u == 0.0 else _round_sig(1.0 / u)
        return min(max(r, prm.lo), prm.hi)
    if prm.taper == "log":
        is_off = prm.off_value is not None and v == prm.off_value
        floor = prm.lo if prm.lo > 0 else LOG_FLOOR
        if d > 0:
            if is_off or v < floor:
                return floor
            new = v * factor
        else:
            if is_off:
                return v
            if v <= floor:
                if prm.off_value is not None:
                    return float(prm.off_value)
                return float(prm.lo)
            new = max(v / factor, floor)
        return min(max(_round_sig(new), floor), prm.hi)
    small, large = LINEAR_STEPS.get(prm.unit, ((prm.hi - prm.lo) / 100.0,
                                               (prm.hi - prm.lo) / 10.0))
    new = round(v + d * (large if coarse else small), 6)
    return min(max(new, prm.lo), prm.hi)


def one_line(err) -> str:
    """An exception (or text) as one status line."""
    text = str(err).strip()
    line = text.splitlines()[0] if text else ""
    if isinstance(err, (ParamError, ConsoleError, cmds.CommandError)):
        return line or type(err).__name__
    name = type(err).__name__ if isinstance(err, BaseException) else ""
    return f"{name}: {line}" if name and line else (line or name or "error")


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


class ConsoleModel:
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
    """

    def __init__(self, engine, title="livedyn console", clock=time.monotonic, check=None,
                 match_seconds=MATCH_SECONDS):
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

        self.view = "list"  # "list", "command" or "help"
        self.selected = 0
        self.list_top = 0
        self.help_top = 0
        self.quit_requested = False
        current = {n: float(engine.get(n)) for n in self.names}
        self.slots = {"a": dict(current), "b": dict(current)}
        self.active = "a"
        self.undo_stacks = {"a": [], "b": []}
        self.match = False
        self.trims = {"a": 0.0, "b": 0.0}
        self.loudness = {"a": None, "b": None}
        self.trim_limited = False
        self._match_measured_s = 0.0
        self.history = []
        self._hist_i = 0
        self._hist_draft = ""
        self.last_seq = None
        self.snap = {}
        self.gr_history = deque()
        self._point = {"x": None, "y": None, "key": None, "t": None}
        self._reported_error = None
        snap = self._safe_snapshot() or {}
        self.bypassed = bool(snap.get("bypassed", False))
        self.muted = bool(snap.get("muted", False))
        self.monitor_mode = str(snap.get("monitor", "out"))
        self.status = Status("Loud monitoring can damage hearing; beware feedback; follow "
                             "venue rules (? help)", "warn")

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
            self._apply(entry)
            self._after_change()
            shown = ", ".join(f"{n} {self.schema[n].format(v)}" for n, v in entry.items())
            self.info(f"undo: {shown}")
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
        values (without any match trim)."""
        from ..processor import Processor

        p = Processor(self.algorithm, self.samplerate, self.proc.channels,
                      getattr(self.proc, "key_channels", 0))
        values = dict(self.slots[slot])
        progress = True
        errors = {}
        while values and progress:  # same pass order rule as _apply
            progress = False
            for n in list(values):
                try:
                    p.set(n, values[n])
                except ParamError as e:
                    errors[n] = e
                    continue
                del values[n]
                progress = True
        if values:
            raise errors[next(iter(values))]
        if "key" in self.schema and int(self.slots[slot]["key"]) == KEY_EXTERNAL and key is None:
            raise ConsoleError("match: the key input is needed (key = external) but the engine "
                               "gave no recent key input")
        return p.process(main, key if p.key_channels else None)

    def _measure_match(self):
        """Measure both slots on the recent input and set :attr:`trims`.

        Each slot's values process the same recent input offline; the integrated loudness of
        each output (ITU-R BS.1770-4, :func:`livedyn.meters.integrated_loudness`) is compared
        and the louder slot gets a negative trim of the difference, applied on its makeup.
        """
        from ..meters import integrated_loudness

        main, key = self._recent_input()
        loud = {}
        for s in ("a", "b"):
            y = self.render_slot(s, main, key)
            loud[s] = float(integrated_loudness(y, self.samplerate))
        quiet = [s.upper() for s, v in loud.items() if not v > ABS_GATE_LUFS]
        if quiet:
            raise ConsoleError(f"match: slot {' and '.join(quiet)} measures below the "
                               f"{ABS_GATE_LUFS:g} LUFS gate of BS.1770 on the recent input; "
                               "play something and try again")
        d = loud["a"] - loud["b"]
        self.loudness = loud
        self.trims = {"a": 0.0 - max(d, 0.0), "b": 0.0 - max(-d, 0.0)}  # no "-0.0"
        self._match_measured_s = len(main) / self.samplerate
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
        """Write the active slot's values (makeup without the match trim) as a preset file."""
        from .. import algorithms, presets

        name = getattr(self.algorithm, "name", "")
        source = getattr(self.algorithm, "source", None)
        if name not in algorithms.BUILTINS and source is None:
            raise ConsoleError(f"save: {name!r} is neither built in nor an algorithm file")
        target = Path(str(path)).expanduser()
        if target.suffix == "":
            target = target.with_name(target.name + presets.SUFFIX)
        desc = f"saved from the console, slot {self.active.upper()}"
        if source is not None:  # the preset names the file and carries its values
            pr = presets.Preset(Path(source).stem, dict(self.slots[self.active]), desc,
                                algorithm_file=Path(source))
        else:
            pr = presets.Preset(name, dict(self.slots[self.active]), desc)
        if source is not None:
            from ..outputs import OutputError, Outputs

            g = Outputs()  # never save over the algorithm file itself
            g.read("algorithm", source)
            g.write("save", target)
            try:
                g.check()
            except OutputError as e:
                raise ConsoleError(str(e)) from None
        presets.save(pr, target)
        self.info(f"saved slot {self.active.upper()} to {target}")

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

    # ---- the command line ---------------------------------------------------------------------
    def begin_edit(self) -> str:
        """Open the command line for a value of the selected parameter; returns its text."""
        prm = self.param
        self.view = "command"
        self.info(f"type a value for {prm.name}: {prm.describe_range()} (now "
                  f"{prm.format(self.value(prm.name))}); Enter sets, Esc cancels")
        return prm.name + " "

    def begin_command(self) -> str:
        self.view = "command"
        self.info("type a command (Tab completes, Up/Down recall, Esc cancels, help lists all)")
        return ""

    def cancel_command(self):
        self.view = "list"
        self._hist_i = len(self.history)
        self.info("")

    def run_command(self, line) -> None:
        """Run one command line; the outcome is in :attr:`status`, never an exception."""
        text = " ".join(str(line).split())
        self.view = "list"
        if text:
            if not self.history or self.history[-1] != text:
                self.history.append(text)
                del self.history[:-HISTORY_DEPTH]
        self._hist_i = len(self.history)
        try:
            cmd = cmds.parse(text, self.names)
            if cmd is not None:
                self._dispatch(cmd)
        except Exception as e:
            self.fail(e)

    def _dispatch(self, cmd):
        v, arg = cmd.verb, cmd.arg
        onoff = {"on": True, "off": False, "": None}
        if v == "set":
            self.select(cmd.name)
            self.set_param(cmd.name, arg)
        elif v == "load":
            self.load(arg)
        elif v == "save":
            self.save(arg)
        elif v == "bypass":
            self.set_bypass(onoff[arg])
        elif v == "mute":
            self.set_mute(onoff[arg])
        elif v == "monitor":
            self.set_monitor(arg)
        elif v == "slot":
            self.switch_slot(arg)
        elif v == "compare":
            self.compare()
        elif v == "match":
            self.set_match(arg != "off")
        elif v == "undo":
            self.undo()
        elif v == "help":
            self.open_help()
        elif v == "quit":
            self.quit_requested = True
            self.info("quit")
        else:  # parse() only returns the verbs above
            raise ConsoleError(f"unknown command {v!r}")

    def complete(self, line) -> str:
        """Complete the last word of ``line``; several fits are listed in the status line."""
        try:
            c = cmds.complete(line, self.schema, self.preset_names())
        except Exception as e:
            self.fail(e)
            return line
        if len(c.candidates) > 1:
            shown = c.candidates[:12]
            more = len(c.candidates) - len(shown)
            self.info("  ".join(shown) + (f"  (+{more} more)" if more else ""))
        elif not c.candidates:
            self.warn("no completion")
        return c.line

    def history_back(self, current="") -> str:
        if not self.history:
            return current
        if self._hist_i >= len(self.history):
            self._hist_draft = current
        self._hist_i = max(0, self._hist_i - 1)
        return self.history[self._hist_i]

    def history_forward(self, current="") -> str:
        if self._hist_i >= len(self.history):
            return current
        self._hist_i += 1
        if self._hist_i >= len(self.history):
            return self._hist_draft
        return self.history[self._hist_i]

    # ---- help ---------------------------------------------------------------------------------
    def help_lines(self):
        return cmds.help_lines(self.schema, self.algorithm.name)

    def open_help(self):
        self.view = "help"
        self.help_top = 0
        self.info("help: Up/Down/PgUp/PgDn scroll, Esc closes")

    def close_help(self):
        self.view = "list"
        self.info("")

    def scroll_help(self, delta, rows=20):
        n = len(self.help_lines())
        self.help_top = max(0, min(max(0, n - rows), self.help_top + int(delta)))

    def request_quit(self):
        self.quit_requested = True

    # ---- meters -------------------------------------------------------------------------------
    def _safe_snapshot(self):
        try:
            return self.engine.snapshot()
        except Exception as e:
            self.status = Status(f"meters: {one_line(e)}", "error")
            return None

    def tick(self):
        """Read the engine's meters once (call at >= 20 Hz); never raises."""
        try:
            self._tick()
        except Exception as e:
            self.fail(e)

    def _tick(self):
        now = float(self.clock())
        snap = self._safe_snapshot()
        if snap is None:
            return
        self.snap = snap
        self.bypassed = bool(snap.get("bypassed", self.bypassed))
        self.muted = bool(snap.get("muted", self.muted))
        gr = float(snap.get("gain_reduction_db", 0.0) or 0.0)
        self.gr_history.append((now, gr))
        while self.gr_history and self.gr_history[0][0] < now - GR_HISTORY_SECONDS:
            self.gr_history.popleft()
        self._update_point(now, snap, gr)
        err = None
        watch = getattr(self.engine, "watch", None)
        if callable(watch):
            watch()
        take = getattr(self.engine, "take_notices", None)
        if callable(take):
            for level, text in take():
                self.status = Status(one_line(text), level if level in ("info", "warn")
                                     else "error")
        if getattr(self.engine, "proc", self.proc) is not self.proc:
            self._rebind()
        e = getattr(self.engine, "error", None)
        if e:
            err = f"stream stopped: {e}"
        if err is None and self.check is not None:
            c = self.check()
            if c:
                err = str(c)
        if err and err != self._reported_error:
            self._reported_error = err
            self.status = Status(one_line(err) + " (quit with q)", "error")

    def _update_point(self, now, snap, gr):
        def top(values):
            vals = [float(v) for v in (values or []) if v is not None]
            return max(vals) if vals else None

        key = top(snap.get("peak_key_dbfs"))
        main = top(snap.get("peak_in_dbfs"))
        out = top(snap.get("peak_out_dbfs"))
        p = self._point
        dt = 0.0 if p["t"] is None else max(0.0, now - p["t"])
        fall = POINT_FALL_DB_PER_S * dt

        def ballistic(old, new):  # instant rise, fall at POINT_FALL_DB_PER_S
            if new is None:
                return old
            if old is None:
                return new
            return max(new, old - fall)

        p["key"] = ballistic(p["key"], key)
        ducker = self.algorithm.law == LAW_DUCKER and self.algorithm.kind != "limiter"
        if ducker or self.key_driven:
            x = p["key"]
            from ..analysis import DUCKER_MAIN_DB

            if x is not None:
                base = DUCKER_MAIN_DB if ducker else x
                mk = self.live_value("makeup") if "makeup" in self.schema else 0.0
                p["x"], p["y"] = x, base - gr + mk
        else:
            p["x"] = ballistic(p["x"], main)
            p["y"] = ballistic(p["y"], out)
        p["t"] = now

    def gr_strip(self, columns: int, seconds: float = 5.0):
        """Largest gain reduction per column over the last ``seconds`` (oldest first), dB;
        None before the first reading."""
        columns = max(1, int(columns))
        now = self.gr_history[-1][0] if self.gr_history else float(self.clock())
        start = now - seconds
        out = [None] * columns
        for t, g in self.gr_history:
            if t < start:
                continue
            i = min(columns - 1, int((t - start) / seconds * columns))
            out[i] = g if out[i] is None else max(out[i], g)
        # a column no reading fell in (a late redraw) takes its left neighbour's value
        seen = [i for i, v in enumerate(out) if v is not None]
        if seen:
            for i in range(seen[0] + 1, seen[-1]):
                if out[i] is None:
                    out[i] = out[i - 1]
        return out

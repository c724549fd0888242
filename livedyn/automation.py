"""Automation: parameter changes stamped with the frame at which they take effect.

Text format (version 1)
-----------------------
UTF-8 text, one item per line; ``#`` starts a comment, blank lines are ignored. The first
line that is not blank or a comment is the header::

    livedyn-automation 1 samplerate=48000

then events, in any order::

    # FRAME  PARAMETER  VALUE                     a step: the value holds from FRAME on
    0        threshold  -20
    48000    ratio      4:1
    96000    detector   rms
    # F0..F1 PARAMETER  A -> B                    a ramp from A at F0 to B at F1
    96000..144000 ratio 1 -> inf

Frames are whole numbers >= 0, counted from the first frame of the signal at the header's
sample rate (checking that rate against the audio is the caller's job: compare
:attr:`Automation.samplerate`). Values are read with :meth:`livedyn.params.Param.parse` of the
algorithm's schema, so ``-18 dBFS``, ``4:1``, ``inf``, ``off`` and choice names work.

A ramp stands for steps every :data:`RAMP_STEP` frames from F0 on, plus an exact final step with
B at F1; they are made while the events are read (lazily), so a ramp costs memory and time for
the frames actually processed, not for the frames it spans. The value moves linearly, except ``ratio`` (the "slope" taper), which
moves linearly in the slope ``1 - 1/ratio`` so that a ramp to ``inf`` is possible (halfway
between 1:1 and inf:1 is 2:1). Choices and "off" cannot be ramped.

Ordering: lines need not be in frame order. Events are sorted by frame; events at the same frame
keep the order of their lines (the last one wins). A step strictly inside a ramp of the same
parameter, and two overlapping ramps of one parameter, are refused as mistakes.

Every error is one line ``FILE:LINE: what is wrong, what was expected``
(:class:`AutomationError`).
"""
from __future__ import annotations

import bisect
import math
import re
from pathlib import Path

import numpy as np

from .params import ParamError, Schema, ratio_to_slope, slope_to_ratio
from .files import read_text_file, target_problem, write_text_atomic

__all__ = [
    "RAMP_STEP",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "Automation",
    "AutomationError",
    "AutomationCursor",
    "expand_ramp",
    "run_with_automation",
]

#: Frames between the steps a ramp is expanded into (a choice of ours: 0.33 ms at 48 kHz, well
#: below the 10 ms glide the kernels apply to sample-updated parameters, so the steps are
#: inaudible, and few enough events that a long ramp stays cheap).
RAMP_STEP = 16
FORMAT_NAME = "livedyn-automation"
FORMAT_VERSION = 1
#: Larger files are refused before parsing.
MAX_BYTES = 64 << 20

_FRAME_RE = re.compile(r"[0-9]+")
_MAX_FRAME = 2**62


class AutomationError(ParamError):
    """An automation file or event that cannot be used; the message is one line."""


def expand_ramp(param, f0: int, f1: int, a: float, b: float, step: int = RAMP_STEP) -> list:
    """Steps for a ramp of ``param`` from value ``a`` at frame ``f0`` to ``b`` at ``f1``.

    Parameters
    ----------
    param : livedyn.params.Param
        The parameter; its taper decides the interpolation (``"slope"``: linear in
        ``1 - 1/ratio``; otherwise linear in the value).
    f0, f1 : int
        First and last frame, ``f1 > f0``.
    a, b : float
        Start and end values as stored (already parsed and in range).
    step : int
        Frames between steps.

    Returns
    -------
    list of (frame, name, value)
        At ``f0, f0 + step, ...`` (all ``< f1``) and exactly ``b`` at ``f1``; the first value is
        exactly ``a``.
    """
    if f1 <= f0:
        raise ValueError(f"ramp frames {f0}..{f1}: expected the end after the start")
    if param.taper == "choice":
        raise ValueError(f"{param.name}: a choice cannot be ramped, expected a step")
    slope = param.taper == "slope"
    if slope:
        ua, ub = ratio_to_slope(a), ratio_to_slope(b)
    else:
        ua, ub = float(a), float(b)
    lo, hi = min(ua, ub), max(ua, ub)
    span = f1 - f0
    out = [(f0, param.name, float(a))]
    for f in range(f0 + step, f1, step):
        u = ua + (ub - ua) * ((f - f0) / span)
        u = min(max(u, lo), hi)
        v = slope_to_ratio(u) if slope else u
        out.append((f, param.name, param.check(v)))
    out.append((f1, param.name, float(b)))
    return out


def ramp_count(f0: int, f1: int, step: int = RAMP_STEP) -> int:
    """Number of steps :func:`expand_ramp` gives for ``f0..f1`` (without making them)."""
    return 1 + len(range(f0 + step, f1, step)) + 1


def iter_ramp(param, f0: int, f1: int, a: float, b: float, step: int = RAMP_STEP,
              start: int = 0):
    """The steps of :func:`expand_ramp` one at a time, from the first at or after frame
    ``start``: memory does not grow with the ramp's length."""
    slope = param.taper == "slope"
    ua, ub = (ratio_to_slope(a), ratio_to_slope(b)) if slope else (float(a), float(b))
    lo, hi = min(ua, ub), max(ua, ub)
    span = f1 - f0
    if start <= f0:
        yield (f0, param.name, float(a))
    k = max(1, -(-(start - f0) // step))
    for f in range(f0 + k * step, f1, step):
        u = ua + (ub - ua) * ((f - f0) / span)
        u = min(max(u, lo), hi)
        v = slope_to_ratio(u) if slope else u
        yield (f, param.name, param.check(v))
    if start <= f1:
        yield (f1, param.name, float(b))


def _keyed(order, events):
    for j, (f, n, v) in enumerate(events):
        yield (f, order, j, n, v)


class _Events:
    """The events of an :class:`Automation` in order, made on demand.

    Steps are stored; a ramp is stored as its line (frames and end values) and expanded while
    it is read, so memory is proportional to the lines of the file, not to the frames a ramp
    spans. Sorted by frame; equal frames keep the order of their lines (then of the ramp's own
    steps). Compares equal to a list of the same ``(frame, name, value)`` tuples.
    """

    def __init__(self):
        self.steps = []  # (frame, order, name, value), sorted by (frame, order)
        self.ramps = []  # (f0, order, f1, param, a, b)
        self.order = 0

    def _sources(self, start=0):
        i = bisect.bisect_left(self.steps, start, key=lambda e: e[0])
        yield ((f, o, 0, n, v) for f, o, n, v in self.steps[i:])
        for f0, o, f1, param, a, b in self.ramps:
            if f1 >= start:
                yield _keyed(o, iter_ramp(param, f0, f1, a, b, start=start))

    def iter_from(self, start=0):
        """Events with ``frame >= start``, in order."""
        import heapq

        for f, _, _, n, v in heapq.merge(*self._sources(start), key=lambda e: e[:3]):
            yield (f, n, v)

    def __iter__(self):
        return self.iter_from(0)

    def __len__(self):
        return len(self.steps) + sum(ramp_count(r[0], r[2]) for r in self.ramps)

    def __getitem__(self, i):
        if isinstance(i, slice) or i < 0:
            return list(self)[i]
        import itertools

        for ev in itertools.islice(self, i, None):
            return ev
        raise IndexError(i)

    def __eq__(self, other):
        if isinstance(other, (_Events, list, tuple)):
            return list(self) == list(other)
        return NotImplemented

    def __repr__(self):
        return f"<{len(self.steps)} steps and {len(self.ramps)} ramps>"


class Automation:
    """Frame-stamped parameter changes for one signal.

    Parameters
    ----------
    samplerate : int
        Sample rate the frames count at.
    events : iterable of (frame, name, value), optional
        Sorted here (stably) by frame.
    schema : livedyn.params.Schema, optional
        Needed to parse text values in :meth:`add` and to write choices by name in :meth:`save`;
        when given, every event is checked against it.

    Attributes
    ----------
    samplerate : int
    events : list of (int, str, float)
        Sorted by frame; equal frames keep insertion order.
    schema : Schema or None
    source : pathlib.Path or None
        The file it was loaded from.
    """

    def __init__(self, samplerate, events=(), schema: Schema | None = None):
        if isinstance(samplerate, bool) or not float(samplerate).is_integer() or samplerate <= 0:
            raise AutomationError(
                f"samplerate = {samplerate!r}: expected a whole number of Hz above 0")
        self.samplerate = int(samplerate)
        self.schema = schema
        self.source = None
        self._ev = _Events()
        evs = []
        for frame, name, value in events:
            evs.append(self._event(frame, name, value))
        self.events = evs

    @property
    def events(self) -> _Events:
        """All events in order (ramps expanded while read)."""
        return self._ev

    @events.setter
    def events(self, evs):
        """Replace every event by the steps ``evs`` (sorted here, stably, by frame)."""
        self._ev = _Events()
        self._ev.steps = [(f, i, n, v) for i, (f, n, v) in enumerate(evs)]
        self._ev.steps.sort(key=lambda e: e[0])
        self._ev.order = len(self._ev.steps)

    # -- building ------------------------------------------------------------------------------
    def _event(self, frame, name, value):
        if isinstance(frame, bool) or not isinstance(frame, (int, np.integer)):
            if not (isinstance(frame, float) and frame.is_integer()):
                raise AutomationError(f"frame {frame!r}: expected a whole number >= 0")
        frame = int(frame)
        if frame < 0:
            raise AutomationError(f"frame {frame}: expected a whole number >= 0")
        name = str(name)
        if self.schema is not None:
            try:
                p = self.schema[name]
                v = p.parse(value) if isinstance(value, str) else p.check(value)
            except AutomationError:
                raise
            except ParamError as e:
                raise AutomationError(f"frame {frame}: {e}") from None
        else:
            if isinstance(value, str):
                raise AutomationError(
                    f"{name} = {value!r}: text values need the algorithm's schema, "
                    f"expected a number")
            v = float(value)
            if math.isnan(v):
                raise AutomationError(f"{name} = nan: expected a number")
        return (frame, name, float(v))

    def add(self, frame, name, value) -> None:
        """Record a step: ``name`` becomes ``value`` at ``frame``.

        Kept sorted; after any events already at ``frame`` (the new one wins). ``value`` may be
        text (parsed with the schema) or a stored float (checked against the schema if any).
        """
        f, n, v = self._event(frame, name, value)
        e = self._ev
        e.order += 1
        bisect.insort(e.steps, (f, e.order, n, v), key=lambda t: (t[0], t[1]))

    def events_between(self, f0: int, f1: int) -> list:
        """Events with ``f0 <= frame < f1``, in order."""
        out = []
        for ev in self._ev.iter_from(max(0, f0)):
            if ev[0] >= f1:
                break
            out.append(ev)
        return out

    def __len__(self):
        return len(self.events)

    def __iter__(self):
        return iter(self._ev)

    def __repr__(self):
        return f"Automation(samplerate={self.samplerate}, {len(self._ev)} events)"

    # -- files ---------------------------------------------------------------------------------
    @classmethod
    def load(cls, path, schema: Schema) -> "Automation":
        """Read an automation file, checking every value against ``schema``.

        Raises
        ------
        AutomationError
            ``FILE:LINE: ...`` for the first bad line (or ``FILE: ...`` for the file itself).
        """
        name = str(path)
        text = read_text_file(path, AutomationError, "automation", MAX_BYTES)
        from .limits import check_lines

        check_lines(name, text, AutomationError)
        samplerate = None
        lazy = _Events()
        steps = {}  # name -> list of (frame, line)
        ramps = {}  # name -> list of (f0, f1, line)
        order = 0
        for lineno, raw in enumerate(text.splitlines(), 1):
            line = raw.split("#", 1)[0].strip()
            if not line:
                continue

            def fail(msg):
                return AutomationError(f"{name}:{lineno}: {msg}")

            if samplerate is None:
                samplerate = _parse_header(line, fail)
                continue
            toks = line.split()
            if len(toks) < 3:
                raise fail(f"{line!r}: expected 'FRAME PARAMETER VALUE' or "
                           f"'F0..F1 PARAMETER A -> B'")
            ftext, pname = toks[0], toks[1]
            rest = line.split(None, 2)[2]
            if pname not in schema:
                raise fail(f"unknown parameter {pname!r}: expected one of "
                           f"{', '.join(schema.names())}")
            p = schema[pname]
            if ".." in ftext:
                t0, _, t1 = ftext.partition("..")
                f0, f1 = _parse_frame(t0, fail), _parse_frame(t1, fail)
                if f1 <= f0:
                    raise fail(f"ramp {ftext}: expected the end frame after the start frame")
                if p.taper == "choice":
                    raise fail(f"{pname}: a choice cannot be ramped, expected a step "
                               f"'FRAME {pname} VALUE' ({p.describe_range()})")
                parts = rest.split("->")
                if len(parts) != 2 or not parts[0].strip() or not parts[1].strip():
                    raise fail(f"ramp values {rest!r}: expected 'A -> B'")
                a, b = (_parse_value(p, t.strip(), fail) for t in parts)
                if p.off_value is not None and p.off_value in (a, b):
                    rng = p.describe_range().split(" or off")[0].removeprefix("expected ")
                    raise fail(f"{pname}: cannot ramp from or to off, expected values {rng}")
                lazy.ramps.append((f0, order, f1, p, a, b))  # expanded while read
                order += 1
                ramps.setdefault(pname, []).append((f0, f1, lineno))
            else:
                f = _parse_frame(ftext, fail)
                if "->" in rest:
                    raise fail(f"{rest!r}: a ramp needs frames 'F0..F1', got the single "
                               f"frame {ftext}")
                v = _parse_value(p, rest, fail)
                lazy.steps.append((f, order, pname, v))
                order += 1
                steps.setdefault(pname, []).append((f, lineno))
        if samplerate is None:
            raise AutomationError(f"{name}: no header, expected a first line "
                                  f"'{FORMAT_NAME} {FORMAT_VERSION} samplerate=RATE'")
        _check_overlaps(name, steps, ramps)
        lazy.steps.sort(key=lambda e: (e[0], e[1]))
        lazy.ramps.sort(key=lambda r: r[1])
        lazy.order = order
        out = cls(samplerate, (), schema)
        out._ev = lazy
        out.source = Path(path)
        return out

    def dumps(self) -> str:
        """The text :meth:`save` writes: the header and one step per event."""
        lines = [
            f"{FORMAT_NAME} {FORMAT_VERSION} samplerate={self.samplerate}",
            "# FRAME PARAMETER VALUE (a step); F0..F1 PARAMETER A -> B (a ramp, every "
            f"{RAMP_STEP} frames)",
        ]
        def text(n, v):
            p = self.schema.params.get(n) if self.schema is not None else None
            if p is not None and p.off_value is not None and v == p.off_value:
                return "off"
            if p is not None:
                return p.to_text(v)
            return "inf" if math.isinf(v) else repr(float(v))

        # in the order of their lines: the same order of events at equal frames on reload
        items = [(o, f"{f} {n} {text(n, v)}") for f, o, n, v in self._ev.steps]
        items += [(o, f"{f0}..{f1} {p.name} {text(p.name, a)} -> {text(p.name, b)}")
                  for f0, o, f1, p, a, b in self._ev.ramps]
        items.sort(key=lambda t: t[0])
        lines += [t for _, t in items]
        return "\n".join(lines) + "\n"

    def save(self, path) -> None:
        """Write all events as steps, atomically (see :func:`livedyn.files.write_text_atomic`).

        Loading the file with the same schema gives the same events.
        """
        name = str(path)
        target = Path(path)
        problem = target_problem(target, "automation file")
        if problem:
            raise AutomationError(f"{name}: {problem}")
        text = self.dumps()
        try:
            write_text_atomic(target, text)
        except OSError as e:
            raise AutomationError(f"{name}: cannot write: {e.strerror or e}") from None


def _parse_header(line, fail) -> int:
    toks = line.split()
    expected = f"expected '{FORMAT_NAME} {FORMAT_VERSION} samplerate=RATE'"
    if not toks or toks[0] != FORMAT_NAME:
        raise fail(f"{line!r}: not an automation header, {expected}")
    if len(toks) != 3:
        raise fail(f"header {line!r}: {expected}")
    if toks[1] != str(FORMAT_VERSION):
        raise fail(f"version {toks[1]!r}: unsupported, expected {FORMAT_VERSION}")
    key, eq, val = toks[2].partition("=")
    if key != "samplerate" or not eq:
        raise fail(f"header {line!r}: {expected}")
    if not _FRAME_RE.fullmatch(val) or int(val) <= 0:
        raise fail(f"samplerate={val}: expected a whole number of Hz above 0")
    return int(val)


def _parse_frame(text, fail) -> int:
    if not _FRAME_RE.fullmatch(text):
        raise fail(f"frame {text[:40]!r}: expected a whole number >= 0")
    if len(text.lstrip("0")) > len(str(_MAX_FRAME)):
        raise fail(f"frame of {len(text)} digits: too large, expected at most {_MAX_FRAME}")
    f = int(text)
    if f > _MAX_FRAME:
        raise fail(f"frame {text}: too large, expected at most {_MAX_FRAME}")
    return f


def _parse_value(p, text, fail) -> float:
    try:
        return p.parse(text)
    except ParamError as e:
        raise fail(str(e)) from None


def _check_overlaps(name, steps, ramps):
    for pname, spans in ramps.items():
        spans = sorted(spans)
        for (a0, a1, la), (b0, b1, lb) in zip(spans, spans[1:]):
            if b0 < a1:
                first, second = sorted((la, lb))
                raise AutomationError(
                    f"{name}:{second}: ramp of {pname} {b0}..{b1} overlaps the ramp "
                    f"{a0}..{a1} on line {first}, expected ramps of one parameter not to overlap")
        starts = [s[0] for s in spans]
        for f, lf in steps.get(pname, ()):
            i = bisect.bisect_right(starts, f) - 1
            # only the ramp starting last before f can contain it (ramps do not overlap)
            if i >= 0 and spans[i][0] < f < spans[i][1]:
                r0, r1, lr = spans[i]
                raise AutomationError(
                    f"{name}:{lf}: step of {pname} at frame {f} falls inside the ramp "
                    f"{r0}..{r1} on line {lr}, expected it before or after the ramp")


# ---------------------------------------------------------------------------------------------
# Applying automation while processing


class AutomationCursor:
    """Walks an automation along consecutive blocks, splitting them at event frames.

    Parameters
    ----------
    automation : Automation, list of (frame, name, value), or None
        The events (sorted by frame). None: no events.

    Notes
    -----
    :meth:`split` is called with the absolute frame range of each block in order. Every event
    is handed out exactly once, before the first frame at or after its own frame: an event at
    frame F is applied before frame F is processed, whatever the block size. Events before the
    first block (or in a gap between blocks) are applied at the start of the next block.
    """

    def __init__(self, automation):
        if automation is None:
            it = iter(())
        elif isinstance(automation, Automation):
            it = iter(automation.events)  # ramps expand as the blocks reach them
        else:
            it = iter(sorted(list(automation), key=lambda e: e[0]))
        self._it = it
        self._next = next(it, None)
        self._handed = 0
        self._total = len(automation) if automation is not None else 0
        self._pos = 0

    @property
    def position(self) -> int:
        """End frame of the last block split."""
        return self._pos

    @property
    def pending(self) -> int:
        """Events not yet handed out."""
        return self._total - self._handed

    def split(self, start: int, stop: int) -> list:
        """Sub-ranges of the block ``[start, stop)`` with the events due before each.

        Returns
        -------
        list of (sub_start, sub_stop, events)
            Consecutive ranges covering ``[start, stop)``; ``events`` (a list of
            ``(frame, name, value)``, possibly empty) are to be applied, in order, before
            processing ``sub_start``. A range ends just before the next event frame.
        """
        start, stop = int(start), int(stop)
        if stop < start:
            raise ValueError(f"block {start}..{stop}: expected stop >= start")
        if start < self._pos:
            raise ValueError(
                f"block starts at frame {start}, before the end of the previous block "
                f"({self._pos}): expected blocks in order")
        out = []
        pos = start
        while pos < stop:
            due = []
            while self._next is not None and self._next[0] <= pos:
                due.append(self._next)
                self._next = next(self._it, None)
            self._handed += len(due)
            nxt = self._next[0] if self._next is not None and self._next[0] < stop else stop
            out.append((pos, nxt, due))
            pos = nxt
        self._pos = max(self._pos, stop)
        return out


def run_with_automation(process_fn, set_fn, x, key, automation, blocksize: int):
    """Process ``x`` block by block, applying automation exactly at its frames.

    Parameters
    ----------
    process_fn : callable
        ``process_fn(x_part, key_part) -> y_part``: float32 arrays ``(frames, ch)``; ``y_part``
        must have as many frames as ``x_part``. ``key_part`` is None when ``key`` is None.
    set_fn : callable
        ``set_fn(name, value)``: called for an event at frame F just before the part that
        starts at F is processed. Events at or after ``len(x)`` are not applied.
    x : numpy.ndarray
        float32 ``(frames, ch)``.
    key : numpy.ndarray or None
        float32 ``(frames, kch)``, same number of frames as ``x``.
    automation : Automation, list of events, or None
    blocksize : int
        Largest number of frames per ``process_fn`` call; blocks are split further at event
        frames.

    Returns
    -------
    numpy.ndarray
        The ``y_part`` arrays joined along frames.
    """
    x = np.asarray(x)
    if x.ndim != 2:
        raise ValueError(f"x has shape {x.shape}: expected (frames, channels)")
    if key is not None:
        key = np.asarray(key)
        if key.ndim != 2 or key.shape[0] != x.shape[0]:
            raise ValueError(
                f"key has shape {key.shape}: expected ({x.shape[0]}, key channels)")
    if isinstance(blocksize, bool) or int(blocksize) != blocksize or blocksize < 1:
        raise ValueError(f"blocksize = {blocksize!r}: expected a whole number >= 1")
    blocksize = int(blocksize)
    cursor = AutomationCursor(automation)
    parts = []
    n = x.shape[0]
    for b0 in range(0, n, blocksize):
        b1 = min(b0 + blocksize, n)
        for s0, s1, due in cursor.split(b0, b1):
            for _, name, value in due:
                set_fn(name, value)
            y = process_fn(x[s0:s1], None if key is None else key[s0:s1])
            y = np.asarray(y)
            if y.ndim != 2 or y.shape[0] != s1 - s0:
                raise ValueError(f"process_fn returned shape {y.shape} for {s1 - s0} frames: "
                                 f"expected ({s1 - s0}, channels)")
            parts.append(y)
    if not parts:
        return np.zeros((0, x.shape[1]), dtype=x.dtype)
    return np.concatenate(parts, axis=0)

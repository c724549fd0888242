"""A parameter's taper as a position 0..1: what a MIDI control or a normalised OSC value
means. Owns :func:`to_value` and :func:`to_position`; nothing else lives here.

* linear (levels in dB, %, lookahead): the value moves linearly with the position;
* log (times, frequencies, Q): geometrically, from the range's low end (0.1 when it is 0,
  as the console's steps do) to its high end;
* slope (ratio): geometrically from 1 (or the low end) to 100:1, and the top position is
  inf:1 when the range allows it;
* choice: the position picks one of the choices, evenly spaced;
* the output level: linear in dB from -60 to 0, and position 0 is off.

A mapping may narrow the range (``lo``, ``hi`` in the parameter's unit); the taper then runs
between those ends.
"""
from __future__ import annotations

import math

from ..params import OUTPUT_LEVEL

LOG_FLOOR = 0.1  # the console's floor of a log taper starting at 0 (livedyn.console.steps)
RATIO_TOP = 100.0


def ends(prm, lo=None, hi=None):
    """The ends the taper runs between: the parameter's range, narrowed by ``lo``/``hi``."""
    a = prm.lo if lo is None else max(prm.lo, float(lo))
    b = prm.hi if hi is None else min(prm.hi, float(hi))
    if a > b:
        a, b = b, a
    return a, b


def to_value(prm, t, lo=None, hi=None) -> float:
    """The value at position ``t`` (0..1, clamped) of ``prm``'s taper within ``lo``..``hi``."""
    t = min(1.0, max(0.0, float(t)))
    a, b = ends(prm, lo, hi)
    if prm.taper == "choice":
        i0, i1 = int(round(a)), int(round(b))
        return float(i0 + int(round(t * (i1 - i0))))
    if prm.name == OUTPUT_LEVEL.name and t == 0.0 and lo is None:
        return -math.inf
    if prm.taper == "log":
        a = max(a, LOG_FLOOR)
        if b <= a:
            return a
        return float(a * (b / a) ** t)
    if prm.taper == "slope":
        a = max(a, 1.0)
        top = min(b, RATIO_TOP) if math.isinf(b) else b
        if t >= 1.0 and math.isinf(b):
            return math.inf
        if top <= a:
            return a
        return float(a * (top / a) ** t)
    return float(a + t * (b - a))


def to_position(prm, v, lo=None, hi=None) -> float:
    """Inverse of :func:`to_value`: the position 0..1 of value ``v``."""
    a, b = ends(prm, lo, hi)
    v = float(v)
    if prm.taper == "choice":
        return 0.0 if b == a else min(1.0, max(0.0, (v - a) / (b - a)))
    if math.isinf(v) and v < 0:
        return 0.0
    if prm.taper == "log":
        a = max(a, LOG_FLOOR)
        if b <= a or v <= a:
            return 0.0
        return min(1.0, math.log(v / a) / math.log(b / a))
    if prm.taper == "slope":
        a = max(a, 1.0)
        if math.isinf(v):
            return 1.0
        top = min(b, RATIO_TOP) if math.isinf(b) else b
        if top <= a or v <= a:
            return 0.0
        return min(1.0, math.log(v / a) / math.log(top / a))
    return 0.0 if b == a else min(1.0, max(0.0, (v - a) / (b - a)))

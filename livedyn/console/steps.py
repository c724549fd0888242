"""Steps of the parameter list: one press of Left/Right (or a MIDI encoder's tick) moves a
value by a step that follows the parameter's taper. Owns the step sizes and
:func:`step_value`; nothing else lives here."""
from __future__ import annotations

import math

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

"""Parameter schema: every control a processor has, its unit, range, taper and smoothing.

A parameter value crosses from the control side to the processing kernels as one slot of a
float64 array (``P_*`` indices below). Choices (detector type, link mode, ...) are stored as
their index. The kernels in :mod:`livedyn.dsp` import only the constants of this module.

Conventions
-----------
* Levels in dBFS: a full-scale sine is 0 dBFS (AES17).
* Times in ms. ``attack``, ``release`` and ``rms_time`` are one-pole *time constants* tau:
  a step reaches 63.2 % of its final value after tau; the 10-90 % rise time is 2.197 tau.
  The coefficient is ``alpha = exp(-1 / (tau * fs))``.
* Ratios as numbers; ``"4:1"`` and ``"inf"`` are accepted. Ratios are smoothed and ramped as the
  slope ``1 - 1/ratio`` so that an infinite ratio is reachable.
* ``update = "sample"``: the kernel glides to a new value per sample (no zipper noise).
  ``update = "block"``: the kernel recomputes coefficients at the next block boundary.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

# ---------------------------------------------------------------------------------------------
# Slots of the parameter array (shared by all algorithms; an algorithm ignores what it lacks).
P_THRESHOLD = 0
P_RATIO = 1
P_KNEE = 2
P_ATTACK = 3
P_RELEASE = 4
P_HOLD = 5
P_RANGE = 6
P_MAKEUP = 7
P_AUTOMAKEUP = 8
P_LOOKAHEAD = 9
P_MIX = 10
P_CEILING = 11
P_KEY_HPF = 12
P_KEY_LPF = 13
P_KEY_BPF = 14
P_KEY_Q = 15
P_DETECTOR = 16
P_RMS_TIME = 17
P_BALLISTICS = 18
P_DOMAIN = 19
P_TOPOLOGY = 20
P_LINK = 21
P_KEY = 22
P_HYSTERESIS = 23
P_TRUE_PEAK = 24
P_SAMPLERATE = 25  # written by the Processor, not a user control
P_OUTPUT_LEVEL = 26  # the live engine's output (monitor) level, dB; not part of any algorithm
P_LAW = 27  # gain law of the dynamics kernel, written by the Processor
P_USER_CURVE = 28  # address of a user gain curve (a compiled cfunc), written by the Processor
P_USER_DETECTOR = 29  # address of a user level detector (0: the built-in peak/rms measure)
P_USER_SMOOTHER = 30  # address of a user gain smoother (0: the built-in ballistics)
P_START = 31  # expander and gate: the state before the first sample (closed or open)
USER_SLOT0 = 32  # the parameters a user algorithm declares itself live in slots 32..63
NPARAM = 64

# Choice indices.
DETECTOR_PEAK = 0
DETECTOR_RMS = 1
BALLISTICS_BRANCHING = 0
BALLISTICS_DECOUPLED = 1
DOMAIN_LOG = 0
DOMAIN_LINEAR = 1
TOPOLOGY_FEEDFORWARD = 0
TOPOLOGY_FEEDBACK = 1
LINK_MAX = 0
LINK_MEAN = 1
LINK_NONE = 2
KEY_MAIN = 0
KEY_EXTERNAL = 1
START_CLOSED = 0
START_OPEN = 1
# Gain laws of the dynamics kernel (slot P_LAW).
LAW_COMPRESSOR = 0
LAW_EXPANDER = 1
LAW_GATE = 2
LAW_DUCKER = 3
LAW_USER = 4  # a user-written gain curve, called through P_USER_CURVE

# Largest ratio the feedback topology reaches: its curve on the output level needs the slope
# R - 1 (livedyn.dsp.dynamics.feedback_slope), which grows without bound as R does.
FEEDBACK_MAX_RATIO = 20.0
# Glide time constant of "sample"-updated parameters, ms (a choice of ours: fast enough to feel
# immediate, slow enough that a 20 dB threshold jump makes no audible click).
GLIDE_MS = 10.0
# Largest latency a user kernel may declare, samples (the live engine's dry line holds it).
MAX_USER_LATENCY = 16384
# Crossfade when the lookahead (delay) changes, ms.
DELAY_XFADE_MS = 10.0
# Upper bound of the lookahead control, ms; the delay line is allocated for it.
MAX_LOOKAHEAD_MS = 20.0
# Floor of every level in dB inside the kernels (keeps logs finite, envelopes out of subnormals).
LEVEL_FLOOR_DB = -200.0

_TIME_HELP = "one-pole time constant tau (63 % of a step); 10-90 % rise = 2.197 tau"


class ParamError(ValueError):
    """A parameter value that cannot be used; the message is one line for the user."""


@dataclass(frozen=True)
class Param:
    name: str
    slot: int
    unit: str
    lo: float
    hi: float
    default: float
    taper: str  # "linear", "log", "slope" (ratio), "choice"
    update: str  # "sample" or "block"
    help: str
    choices: tuple = ()
    off_value: float | None = None  # a value outside [lo, hi] that means "off" (filters)

    def with_default(self, default):
        """The same parameter with another default (algorithms choose their own)."""
        return Param(**{**self.__dict__, "default": float(default)})

    # -- parsing and validation ---------------------------------------------------------------
    def parse(self, value) -> float:
        """Turn user text or a number into the float stored in the parameter array.

        Raises ParamError with a one-line message naming the parameter, value, unit and range.
        """
        if self.taper == "choice":
            return float(self._parse_choice(value))
        if isinstance(value, bool):
            raise ParamError(f"{self.name} = {value!r}: expected a number from {self.describe_range().removeprefix('expected ')}")
        if isinstance(value, (int, float)):
            v = float(value)
        else:
            text = str(value).strip().lower()
            for suffix in (self.unit.lower(), "db", "ms", "hz", "%"):
                if suffix and text.endswith(suffix) and self.taper != "slope":
                    text = text[: -len(suffix)].strip()
                    break
            if self.off_value is not None and text == "off":
                return float(self.off_value)
            if self.taper == "slope" and ":" in text:
                num, _, den = text.partition(":")
                try:
                    v = _parse_float(num) / _parse_float(den)
                except (ValueError, ZeroDivisionError):
                    raise ParamError(
                        f"{self.name} = {value!r}: expected a ratio such as 4, '4:1' or 'inf'"
                    ) from None
            else:
                try:
                    v = _parse_float(text)
                except ValueError:
                    raise ParamError(
                        f"{self.name} = {value!r}: expected a number from {self.describe_range().removeprefix('expected ')}"
                    ) from None
        return self.check(v)

    def check(self, v: float) -> float:
        v = float(v)
        if abs(v) < 1e-12:
            v = 0.0  # no subnormal (or meaningless) values into the kernels
        if math.isnan(v):
            raise ParamError(f"{self.name} = nan: expected a number from {self.describe_range().removeprefix('expected ')}")
        if self.off_value is not None and v == self.off_value:
            return v
        if math.isinf(v) and not (v > 0 and math.isinf(self.hi)):
            raise ParamError(f"{self.name} = {v}: out of range, {self.describe_range()}")
        if not (self.lo <= v <= self.hi):
            raise ParamError(
                f"{self.name} = {format_number(v)}{_sp(self.unit)}: out of range, {self.describe_range()}"
            )
        return v

    def _parse_choice(self, value) -> int:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            if float(value).is_integer() and 0 <= int(value) < len(self.choices):
                return int(value)
        text = str(value).strip().lower()
        if isinstance(value, bool):
            text = "on" if value else "off"
        if text in self.choices:
            return self.choices.index(text)
        aliases = {"true": "on", "yes": "on", "1": "on", "false": "off", "no": "off", "0": "off"}
        if aliases.get(text) in self.choices:
            return self.choices.index(aliases[text])
        raise ParamError(f"{self.name} = {value!r}: expected one of {', '.join(self.choices)}")

    # -- display ------------------------------------------------------------------------------
    def describe_range(self) -> str:
        if self.taper == "choice":
            return "one of " + ", ".join(self.choices)
        hi = "inf" if math.isinf(self.hi) else format_number(self.hi)
        text = f"expected {format_number(self.lo)} to {hi}{_sp(self.unit)}"
        if self.off_value is not None:
            text += f" or off ({format_number(self.off_value)})"
        return text

    def format(self, v: float) -> str:
        """A value as the user reads it: '4:1', '-18.0 dBFS', 'rms', 'off'."""
        if self.taper == "choice":
            i = int(v)
            return self.choices[i] if 0 <= i < len(self.choices) else f"?{v}"
        if self.off_value is not None and v == self.off_value:
            return "off"
        if self.taper == "slope":
            return "inf:1" if math.isinf(v) else f"{format_number(v)}:1"
        return f"{format_number(v)}{_sp(self.unit)}"

    def to_text(self, v: float) -> str:
        """A value as written to presets and automation: parseable again by parse()."""
        if self.taper == "choice":
            return self.choices[int(v)]
        if math.isinf(v):
            return "inf"
        return repr(float(v))


def _sp(unit: str) -> str:
    return f" {unit}" if unit else ""


def _parse_float(text: str) -> float:
    text = text.strip().lower()
    if text in ("inf", "infinity", "+inf", "∞"):
        return math.inf
    return float(text)


def format_number(v: float) -> str:
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    if float(v).is_integer() and abs(v) < 1e9:
        return str(int(v))
    return f"{v:.6g}"


def _p(name, slot, unit, lo, hi, default, taper, update, help, **kw) -> Param:
    return Param(name, slot, unit, float(lo), float(hi), float(default), taper, update, help, **kw)


#: Every parameter livedyn knows, with a generic default. Algorithms pick a subset.
ALL = {
    p.name: p
    for p in [
        _p("threshold", P_THRESHOLD, "dBFS", -80, 0, -20, "linear", "sample",
           "level above which (compressor, ducker) or below which (expander, gate) gain changes"),
        _p("ratio", P_RATIO, "", 1, math.inf, 4, "slope", "sample",
           "input dB change per output dB change beyond threshold; 'inf' for a hard stop"),
        _p("knee", P_KNEE, "dB", 0, 24, 6, "linear", "sample",
           "width of the soft knee centred on threshold; 0 is a hard knee"),
        _p("attack", P_ATTACK, "ms", 0, 500, 10, "log", "block",
           "how fast gain moves toward more reduction (gate: opens); " + _TIME_HELP),
        _p("release", P_RELEASE, "ms", 1, 5000, 150, "log", "block",
           "how fast gain recovers (gate: closes); " + _TIME_HELP),
        _p("hold", P_HOLD, "ms", 0, 2000, 0, "log", "block",
           "time gain is held after the detector stops asking for change, before release"),
        _p("range", P_RANGE, "dB", 0, 100, 40, "linear", "sample",
           "largest attenuation the processor may apply"),
        _p("makeup", P_MAKEUP, "dB", -24, 48, 0, "linear", "sample",
           "gain added after the gain stage"),
        _p("automakeup", P_AUTOMAKEUP, "", 0, 1, 0, "choice", "sample",
           "add the static curve's gain reduction at 0 dBFS back as makeup (on top of makeup)",
           choices=("off", "on")),
        _p("lookahead", P_LOOKAHEAD, "ms", 0, MAX_LOOKAHEAD_MS, 0, "linear", "block",
           "delay of the main path so that gain acts before a peak arrives; a change crossfades "
           f"the delay line over {DELAY_XFADE_MS:g} ms"),
        _p("mix", P_MIX, "%", 0, 100, 100, "linear", "sample",
           "share of processed signal; the dry part is delay-aligned"),
        _p("ceiling", P_CEILING, "dBFS", -40, 0, 0, "linear", "sample",
           "no output sample goes above this level (limiter: by gain; others: by clipping)"),
        _p("key_hpf", P_KEY_HPF, "Hz", 10, 5000, 0, "log", "block",
           "high-pass on the key (Butterworth, 12 dB/oct); off = 0", off_value=0.0),
        _p("key_lpf", P_KEY_LPF, "Hz", 100, 24000, 0, "log", "block",
           "low-pass on the key (Butterworth, 12 dB/oct); off = 0", off_value=0.0),
        _p("key_bpf", P_KEY_BPF, "Hz", 50, 20000, 0, "log", "block",
           "band-pass on the key (constant 0 dB peak gain) at this centre; off = 0",
           off_value=0.0),
        _p("key_q", P_KEY_Q, "", 0.1, 20, 1, "log", "block", "quality factor of the key band-pass"),
        _p("detector", P_DETECTOR, "", 0, 1, DETECTOR_PEAK, "choice", "block",
           "level measure: peak (|x|) or rms (sine-referenced, so a sine reads its peak level)",
           choices=("peak", "rms")),
        _p("rms_time", P_RMS_TIME, "ms", 0.1, 1000, 10, "log", "block",
           "averaging time of the rms detector; " + _TIME_HELP),
        _p("ballistics", P_BALLISTICS, "", 0, 1, BALLISTICS_BRANCHING, "choice", "block",
           "smooth peak detector form: branching or decoupled", choices=("branching", "decoupled")),
        _p("domain", P_DOMAIN, "", 0, 1, DOMAIN_LOG, "choice", "block",
           "where attack/release act: log (on the gain in dB, after the curve) or linear (on the "
           "level, before the curve)", choices=("log", "linear")),
        _p("topology", P_TOPOLOGY, "", 0, 1, TOPOLOGY_FEEDFORWARD, "choice", "block",
           "detector placement: feedforward (before the gain stage) or feedback (after it)",
           choices=("feedforward", "feedback")),
        _p("link", P_LINK, "", 0, 2, LINK_MAX, "choice", "block",
           "how channels share gain: max (the largest detector level), mean (the average of "
           "the channels' linear detector levels: |k|, or the mean square for rms) or none",
           choices=("max", "mean", "none")),
        _p("key", P_KEY, "", 0, 1, KEY_MAIN, "choice", "block",
           "what drives the detector: the main input or the external key input",
           choices=("main", "external")),
        _p("hysteresis", P_HYSTERESIS, "dB", 0, 24, 4, "linear", "sample",
           "once open, stay open until the level falls this far below threshold"),
        _p("true_peak", P_TRUE_PEAK, "", 0, 1, 0, "choice", "block",
           "limit inter-sample (4x oversampled, BS.1770-4 Annex 2) peaks too",
           choices=("off", "on")),
        _p("start", P_START, "", 0, 1, START_CLOSED, "choice", "block",
           "expander and gate: state before the first sample; closed (as after silence, so the "
           "first sound opens it with the attack time) or open", choices=("closed", "open")),
    ]
}


def feedback_problem(ratio, attack_ms, release_ms, samplerate):
    """None when the feedback topology can hold this ratio, else a one-line reason.

    Reachable: 1 <= ratio <= FEEDBACK_MAX_RATIO. The loop must also settle. Linearised above
    the threshold, a one-pole of coefficient a on the gain in dB makes the loop
    G[n] = (a - (1 - a)(R - 1)) G[n-1] + ..., since the detector reads the previous output
    sample; it converges when (R - 1)(1 - a) < 1 + a, i.e. tau > -1 / (fs ln((R - 2) / R)).
    The branching detector switches between the attack and the release one-pole, and one of
    them settling is enough (measured here at 8 kHz, ratio 20: attack 0 with release 1 ms rings
    by 32 dB; attack 0 with release 100 ms, or attack 50 ms with release 1 ms, settles on the
    set curve), so the pair is refused only when neither would settle alone.
    """
    if not (ratio <= FEEDBACK_MAX_RATIO):
        return (f"ratio = {format_number(ratio)} with topology = feedback: the feedback law "
                f"reaches ratios 1 to {format_number(FEEDBACK_MAX_RATIO)}")
    if ratio <= 2.0:
        return None
    need = -1000.0 / (samplerate * math.log((ratio - 2.0) / ratio))
    if attack_ms <= need and release_ms <= need:
        return (f"attack = {format_number(attack_ms)} ms and release = "
                f"{format_number(release_ms)} ms with topology = feedback and ratio "
                f"{format_number(ratio)}: the loop rings, expected attack or release above "
                f"{need:.3g} ms at {samplerate:g} Hz")
    return None


#: The live engine's output (monitor) level: the last gain before the device outputs, after
#: the recordings and meters tap the signal; attenuation only, so the safety ceiling still holds.
#: Not a parameter of any algorithm (presets, slots and automation files do not carry it).
OUTPUT_LEVEL = _p("output_level", P_OUTPUT_LEVEL, "dB", -60, 0, 0, "linear", "sample",
                  "level of the device outputs (monitor level), after meters and recordings; "
                  "off = silent", off_value=-math.inf)
#: Below this the output level is silence (the fader's bottom, 'off').
OUTPUT_LEVEL_OFF_DB = -60.0


def ratio_to_slope(ratio: float) -> float:
    """1 - 1/ratio: 0 for ratio 1, 1 for an infinite ratio."""
    return 1.0 if math.isinf(ratio) else 1.0 - 1.0 / ratio


def slope_to_ratio(slope: float) -> float:
    return math.inf if slope >= 1.0 else 1.0 / (1.0 - slope)


@dataclass
class Schema:
    """The parameters one algorithm exposes, in display order, with its own defaults."""

    params: dict = field(default_factory=dict)

    @classmethod
    def of(cls, **defaults) -> "Schema":
        """``Schema.of(threshold=-18, ratio=4, ...)``: take these parameters, set defaults."""
        out = {}
        for name, default in defaults.items():
            base = ALL[name]
            out[name] = base.with_default(base.parse(default) if isinstance(default, str) else default)
        return cls(out)

    def __contains__(self, name):
        return name in self.params

    def __iter__(self):
        return iter(self.params.values())

    def __getitem__(self, name) -> Param:
        try:
            return self.params[name]
        except KeyError:
            raise ParamError(
                f"unknown parameter {name!r}: expected one of {', '.join(self.params)}"
            ) from None

    def names(self):
        return list(self.params)

    def resolve(self, word) -> str:
        """The parameter ``word`` names: itself, or the one name it is a unique prefix of
        (``thr`` -> ``threshold``), as the console accepts. ParamError when it is unknown or
        could be several (naming them)."""
        word = str(word).strip()
        if word in self.params:
            return word
        hits = [n for n in self.params if word and n.startswith(word)]
        if len(hits) == 1:
            return hits[0]
        if hits:
            raise ParamError(f"{word!r} could be {', '.join(hits)}: type more letters")
        return self[word].name  # raises the unknown-parameter error


def new_param_array():
    import numpy as np

    return np.zeros(NPARAM, dtype=np.float64)

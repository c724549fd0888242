"""Measurements of a configured processor: static curve, attack/release, latency, distortion;
and level matching of two settings.

Each measurement builds fresh processors from a factory (``make() -> Processor``), feeds test
signals synthesised here, and returns plain rows; :func:`plot` draws them when matplotlib is
installed (the ``plot`` extra). :func:`level_match` processes one input with several settings
offline and trims them to the same BS.1770-4 loudness (the console's ``match``; a script can
call it as well).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .dsp import stages
from .dsp.loudness import ABS_GATE_LUFS  # BS.1770-4's absolute gate: below it, nothing to match
from .params import LAW_COMPRESSOR, LAW_DUCKER, LAW_EXPANDER, LAW_GATE, LAW_USER, ratio_to_slope


def _db(a):
    return 20.0 * math.log10(max(float(a), 1e-12))


def _square(fs, amp, frames, freq=500.0, channels=1):
    half = max(1, int(round(fs / freq / 2)))
    n = np.arange(frames)
    x = np.where((n // half) % 2 == 0, amp, -amp).astype(np.float32)
    return np.repeat(x[:, None], channels, axis=1)


def _sine(fs, amp, frames, freq=1000.0, channels=1):
    t = np.arange(frames) / fs
    x = (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)
    return np.repeat(x[:, None], channels, axis=1)


def _settle_frames(proc):
    v = proc.values()
    longest = max(v.get("attack", 0), v.get("release", 0), v.get("rms_time", 0) * 3,
                  v.get("hold", 0) + v.get("release", 0))
    return int(proc.samplerate * min(10.0, 0.05 + 8 * longest / 1000.0))


def theory_output_db(proc, level_db):
    """The output level the static curve predicts for a steady input (or key) level."""
    v = proc.values()
    law = proc.algorithm.law
    if proc.algorithm.kind == "user":
        return float("nan")  # a whole kernel of a user's: no curve livedyn knows
    if proc.algorithm.kind == "limiter":
        return min(level_db, v["ceiling"])
    slope = ratio_to_slope(v.get("ratio", 1.0))
    thr, knee = v.get("threshold", 0.0), v.get("knee", 0.0)
    makeup = v.get("makeup", 0.0)
    if law == LAW_COMPRESSOR:
        g = stages.compressor_gain(level_db, thr, slope, knee)
        if v.get("automakeup", 0) > 0.5:
            g -= stages.compressor_gain(0.0, thr, slope, knee)
    elif law == LAW_EXPANDER:
        g = stages.expander_gain(level_db, thr, slope, knee, v["range"])
    elif law == LAW_GATE:
        g = 0.0 if level_db >= thr else -v["range"]
    elif law == LAW_USER:
        import ctypes

        p = proc.p
        g = proc.algorithm.user_curve.ctypes(float(level_db),
                                             p.ctypes.data_as(ctypes.POINTER(ctypes.c_double)))
    else:
        g = stages.ducker_gain(level_db, thr, slope, knee, v["range"])
    out = level_db + g + makeup
    if law == LAW_DUCKER:
        out = DUCKER_MAIN_DB + g + makeup
    ceiling = v.get("ceiling", 0.0)
    return min(out, ceiling) if law != LAW_DUCKER else min(out, ceiling)


DUCKER_MAIN_DB = -20.0  # level of the steady main tone when a ducker's curve is measured


@dataclass
class CurveRow:
    level_db: float
    signal: str
    measured_db: float
    theory_db: float

    @property
    def error_db(self):
        return self.measured_db - self.theory_db


def static_curve(make, levels_db=None, signals=("square", "sine")):
    """Steady-state output level against input level (for a ducker: against key level).

    Square waves have an exact detected level (|x| is constant), so their curve must match the
    theory; sines show what the detector makes of a real waveform (ripple, rms vs peak).
    """
    if levels_db is None:
        levels_db = np.arange(-60.0, 0.01, 2.0)
    rows = []
    for signal in signals:
        gen = _square if signal == "square" else _sine
        for lv in levels_db:
            proc = make()
            fs = proc.samplerate
            n = _settle_frames(proc) + int(0.2 * fs)
            amp = 10 ** (lv / 20)
            if proc.algorithm.law == LAW_DUCKER and proc.algorithm.kind == "dynamics":
                key = gen(fs, amp, n, channels=max(proc.key_channels, 1))
                x = _sine(fs, 10 ** (DUCKER_MAIN_DB / 20), n, 997.0, proc.channels)
                y = proc.process(x, key if proc.key_channels else None) if proc.key_channels \
                    else proc.process(x)
            else:
                x = gen(fs, amp, n, channels=proc.channels)
                y = proc.process(x)
            tail = y[-int(0.1 * fs):, 0].astype(np.float64)
            if signal == "square" and proc.algorithm.law != LAW_DUCKER:
                measured = _db(np.abs(tail).max())
            else:
                measured = _db(np.sqrt(2 * np.mean(tail ** 2)))  # sine-referenced rms
            rows.append(CurveRow(float(lv), signal, measured, theory_output_db(proc, float(lv))))
    return rows


@dataclass
class TimingRow:
    phase: str  # "attack" or "release"
    setting_ms: float
    tau_ms: float  # time to 63.2 % of the gain change
    rise_10_90_ms: float


def timing(make):
    """Attack and release from level steps across the threshold, read off the gain trace."""
    proc = make()
    fs = proc.samplerate
    v = proc.values()
    kind = proc.algorithm.kind
    law = proc.algorithm.law
    if kind == "limiter":
        lo, hi = v["ceiling"] - 20, v["ceiling"] + 12
    elif law in (LAW_EXPANDER, LAW_GATE):
        lo, hi = v["threshold"] - 30, v["threshold"] + 10
    else:
        lo, hi = v["threshold"] - 20, min(v["threshold"] + 20, 0.0)
    n = _settle_frames(proc) + int(0.3 * fs)
    a = _square(fs, 10 ** (lo / 20), n, channels=proc.channels)
    b = _square(fs, 10 ** (hi / 20), n, channels=proc.channels)
    x = np.concatenate([a, b, a])
    if law == LAW_DUCKER and kind == "dynamics" and proc.key_channels:
        key = x[:, : proc.key_channels]
        main = _sine(fs, 0.1, len(x), 997.0, proc.channels)
        _, tr = proc.process_traced(main, key)
    else:
        _, tr = proc.process_traced(x)
    g = tr["gain_db"][:, 0]
    rows = []
    for phase_idx, (s0, s1) in enumerate([(n, 2 * n), (2 * n, 3 * n)]):
        seg = g[s0 - 1:s1]
        g0, g1 = seg[0], seg[-1]
        if abs(g1 - g0) < 1e-6:
            continue
        frac = (seg - g0) / (g1 - g0)

        def cross(level):
            i = int(np.argmax(frac >= level))
            if i == 0:
                return 0.0
            f0, f1 = frac[i - 1], frac[i]
            return (i - 1 + (level - f0) / (f1 - f0 if f1 != f0 else 1.0)) / fs * 1000

        rising_level = phase_idx == 0
        gate_like = law in (LAW_EXPANDER, LAW_GATE) and kind == "dynamics"
        phase = "attack" if rising_level else "release"
        setting = v.get(phase, 0.0)
        if gate_like:
            setting = v.get("attack" if rising_level else "release", 0.0)
        rows.append(TimingRow(phase, setting, cross(1 - 1 / math.e),
                              cross(0.9) - cross(0.1)))
    return rows


def latency(make):
    """(measured, reported) latency in samples, from an impulse below any threshold."""
    proc = make()
    fs = proc.samplerate
    n = int(0.05 * fs) + proc.latency_samples * 2 + 100
    x = np.zeros((n, proc.channels), np.float32)
    x[50] = 1e-3
    if proc.algorithm.law == LAW_DUCKER and proc.algorithm.kind == "dynamics" and \
            proc.key_channels:
        y = proc.process(x, np.zeros((n, proc.key_channels), np.float32))
    else:
        y = proc.process(x)
    return int(np.argmax(np.abs(y[:, 0]))) - 50, proc.latency_samples


@dataclass
class DistortionRow:
    release_ms: float
    thd_percent: float
    level_db: float = -6.0  # level of the test tone, dBFS

    @property
    def thd_db(self):
        return 20 * math.log10(max(self.thd_percent / 100, 1e-12))


def distortion(make, releases_ms=(2, 5, 10, 20, 50, 100, 200, 500), freq=50.0, level_db=None):
    """THD of a low tone against release time (common practice, no source: a release shorter
    than a few periods of the tone lets the gain follow the waveform, which distorts it).

    ``level_db`` None: -6 dBFS, or for a limiter 6 dB above its ceiling (a limiter leaves a
    tone below its ceiling alone, so there would be nothing to measure).
    """
    rows = []
    for rel in releases_ms:
        proc = make()
        if "release" not in proc.schema:
            break
        if level_db is None:
            level_db = proc.get("ceiling") + 6.0 if proc.algorithm.kind == "limiter" else -6.0
        proc.set("release", rel)
        fs = proc.samplerate
        period = fs / freq
        cycles = int(round(freq))  # one second, an exact number of periods
        n = int(round(cycles * period))
        warm = _settle_frames(proc) + int(0.5 * fs)
        t = np.arange(warm + n) / fs
        x = (10 ** (level_db / 20) * np.sin(2 * np.pi * freq * t)).astype(np.float32)
        x = np.repeat(x[:, None], proc.channels, axis=1)
        if proc.algorithm.law == LAW_DUCKER and proc.key_channels:
            y = proc.process(x, x[:, : proc.key_channels])
        else:
            y = proc.process(x)
        seg = y[warm:warm + n, 0].astype(np.float64)
        spec = np.abs(np.fft.rfft(seg))
        k0 = cycles
        fund = spec[k0]
        harm = [spec[k0 * h] for h in range(2, 11) if k0 * h < len(spec)]
        thd = 100 * math.sqrt(sum(h * h for h in harm)) / max(fund, 1e-30)
        rows.append(DistortionRow(float(rel), thd, float(level_db)))
    return rows


def have_matplotlib():
    try:
        import matplotlib  # noqa: F401

        return True
    except ImportError:
        return False


def plot(kind, rows, path, title=""):
    """Write a PNG of a measurement (needs matplotlib)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 4.5), dpi=100)
    if kind == "curve":
        for signal in sorted({r.signal for r in rows}):
            rr = [r for r in rows if r.signal == signal]
            ax.plot([r.level_db for r in rr], [r.measured_db for r in rr], "o", ms=3,
                    label=f"measured ({signal})")
        rr = [r for r in rows if r.signal == rows[0].signal]
        ax.plot([r.level_db for r in rr], [r.theory_db for r in rr], "-", lw=1, label="theory")
        ax.set_xlabel("input level, dBFS")
        ax.set_ylabel("output level, dBFS")
        ax.grid(True, alpha=0.3)
        ax.legend()
    elif kind == "distortion":
        ax.semilogx([r.release_ms for r in rows], [r.thd_percent for r in rows], "o-")
        ax.set_xlabel("release, ms")
        ax.set_ylabel("THD, %")
        ax.grid(True, which="both", alpha=0.3)
    ax.set_title(title)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


# ---- level matching --------------------------------------------------------------------------



class LevelMatchError(ValueError):
    """A level match that cannot be made; the message is one line."""


@dataclass
class LevelMatch:
    """Two settings of one algorithm measured on the same input.

    Attributes
    ----------
    loudness : dict
        Setting name -> integrated loudness of its output, LUFS (ITU-R BS.1770-4).
    trims : dict
        Setting name -> gain to add to its makeup, dB: 0 for the quieter one and minus the
        difference for the louder one, so that both play equally loud.
    seconds : float
        Length of the input measured.
    """

    loudness: dict
    trims: dict
    seconds: float


def render_with(algorithm, samplerate, channels, key_channels, values, main, key=None):
    """Process ``main`` (and ``key``) offline through a fresh Processor holding ``values``.

    Parameters
    ----------
    algorithm : str or Algorithm
        A built-in name, an algorithm file ``FILE.py`` or a loaded Algorithm.
    values : dict
        Parameter name -> value. Values are set in passes until none is refused (a value may
        be valid only once another is set, such as a key filter's frequency after the key);
        the first refusal left is raised as ParamError.
    main, key : numpy.ndarray
        float32 (frames, channels) and (frames, key channels), or key None.

    Returns
    -------
    numpy.ndarray
        The processed main signal, float32 (frames, channels).
    """
    from .loader import get
    from .params import KEY_EXTERNAL, ParamError
    from .processor import Processor

    p = Processor(get(algorithm), samplerate, channels, key_channels)
    values = dict(values)
    progress = True
    errors = {}
    while values and progress:
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
    if "key" in p.schema and int(p.get("key")) == KEY_EXTERNAL and key is None:
        raise LevelMatchError("the key input is needed (key = external) but no key signal "
                              "was given")
    return p.process(main, key if p.key_channels else None)


def level_match(algorithm, samplerate, channels, key_channels, settings, main, key=None):
    """Measure several settings of one algorithm on the same input and trim them to match.

    Each setting's values process ``main`` (and ``key``) offline (:func:`render_with`); the
    integrated loudness of each output is measured with ITU-R BS.1770-4
    (:func:`livedyn.meters.integrated_loudness`), and each setting gets the trim that brings it
    down to the quietest one.

    Parameters
    ----------
    settings : dict
        Setting name (e.g. ``"a"``, ``"b"``) -> dict of parameter values.

    Returns
    -------
    LevelMatch

    Raises
    ------
    LevelMatchError
        An output measures below BS.1770's absolute gate (nothing to match), or a key is
        needed and missing. ParamError for a refused value.

    References
    ----------
    .. [1] ITU-R BS.1770-4, "Algorithms to measure audio programme loudness and true-peak
       audio level", 2015: K-weighting, gating (section 5.1), integrated loudness.
    """
    from .meters import integrated_loudness

    loud = {}
    for name, values in settings.items():
        y = render_with(algorithm, samplerate, channels, key_channels, values, main, key)
        loud[name] = float(integrated_loudness(y, samplerate))
    quiet = [str(s).upper() for s, v in loud.items() if not v > ABS_GATE_LUFS]
    if quiet:
        raise LevelMatchError(f"slot {' and '.join(quiet)} measures below the "
                              f"{ABS_GATE_LUFS:g} LUFS gate of BS.1770 on the recent input; "
                              "play something and try again")
    low = min(loud.values())
    trims = {s: 0.0 - (v - low) for s, v in loud.items()}  # 0.0 - x: no "-0.0"
    return LevelMatch(loud, trims, len(main) / float(samplerate))

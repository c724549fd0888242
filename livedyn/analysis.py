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


RMS_SQUARE_DB = 10.0 * math.log10(2.0)  # a square's sine-referenced rms reads its peak + 3.01 dB


def detected_offset_db(proc, signal):
    """How far the detector's reading of a steady test signal lies above its peak level, dB.

    The rms detector is sine-referenced (a sine reads its peak level), so a square wave, whose
    mean square equals its peak squared, reads 10 log10 2 = 3.01 dB above its peak. A peak
    detector reads a square's peak exactly. (A sine's peak detector reading ripples; its theory
    takes the peak.) Key filters are taken as flat at the test tone.
    """
    if signal == "square" and "detector" in proc.values() and \
            int(proc.values()["detector"]) == 1 and proc.algorithm.kind == "dynamics":
        return RMS_SQUARE_DB
    return 0.0


def limiter_detected_db(proc, x):
    """The level the limiter's own detector reads from a steady signal ``x`` (frames,), dB: the
    largest |x|, or with ``true_peak`` on also the 4x interpolated peaks (ITU-R BS.1770-4
    Annex 2 filter, as the limiter uses it), taken where the signal is steady."""
    from .dsp.truepeak import TP_TAPS

    x = np.asarray(x, dtype=np.float64).ravel()
    peak = float(np.abs(x).max())
    if proc.values().get("true_peak", 0) > 0.5:
        edge = TP_TAPS.shape[1]
        for k in range(TP_TAPS.shape[0]):
            u = np.convolve(x, TP_TAPS[k])[edge:len(x) - edge]
            peak = max(peak, float(np.abs(u).max()))
    return _db(peak)


def _cookbook(kind, f0, q, fs):
    """(b, a) of an Audio EQ Cookbook biquad (R. Bristow-Johnson): low-pass, high-pass, or the
    constant 0 dB peak band-pass, written here from the cookbook for the curve theory."""
    w0 = 2 * math.pi * f0 / fs
    cw, alpha = math.cos(w0), math.sin(w0) / (2 * q)
    if kind == "lowpass":
        b = [(1 - cw) / 2, 1 - cw, (1 - cw) / 2]
    elif kind == "highpass":
        b = [(1 + cw) / 2, -(1 + cw), (1 + cw) / 2]
    else:
        b = [alpha, 0.0, -alpha]
    return np.array(b), np.array([1 + alpha, -2 * cw, 1 - alpha])


def rms_detected_db(proc, key):
    """The rms detector's steady reading of ``key`` (frames,), dB, sine-referenced
    (10 log10 of twice the mean square over the last 0.1 s), after the key filters the
    processor has on; None when the detector is not the built-in rms one."""
    v = proc.values()
    if proc.algorithm.kind != "dynamics" or int(v.get("detector", 0)) != 1 or \
            getattr(proc.algorithm, "user_detector", None) is not None:
        return None
    from scipy.signal import lfilter

    fs = proc.samplerate
    k = np.asarray(key, dtype=np.float64).ravel()
    q_bw = 1 / math.sqrt(2)
    for name, kind, q in (("key_hpf", "highpass", q_bw), ("key_lpf", "lowpass", q_bw),
                          ("key_bpf", "bandpass", v.get("key_q", 1.0))):
        if v.get(name, 0.0) > 0.0:
            b, a = _cookbook(kind, v[name], q, fs)
            k = lfilter(b, a, k)
    tail = k[-int(0.1 * fs):]
    return 10 * math.log10(max(2 * float(np.mean(tail ** 2)), 1e-30))


def _feedback_output_db(level_db, thr, slope, knee):
    """Steady output y of the feedback compressor: the root of y = x + g(y), with g the curve on
    the output level of slope s / (1 - s) (livedyn.dsp.dynamics.feedback_slope); y - g(y) rises
    with y, so bisection finds the one root."""
    s_fb = slope / (1.0 - slope) if slope < 1.0 else float("inf")
    lo, hi = level_db - 400.0, level_db
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid - stages.compressor_gain(mid, thr, s_fb, knee) < level_db:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def theory_output_db(proc, level_db, signal=None, detected_db=None):
    """The output level the static curve predicts for a steady input (or key) level.

    ``signal`` ("square" or "sine") lets the theory follow the detector's reading of that test
    signal (:func:`detected_offset_db`); ``detected_db`` is the detector's reading itself when
    known (:func:`limiter_detected_db`, :func:`rms_detected_db`), by default the level. In feedback topology the
    output solves y = x + g(y) (see :func:`_feedback_output_db`).
    """
    v = proc.values()
    law = proc.algorithm.law
    if proc.algorithm.kind == "user":
        return float("nan")  # a whole kernel of a user's: no curve livedyn knows
    if proc.algorithm.kind == "limiter":
        det = level_db if detected_db is None else detected_db
        return level_db + min(0.0, v["ceiling"] - det)
    slope = ratio_to_slope(v.get("ratio", 1.0))
    thr, knee = v.get("threshold", 0.0), v.get("knee", 0.0)
    makeup = v.get("makeup", 0.0)
    if detected_db is not None:
        det_db = detected_db
    else:
        det_db = level_db + (detected_offset_db(proc, signal) if signal else 0.0)
    if law == LAW_COMPRESSOR and int(v.get("topology", 0)) == 1:
        # the detector reads the output; its rms reading of a square is again 3.01 dB high
        off = det_db - level_db
        y = _feedback_output_db(level_db + off, thr, slope, knee) - off
        g = y - level_db
        if v.get("automakeup", 0) > 0.5:
            g -= stages.compressor_gain(0.0, thr, slope, knee)
        return min(level_db + g + makeup, v.get("ceiling", 0.0))
    level_in = level_db
    level_db = det_db
    if law == LAW_COMPRESSOR:
        g = stages.compressor_gain(level_db, thr, slope, knee)
        if v.get("automakeup", 0) > 0.5:
            g -= stages.compressor_gain(0.0, thr, slope, knee)
    elif law == LAW_EXPANDER:
        # a steady level at or above threshold opens the expander, whose threshold then drops
        # by the hysteresis; below it, a sweep point that starts closed stays closed
        t_eff = thr - v.get("hysteresis", 0.0) if level_db >= thr else thr
        g = stages.expander_gain(level_db, t_eff, slope, knee, v["range"])
    elif law == LAW_GATE:
        g = 0.0 if level_db >= thr else -v["range"]
    elif law == LAW_USER:
        import ctypes

        p = proc.p
        g = proc.algorithm.user_curve.ctypes(float(level_db),
                                             p.ctypes.data_as(ctypes.POINTER(ctypes.c_double)))
    else:
        g = stages.ducker_gain(level_db, thr, slope, knee, v["range"])
    out = level_in + g + makeup
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
            det = None
            if proc.algorithm.kind == "limiter":
                det = limiter_detected_db(proc, x[:, 0])
            elif int(proc.values().get("topology", 0)) != 1:
                keyed = proc.algorithm.law == LAW_DUCKER and proc.key_channels
                det = rms_detected_db(proc, (key if keyed else x)[:, 0])
            rows.append(CurveRow(float(lv), signal, measured,
                                 theory_output_db(proc, float(lv), signal, det)))
    return rows


@dataclass
class TimingRow:
    """One phase of a level-step measurement, read off the smoothed gain (dB).

    ``hold_ms``: from the level step to the first movement of the gain (the hold time, and for
    the limiter its lookahead window); ``tau_ms``: from that movement to 63.2 % of the gain
    change in dB (a one-pole's time constant); ``ramp_ms``: the limiter's attack, from the first
    movement to the full change (a straight ramp of the linear gain), NaN for a one-pole.
    """

    phase: str  # "attack" or "release"
    setting_ms: float
    tau_ms: float  # time to 63.2 % of the gain change, from the first movement
    rise_10_90_ms: float
    hold_ms: float = 0.0
    ramp_ms: float = float("nan")
    law: str = "one-pole"  # "one-pole" (tau) or "linear ramp" (the limiter's attack)
    t_ms: object = None  # the step response, for plots: time from the level step, ms
    gain_db: object = None  # the smoothed gain over t_ms, dB
    model_db: object = None  # the documented model over t_ms, dB

    def as_dict(self):
        return {k: v for k, v in self.__dict__.items()
                if k not in ("t_ms", "gain_db", "model_db")}


def timing(make):
    """Attack and release from level steps across the threshold, read off the gain trace.

    Each phase reports the hold (until the gain first moves) and the time constant from there,
    beside the documented model: a one-pole of time constant ``setting`` in dB after the hold,
    or for the limiter's attack a straight ramp of the linear gain over ``attack`` ms.
    """
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
        moved = np.nonzero(np.abs(frac) > 1e-9)[0]
        i0 = int(moved[0]) - 1 if len(moved) else 0  # the last sample before the gain moves

        def cross(level):
            f = frac[i0:]
            i = int(np.argmax(f >= level))
            if i == 0:
                return i0 / fs * 1000
            f0, f1 = f[i - 1], f[i]
            return (i0 + i - 1 + (level - f0) / (f1 - f0 if f1 != f0 else 1.0)) / fs * 1000

        rising_level = phase_idx == 0
        phase = "attack" if rising_level else "release"
        setting = v.get(phase, 0.0)
        hold = i0 / fs * 1000
        t = np.arange(len(seg)) / fs * 1000
        tau = cross(1 - 1 / math.e) - hold
        if kind == "limiter" and rising_level:
            full = int(np.argmax(frac >= 1.0 - 1e-9))
            ramp = (full - i0) / fs * 1000
            a_lin, b_lin = 10 ** (g0 / 20), 10 ** (g1 / 20)
            steps = int(math.floor(setting * fs / 1000 + 0.5)) + 1
            k = np.clip((np.arange(len(seg)) - i0) / steps, 0.0, 1.0)
            model = 20 * np.log10(a_lin + (b_lin - a_lin) * k)
            rows.append(TimingRow(phase, setting, tau, cross(0.9) - cross(0.1), hold, ramp,
                                  "linear ramp", t, seg.copy(), model))
            continue
        a_pole = math.exp(-1000.0 / (setting * fs)) if setting > 0 else 0.0
        k = np.maximum(np.arange(len(seg)) - i0, 0)
        model = g1 + (g0 - g1) * a_pole ** k
        rows.append(TimingRow(phase, setting, tau, cross(0.9) - cross(0.1), hold,
                              t_ms=t, gain_db=seg.copy(), model_db=model))
    return rows


def impulse_response(make):
    """(input, output) of the latency measurement: an impulse below any threshold, channel 0."""
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
    return x[:, 0], y[:, 0]


def latency(make):
    """(measured, reported) latency in samples, from an impulse below any threshold."""
    x, y = impulse_response(make)
    return int(np.argmax(np.abs(y))) - 50, make().latency_samples


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


def plot(kind, rows, path, title="", x_label="input level, dBFS"):
    """Write a PNG of a measurement (needs matplotlib).

    ``kind``: "curve" (CurveRow list; ``x_label`` names the swept level, the key level for a
    keyed algorithm), "distortion", "timing" (TimingRow list: each phase's step response with
    its model overlaid) or "latency" (``rows`` = (input, output, samplerate)).
    """
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
        ax.set_xlabel(x_label)
        ax.set_ylabel("output level, dBFS")
        ax.grid(True, alpha=0.3)
        ax.legend()
    elif kind == "distortion":
        ax.semilogx([r.release_ms for r in rows], [r.thd_percent for r in rows], "o-")
        ax.set_xlabel("release, ms")
        ax.set_ylabel("THD, %")
        ax.grid(True, which="both", alpha=0.3)
    elif kind == "timing":
        plt.close(fig)
        fig, axes = plt.subplots(1, len(rows), figsize=(5 * len(rows), 4.5), dpi=100,
                                 squeeze=False)
        for ax, r in zip(axes[0], rows):
            ax.plot(r.t_ms, r.gain_db, "-", lw=1.5, label="measured gain")
            what = (f"linear ramp over {r.setting_ms:g} ms" if r.law == "linear ramp"
                    else f"one-pole, tau {r.setting_ms:g} ms")
            ax.plot(r.t_ms, r.model_db, "--", lw=1, label=f"model: {what}")
            if r.hold_ms > 0:
                ax.axvline(r.hold_ms, color="grey", lw=0.8, ls=":",
                           label=f"hold {r.hold_ms:.2f} ms")
            ax.set_xlim(0, min(r.t_ms[-1], r.hold_ms + 6 * max(r.setting_ms, 0.5)))
            ax.set_xlabel(f"time after the level step ({r.phase}), ms")
            ax.set_ylabel("gain, dB")
            ax.grid(True, alpha=0.3)
            ax.legend(fontsize=8)
    elif kind == "latency":
        x, y, fs = rows
        t = np.arange(len(x)) / fs * 1000
        ax.plot(t, x, "-", lw=1, label="input impulse")
        ax.plot(t, y, "-", lw=1, label="output")
        ax.set_xlabel("time, ms")
        ax.set_ylabel("sample value")
        ax.grid(True, alpha=0.3)
        ax.legend()
    if kind == "timing":
        fig.suptitle(title, fontsize=9)
    else:
        ax.set_title(title, fontsize=9)
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

"""Ducker keyed by speech: the key is weighted to the speech band before its level is measured.

What it does
------------
A voice-over ducker should react to the voice, not to what else is in the key: a hum, the
rumble of a handled microphone, the hiss of a noisy line. This file measures the key through a
speech-band weighting - a 2nd-order Butterworth high-pass at ``low`` followed by a 2nd-order
Butterworth low-pass at ``high`` (defaults 300 Hz and 3.4 kHz, the telephone band) - then a
one-pole mean square. A tone in the band reads its own level; 60 Hz hum reads about 29 dB
lower with the defaults (40 dB per decade below the 300 Hz corner), so it does not duck the
programme.

The 300-3400 Hz telephone band is the one of ITU-T Recommendation G.712 for PCM telephone
channels (recalled from memory); it carries most of what makes speech intelligible (the band
importance function of ANSI S3.5-1997, "Methods for Calculation of the Speech Intelligibility
Index", weighs 1-4 kHz most; recalled from memory).

Equations (per sample n and key channel)
----------------------------------------
Biquads from R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients"
(the Audio EQ Cookbook), with Q = 1/sqrt(2), which makes each one the bilinear transform of a
2nd-order Butterworth section pre-warped at its corner (the same filter as
``scipy.signal.butter(2, f0, btype, fs=fs)``):

    w0 = 2 pi f0 / fs,   alpha = sin(w0) / (2 Q)
    high-pass: b = [(1 + cos w0)/2, -(1 + cos w0), (1 + cos w0)/2]
    low-pass:  b = [(1 - cos w0)/2,   1 - cos w0,  (1 - cos w0)/2]
    both:      a = [1 + alpha, -2 cos w0, 1 - alpha]             (divided through by a0)

run in transposed direct form II. Then, with ``a_ms = exp(-1 / (rms_time fs))``:

    m[n] = a_ms m[n-1] + (1 - a_ms) y[n]^2
    level[n] = sqrt(2 m[n])          (sine-referenced: a sine of peak A reads A)

The gain curve (ducker): d = level_db - threshold, W = knee, D = depth:

    gain = 0                         for 2d <= -W
    gain = -D                        for 2d >= W
    gain = -D t^2 (3 - 2t),  t = (d + W/2) / W   inside the knee (a smoothstep: no corner)

After it, livedyn's built-in ballistics (attack, release, hold) smooth the gain.

Use it with an external key: ``key = external`` (livedyn's ``key`` parameter defaults to the
main input and a file cannot change livedyn's defaults). livedyn's own key filters
(key_hpf, key_lpf, key_bpf) are not offered: the weighting here replaces them.

livedyn API used: ``detector`` (with 20 STATE slots per key channel) and ``gain_curve``.
Coefficients are computed only when ``low``, ``high``, ``rms_time`` or the sample rate differ
from the values they were made for (kept in STATE beside them): a cos, a sin and an exp per
sample would cost more than the filtering itself. Everything else is per-sample state, so any
host block split gives the same output.
"""
import math

import numba as nb


NAME = "speech-key"
PARAMS = [
    "key", "threshold", "knee", "attack", "release", "hold", "rms_time",
    Param("low", "Hz", 50, 1000, 300,  # noqa: F821 (Param is injected by livedyn)
          help="lower edge of the speech band: corner (-3 dB) of a Butterworth high-pass, "
               "12 dB/oct"),
    Param("high", "Hz", 1000, 16000, 3400,  # noqa: F821
          help="upper edge of the speech band: corner (-3 dB) of a Butterworth low-pass, "
               "12 dB/oct (at most 0.45 x the sample rate)"),
    Param("depth", "dB", 0, 60, 12,  # noqa: F821
          help="attenuation of the main signal while the weighted key is above threshold"),
]
# A ducker listens to its key input by default (livedyn falls back to the main input when the
# stream has no key channels).
DEFAULTS = {"key": "external"}
STATE = [
    "c_low", "c_high", "c_fs", "c_tau",  # the parameter values the coefficients were made for
    "hb0", "hb1", "hb2", "ha1", "ha2",  # high-pass coefficients (a0 = 1)
    "lb0", "lb1", "lb2", "la1", "la2",  # low-pass coefficients
    "a_ms",  # mean-square one-pole coefficient
    "hz1", "hz2", "lz1", "lz2",  # filter states
    "ms",  # mean square of the weighted key
]

BUTTERWORTH_Q = 1.0 / math.sqrt(2.0)
TINY = 1e-30  # states below this are set to 0 (no subnormal numbers in silence)


@nb.njit(error_model="numpy", nogil=True)
def design(s, low, high, tau_ms, fs):
    """Write the coefficients for these values into this channel's STATE (no allocation)."""
    s[S.c_low] = low  # noqa: F821 (S and P are injected by livedyn)
    s[S.c_high] = high  # noqa: F821
    s[S.c_fs] = fs  # noqa: F821
    s[S.c_tau] = tau_ms  # noqa: F821
    high = min(high, 0.45 * fs)  # a corner at Nyquist would put the poles on the unit circle
    # high-pass (Audio EQ Cookbook HPF)
    w0 = 2.0 * math.pi * low / fs
    cw = math.cos(w0)
    alpha = math.sin(w0) / (2.0 * BUTTERWORTH_Q)
    a0 = 1.0 + alpha
    s[S.hb0] = 0.5 * (1.0 + cw) / a0  # noqa: F821
    s[S.hb1] = -(1.0 + cw) / a0  # noqa: F821
    s[S.hb2] = 0.5 * (1.0 + cw) / a0  # noqa: F821
    s[S.ha1] = -2.0 * cw / a0  # noqa: F821
    s[S.ha2] = (1.0 - alpha) / a0  # noqa: F821
    # low-pass (Audio EQ Cookbook LPF)
    w0 = 2.0 * math.pi * high / fs
    cw = math.cos(w0)
    alpha = math.sin(w0) / (2.0 * BUTTERWORTH_Q)
    a0 = 1.0 + alpha
    s[S.lb0] = 0.5 * (1.0 - cw) / a0  # noqa: F821
    s[S.lb1] = (1.0 - cw) / a0  # noqa: F821
    s[S.lb2] = 0.5 * (1.0 - cw) / a0  # noqa: F821
    s[S.la1] = -2.0 * cw / a0  # noqa: F821
    s[S.la2] = (1.0 - alpha) / a0  # noqa: F821
    s[S.a_ms] = math.exp(-1000.0 / (tau_ms * fs))  # noqa: F821 (rms_time >= 0.1 ms)


def detector(k, p, s):
    fs = p[P.samplerate]
    low = p[P.low]  # noqa: F821
    high = p[P.high]  # noqa: F821
    tau = p[P.rms_time]  # noqa: F821
    if (low != s[S.c_low] or high != s[S.c_high] or fs != s[S.c_fs]  # noqa: F821
            or tau != s[S.c_tau]):  # noqa: F821
        design(s, low, high, tau, fs)
    if not math.isfinite(k):  # never let a NaN into a recursive state
        k = 0.0

    # high-pass, transposed direct form II
    y = s[S.hb0] * k + s[S.hz1]  # noqa: F821
    z1 = s[S.hb1] * k - s[S.ha1] * y + s[S.hz2]  # noqa: F821
    z2 = s[S.hb2] * k - s[S.ha2] * y  # noqa: F821
    if abs(z1) < TINY and abs(z2) < TINY:  # flush both or neither (one alone rings on)
        z1 = 0.0
        z2 = 0.0
    s[S.hz1] = z1  # noqa: F821
    s[S.hz2] = z2  # noqa: F821

    # low-pass
    v = s[S.lb0] * y + s[S.lz1]  # noqa: F821
    z1 = s[S.lb1] * y - s[S.la1] * v + s[S.lz2]  # noqa: F821
    z2 = s[S.lb2] * y - s[S.la2] * v  # noqa: F821
    if abs(z1) < TINY and abs(z2) < TINY:
        z1 = 0.0
        z2 = 0.0
    s[S.lz1] = z1  # noqa: F821
    s[S.lz2] = z2  # noqa: F821

    # mean square, then the sine-referenced rms level (linear amplitude)
    a = s[S.a_ms]  # noqa: F821
    ms = a * s[S.ms] + (1.0 - a) * v * v  # noqa: F821
    if ms < TINY:
        ms = 0.0
    s[S.ms] = ms  # noqa: F821
    return math.sqrt(2.0 * ms)


def gain_curve(level_db, p):
    d = level_db - p[P.threshold]  # noqa: F821
    w = p[P.knee]  # noqa: F821
    depth = p[P.depth]  # noqa: F821
    if 2.0 * d <= -w:  # (w = 0: a hard switch at threshold)
        return 0.0
    if 2.0 * d >= w:
        return -depth
    t = (d + 0.5 * w) / w
    return -depth * t * t * (3.0 - 2.0 * t)

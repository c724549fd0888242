"""Compressor with program-dependent release: fast after a transient, slow after a long squeeze.

What it does
------------
A plain release time is a compromise. Short (tens of ms) and the gain recovers between the
notes of a sustained passage, so the level pumps; long (a second) and one drum hit leaves a
hole in the quiet part after it. This file runs two smoothers on the same gain computer output
and keeps whichever asks for more attenuation:

* the *fast* envelope: the usual attack, then the short ``release_fast``;
* the *slow* envelope: it charges slowly (time constant ``sustain``) and lets go slowly
  (``release_slow``).

A transient much shorter than ``sustain`` barely charges the slow envelope, so the fast one
decides the recovery. Gain reduction that lasts several ``sustain`` time constants charges the
slow envelope fully, and the recovery then follows ``release_slow``. Nothing but the duration
of the gain reduction chooses between the two: the release is program-dependent.

Equations (per sample n, per gain channel; gains in dB, <= 0)
------------------------------------------------------------
``c[n]`` is the built-in compressor curve's output (threshold, ratio, knee; livedyn's peak
detector). One-pole coefficient of a time constant tau: ``a(tau) = exp(-1 / (tau fs))``.

    f[n] = a_att f[n-1] + (1 - a_att) c[n]     if c[n] < f[n-1]   (towards more reduction)
    f[n] = a_rf  f[n-1] + (1 - a_rf)  c[n]     otherwise          (release_fast)
    s[n] = a_sus s[n-1] + (1 - a_sus) c[n]     if c[n] < s[n-1]   (sustain)
    s[n] = a_rs  s[n-1] + (1 - a_rs)  c[n]     otherwise          (release_slow)
    g[n] = min(f[n], s[n])

Each envelope is the smooth branching peak detector of Giannoulis, Massberg and Reiss,
"Digital Dynamic Range Compressor Design - A Tutorial and Analysis", J. Audio Eng. Soc. 60(6),
2012, eq. (16), applied in the gain domain (as livedyn's built-in log-domain ballistics).
Running two release circuits in parallel and taking the larger reduction is an old analog
side-chain practice (two hold capacitors with different discharge resistors); it is common
practice, no published source is claimed for this exact form.

What to expect (derived from the equations above)
-------------------------------------------------
After a burst of constant reduction G lasting T (with attack << T), the slow envelope holds
``G (1 - exp(-T / sustain))``. The gain then recovers to G/e (63 % of the way back) after
``release_fast`` as long as that charge is below G/e, i.e. for T < 0.459 sustain
(0.459 = -ln(1 - 1/e)); after T >> sustain it recovers to G/e after ``release_slow``.
If ``release_slow`` <= ``release_fast`` the slow envelope never wins and this is a plain
compressor with release ``release_fast``.

livedyn API used: a ``smoother`` stage (built-in detector and compressor curve around it) and
two STATE slots per gain channel. The state changes only per sample, so any host block split
gives the same output. Cost: four exp() per sample and channel (well below 1 us); see
speech_key.py for how to cache coefficients in STATE when a stage needs costlier ones.
"""
import math


NAME = "program-release"
PARAMS = [
    "threshold", "ratio", "knee", "attack", "makeup",
    Param("release_fast", "ms", 1, 2000, 60,  # noqa: F821 (Param is injected by livedyn)
          help="release after short gain reduction (transients); one-pole time constant"),
    Param("release_slow", "ms", 10, 5000, 1200,  # noqa: F821
          help="release after long gain reduction (sustained passages); time constant"),
    Param("sustain", "ms", 10, 5000, 300,  # noqa: F821
          help="how long reduction must last before the slow release takes over: the time "
               "constant with which the slow envelope charges"),
]
STATE = ["fast", "slow"]  # the two envelopes, dB (<= 0), per gain channel


def smoother(gain_db, p, s):
    fs = p[P.samplerate]
    # One-pole coefficients a = exp(-1 / (tau fs)), tau in ms; tau = 0 (attack only) follows at
    # once. Computed per sample here for clarity: four exp() are cheap enough.
    t_att = p[P.attack]  # noqa: F821 (P and S are injected by livedyn)
    a_att = math.exp(-1000.0 / (t_att * fs)) if t_att > 0.0 else 0.0
    a_rf = math.exp(-1000.0 / (p[P.release_fast] * fs))  # noqa: F821
    a_rs = math.exp(-1000.0 / (p[P.release_slow] * fs))  # noqa: F821
    a_sus = math.exp(-1000.0 / (p[P.sustain] * fs))  # noqa: F821

    f = s[S.fast]  # noqa: F821
    if gain_db < f:
        f = a_att * f + (1.0 - a_att) * gain_db
    else:
        f = a_rf * f + (1.0 - a_rf) * gain_db
    sl = s[S.slow]  # noqa: F821
    if gain_db < sl:
        sl = a_sus * sl + (1.0 - a_sus) * gain_db
    else:
        sl = a_rs * sl + (1.0 - a_rs) * gain_db
    # keep the envelopes out of subnormal numbers as they decay towards 0 dB
    if -1e-30 < f < 1e-30:
        f = 0.0
    if -1e-30 < sl < 1e-30:
        sl = 0.0
    s[S.fast] = f  # noqa: F821
    s[S.slow] = sl  # noqa: F821
    return f if f < sl else sl

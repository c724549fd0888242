"""Loudness-following ducker: the louder the key, the deeper the programme ducks.

What it does
------------
Under a narrator a music bed usually ducks by a fixed amount. A quiet aside then loses against
the bed while a shout buries it more than needed. Here the depth follows the key's loudness:
from ``depth_min`` when the key reaches ``onset`` up to ``depth_max`` at ``onset + span``;
below ``onset`` the depth fades out over ``fade`` LU, so near-silence in the key (breaths,
room tone) does not duck. Loudness is measured as in ITU-R BS.1770-4: K-weighting, mean
square, a 400 ms window. Ducking that follows loudness rather than a fixed depth is common
practice in broadcast, no published source is claimed for this mapping.

Written as a whole ``kernel`` to show that API: the file does its own key measurement, gain
computer, smoothing and gain; none of livedyn's stages run. The main input itself is the key
when no separate key signal is given.

Equations
---------
1. K-weighting of each key channel (BS.1770-4 Annex 1): a high shelf then a high-pass, each the
   bilinear transform, pre-warped at its corner f0 (K = tan(pi f0 / fs)), of an analog
   prototype

       shelf:     H(s) = (Vh s^2 + Vb (w0/Q) s + w0^2) / (s^2 + (w0/Q) s + w0^2)
       high-pass: H(s) = g s^2 / (s^2 + (w0/Q) s + w0^2)

   which gives, with a0 = 1 + K/Q + K^2,

       shelf:     b = [Vh + Vb K/Q + K^2, 2 (K^2 - Vh), Vh - Vb K/Q + K^2] / a0
       high-pass: b = [g, -2 g, g] / a0
       both:      a = [1, 2 (K^2 - 1) / a0, (1 - K/Q + K^2) / a0]

   BS.1770-4 prints the coefficients for 48 kHz only (Tables 1 and 2). The prototype values
   below were obtained by inverting the bilinear transform on those tables; at 48 kHz the
   formulas give the tables back, at other rates the same analog response. The figures f0, Q,
   Vh, Vb agree with those of pyloudnorm's "DeMan" filter class (pyloudnorm: C. J. Steinmetz,
   J. D. Reiss, "pyloudnorm: A simple yet flexible loudness meter in Python", AES Convention
   150, 2021; citation recalled from memory). The high-pass gain g is the value that makes
   the 48 kHz numerator exactly the table's 1, -2, 1, and is kept at every rate (the same
   analog filter); pyloudnorm keeps the digital numerator 1, -2, 1 instead, which differs by
   0.004 dB at 44.1 kHz.

2. Momentary loudness (BS.1770-4 eqs. 1-2; the 400 ms window is also EBU Tech 3341's
   "momentary" time scale): per 100 ms sub-block of H = round(fs / 10) samples, the mean of
   the K-weighted squares summed over key channels (channel weight G_i = 1: a mono or stereo
   key), e_m = (1/H) sum y^2. At the end of each sub-block

       z = (e_m + e_(m-1) + e_(m-2) + e_(m-3)) / 4,      L = -0.691 + 10 log10(z)  LUFS

   so L is updated every 100 ms over the last 400 ms: the gating blocks of BS.1770-4, which
   overlap by 75 %. Before 400 ms of key have been seen the missing sub-blocks count as
   silence.

3. Depth (dB, >= 0) from loudness, piecewise linear through (onset - fade, 0),
   (onset, depth_min) and (onset + span, depth_max); constant beyond the last point:

       L >= onset:                 D = depth_min + (depth_max - depth_min) min((L - onset)/span, 1)
       onset - fade < L < onset:   D = depth_min (L - onset + fade) / fade
       otherwise:                  D = 0

   (depth_max below depth_min is taken as depth_min.)

4. Gain smoothing in dB, the smooth branching peak detector of Giannoulis, Massberg and Reiss,
   "Digital Dynamic Range Compressor Design - A Tutorial and Analysis", J. Audio Eng. Soc.
   60(6), 2012, eq. (16), with target -D:

       y[n] = a y[n-1] + (1 - a) (-D),   a = exp(-1 / (attack fs)) while -D < y[n-1],
                                         a = exp(-1 / (release fs)) otherwise

   and every main channel is multiplied by 10^(y/20) (<= 1: the ducker never boosts).

State: per key channel j, the filter states in row j of ``s``; the sub-block sums, the ring of
the last four, the loudness, target and gain in row 0. ``s[0, S.loudness]`` holds the latest
momentary loudness in LUFS (valid once 100 ms have been processed), for a meter. All state
advances per sample, so any host block split gives the same output. Non-finite samples are
taken as 0 (key) or written as 0 (main).
"""
import math

import numba as nb


NAME = "loudness-ducker"
PARAMS = [
    "attack", "release",
    Param("onset", "LUFS", -70, 0, -40,  # noqa: F821 (Param is injected by livedyn)
          help="key loudness at which ducking reaches depth_min"),
    Param("span", "LU", 1, 40, 16,  # noqa: F821
          help="loudness above onset over which the depth grows to depth_max"),
    Param("fade", "LU", 0, 20, 4,  # noqa: F821
          help="loudness below onset over which the depth fades from depth_min to 0"),
    Param("depth_min", "dB", 0, 40, 4,  # noqa: F821
          help="attenuation of the main signal when the key is at onset"),
    Param("depth_max", "dB", 0, 60, 16,  # noqa: F821
          help="attenuation of the main signal when the key is at onset + span or louder"),
]
STATE = [
    "sz1", "sz2", "hz1", "hz2",  # per key channel: shelf and high-pass states
    "acc", "fill", "pos", "e0", "e1", "e2", "e3",  # row 0: sub-block sum, count, ring of 4
    "loudness", "target", "gain",  # row 0: momentary LUFS, target gain dB, smoothed gain dB
]

# Analog prototypes of the K-weighting (see the module notes, equation 1).
SHELF_F0 = 1681.9744509555323  # Hz
SHELF_Q = 0.70717523695541928
SHELF_VH = 1.5848647011308554  # high-frequency gain, +3.99984 dB
SHELF_VB = 1.2587209302325613  # mid-band numerator gain
HP_F0 = 38.135470876113047  # Hz
HP_Q = 0.50032703732504213
HP_G = 1.0049948987146884  # 1 + K/Q + K^2 at 48 kHz: the table's numerator 1, -2, 1
LUFS_OFFSET = -0.691  # BS.1770-4 eq. (2)
FLOOR_LUFS = -200.0  # reading of silence (livedyn's level floor)
TINY = 1e-30


@nb.njit(error_model="numpy", nogil=True)
def kweighting(fs):
    """(b0, b1, b2, a1, a2) of the shelf, then of the high-pass, for sample rate fs."""
    k = math.tan(math.pi * SHELF_F0 / fs)
    kq = k / SHELF_Q
    k2 = k * k
    a0 = 1.0 + kq + k2
    s = ((SHELF_VH + SHELF_VB * kq + k2) / a0, 2.0 * (k2 - SHELF_VH) / a0,
         (SHELF_VH - SHELF_VB * kq + k2) / a0, 2.0 * (k2 - 1.0) / a0, (1.0 - kq + k2) / a0)
    k = math.tan(math.pi * HP_F0 / fs)
    kq = k / HP_Q
    k2 = k * k
    a0 = 1.0 + kq + k2
    g = HP_G / a0
    h = (g, -2.0 * g, g, 2.0 * (k2 - 1.0) / a0, (1.0 - kq + k2) / a0)
    return s + h


@nb.njit(error_model="numpy", nogil=True)
def depth_db(lufs, onset, span, fade, dmin, dmax):
    """Equation 3: attenuation in dB (>= 0) for a key loudness in LUFS."""
    if dmax < dmin:
        dmax = dmin
    if lufs >= onset:
        t = (lufs - onset) / span
        if t > 1.0:
            t = 1.0
        return dmin + (dmax - dmin) * t
    if fade > 0.0 and lufs > onset - fade:
        return dmin * (lufs - onset + fade) / fade
    return 0.0


def kernel(x, key, out, p, s):
    frames = x.shape[0]
    ch = x.shape[1]
    nk = key.shape[1]
    fs = p[P.samplerate]
    sb0, sb1, sb2, sa1, sa2, hb0, hb1, hb2, ha1, ha2 = kweighting(fs)
    hop = math.floor(fs / 10.0 + 0.5)  # samples per 100 ms sub-block
    t_att = p[P.attack]  # noqa: F821 (P and S are injected by livedyn)
    a_att = math.exp(-1000.0 / (t_att * fs)) if t_att > 0.0 else 0.0
    a_rel = math.exp(-1000.0 / (p[P.release] * fs))  # noqa: F821
    onset = p[P.onset]  # noqa: F821
    span = p[P.span]  # noqa: F821
    fade = p[P.fade]  # noqa: F821
    dmin = p[P.depth_min]  # noqa: F821
    dmax = p[P.depth_max]  # noqa: F821

    acc = s[0, S.acc]  # noqa: F821
    fill = s[0, S.fill]  # noqa: F821
    target = s[0, S.target]  # noqa: F821
    y = s[0, S.gain]  # noqa: F821
    for n in range(frames):
        # 1. K-weighting and the sum of squares over key channels
        e = 0.0
        for j in range(nk):
            v = key[n, j]
            if not math.isfinite(v):
                v = 0.0
            u = sb0 * v + s[j, S.sz1]  # noqa: F821 (shelf, transposed direct form II)
            z1 = sb1 * v - sa1 * u + s[j, S.sz2]  # noqa: F821
            z2 = sb2 * v - sa2 * u
            if abs(z1) < TINY and abs(z2) < TINY:  # flush both or neither
                z1 = 0.0
                z2 = 0.0
            s[j, S.sz1] = z1  # noqa: F821
            s[j, S.sz2] = z2  # noqa: F821
            w = hb0 * u + s[j, S.hz1]  # noqa: F821 (high-pass)
            z1 = hb1 * u - ha1 * w + s[j, S.hz2]  # noqa: F821
            z2 = hb2 * u - ha2 * w
            if abs(z1) < TINY and abs(z2) < TINY:
                z1 = 0.0
                z2 = 0.0
            s[j, S.hz1] = z1  # noqa: F821
            s[j, S.hz2] = z2  # noqa: F821
            e += w * w
        acc += e
        fill += 1.0

        # 2. end of a 100 ms sub-block: momentary loudness, 3. new target depth
        if fill >= hop:
            pos = int(s[0, S.pos])  # noqa: F821
            s[0, S.e0 + pos] = acc / hop  # noqa: F821 (e0..e3 are consecutive slots)
            s[0, S.pos] = float((pos + 1) % 4)  # noqa: F821
            z = 0.25 * (s[0, S.e0] + s[0, S.e1] + s[0, S.e2] + s[0, S.e3])  # noqa: F821
            lufs = LUFS_OFFSET + 10.0 * math.log10(z) if z > 1e-20 else FLOOR_LUFS
            s[0, S.loudness] = lufs  # noqa: F821
            target = -depth_db(lufs, onset, span, fade, dmin, dmax)
            acc = 0.0
            fill = 0.0

        # 4. gain smoothing (towards more attenuation with attack) and the gain itself
        a = a_att if target < y else a_rel
        y = a * y + (1.0 - a) * target
        if -TINY < y < TINY:
            y = 0.0
        g = math.exp(y * (math.log(10.0) / 20.0))
        for c in range(ch):
            v = x[n, c]
            out[n, c] = v * g if math.isfinite(v) else 0.0

    s[0, S.acc] = acc  # noqa: F821
    s[0, S.fill] = fill  # noqa: F821
    s[0, S.target] = target  # noqa: F821
    s[0, S.gain] = y  # noqa: F821

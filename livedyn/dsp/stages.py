"""Building blocks of the fused kernels: one concept a function, all scalar and inlinable.

Every function here is a numba ``njit`` function over scalars or small arrays. The fused kernels in
:mod:`livedyn.dsp.dynamics` and :mod:`livedyn.dsp.limiter` call them per sample; a user-written
algorithm can call them too.

References
----------
.. [1] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design - A
       Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012. Gain computer (hard and soft
       knee), smooth branching and smooth decoupled peak detectors, log- and linear-domain
       detector placement, feedforward and feedback topologies.
.. [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients"
       (the Audio EQ Cookbook). Low-pass, high-pass and constant-0-dB-peak band-pass.
"""
import math

import numba as nb

from ..params import LEVEL_FLOOR_DB

JIT = dict(cache=True, nogil=True, error_model="numpy")

LN10_OVER_20 = math.log(10.0) / 20.0
DB_PER_NEPER_AMP = 20.0 / math.log(10.0)
DB_PER_NEPER_POW = 10.0 / math.log(10.0)
TINY = 1e-30  # below this a state value is flushed to zero (keeps states out of subnormals)
LEVEL_FLOOR_AMP = 10.0 ** (LEVEL_FLOOR_DB / 20.0)
LEVEL_FLOOR_POW = 10.0 ** (LEVEL_FLOOR_DB / 10.0)


@nb.njit(**JIT)
def one_pole_coeff(tau_ms, fs):
    """alpha = exp(-1 / (tau fs)); tau <= 0 gives 0 (the output follows the input at once)."""
    if tau_ms <= 0.0:
        return 0.0
    return math.exp(-1000.0 / (tau_ms * fs))


@nb.njit(**JIT)
def amp_to_db(a):
    """20 log10 |a|, floored at LEVEL_FLOOR_DB."""
    if a <= LEVEL_FLOOR_AMP:
        return LEVEL_FLOOR_DB
    return DB_PER_NEPER_AMP * math.log(a)


@nb.njit(**JIT)
def pow_to_db(p):
    """10 log10 p, floored at LEVEL_FLOOR_DB."""
    if p <= LEVEL_FLOOR_POW:
        return LEVEL_FLOOR_DB
    return DB_PER_NEPER_POW * math.log(p)


@nb.njit(**JIT)
def db_to_amp(db):
    return math.exp(LN10_OVER_20 * db)


@nb.njit(**JIT)
def flush(v):
    """v, or 0.0 when |v| is small enough to become subnormal soon."""
    if -TINY < v < TINY:
        return 0.0
    return v


# ---------------------------------------------------------------------------------------------
# Key filters [2]. Coefficients live in row ``crow`` of a state array: columns 0..4 hold
# b0, b1, b2, a1, a2 (a0 normalised to 1); the two state values live in rows zrow, zrow + 1.


@nb.njit(**JIT)
def _biquad_store(st, crow, b0, b1, b2, a0, a1, a2):
    st[crow, 0] = b0 / a0
    st[crow, 1] = b1 / a0
    st[crow, 2] = b2 / a0
    st[crow, 3] = a1 / a0
    st[crow, 4] = a2 / a0


@nb.njit(**JIT)
def biquad_lowpass(st, crow, f0, q, fs):
    w0 = 2.0 * math.pi * f0 / fs
    cw = math.cos(w0)
    alpha = math.sin(w0) / (2.0 * q)
    _biquad_store(st, crow, (1.0 - cw) * 0.5, 1.0 - cw, (1.0 - cw) * 0.5,
                  1.0 + alpha, -2.0 * cw, 1.0 - alpha)


@nb.njit(**JIT)
def biquad_highpass(st, crow, f0, q, fs):
    w0 = 2.0 * math.pi * f0 / fs
    cw = math.cos(w0)
    alpha = math.sin(w0) / (2.0 * q)
    _biquad_store(st, crow, (1.0 + cw) * 0.5, -(1.0 + cw), (1.0 + cw) * 0.5,
                  1.0 + alpha, -2.0 * cw, 1.0 - alpha)


@nb.njit(**JIT)
def biquad_bandpass(st, crow, f0, q, fs):
    """Band-pass with constant 0 dB peak gain [2]."""
    w0 = 2.0 * math.pi * f0 / fs
    cw = math.cos(w0)
    alpha = math.sin(w0) / (2.0 * q)
    _biquad_store(st, crow, alpha, 0.0, -alpha, 1.0 + alpha, -2.0 * cw, 1.0 - alpha)


@nb.njit(**JIT)
def biquad_tick(st, crow, zrow, j, x):
    """One sample through a transposed direct form II biquad (state in column j)."""
    y = st[crow, 0] * x + st[zrow, j]
    st[zrow, j] = flush(st[crow, 1] * x - st[crow, 3] * y + st[zrow + 1, j])
    st[zrow + 1, j] = flush(st[crow, 2] * x - st[crow, 4] * y)
    return y


# ---------------------------------------------------------------------------------------------
# Gain computers [1]: level in dB -> gain in dB (<= 0 means attenuation).
# The ratio arrives as its slope s = 1 - 1/ratio, so that ratio = inf is s = 1.


@nb.njit(**JIT)
def compressor_gain(x_db, threshold, slope, knee):
    """Static compressor curve of [1], eq. (4) (soft knee) / eq. (3) (hard knee), as gain in dB.

    Above the knee: y = T + (x - T) / R, so the gain is -s (x - T). Inside the knee
    (|x - T| <= W/2): y = x + (1/R - 1)(x - T + W/2)^2 / (2W), so the gain is
    -s (x - T + W/2)^2 / (2W).
    """
    d = x_db - threshold
    if knee > 0.0:
        if 2.0 * d < -knee:
            return 0.0
        if 2.0 * d <= knee:
            e = d + 0.5 * knee
            return -slope * e * e / (2.0 * knee)
        return -slope * d
    if d > 0.0:
        return -slope * d
    return 0.0


@nb.njit(**JIT)
def expander_gain(x_db, threshold, slope, knee, range_db):
    """Downward expander: below threshold the output falls R dB per input dB.

    Hard knee: gain = (R - 1) min(x - T, 0), bounded below by -range. The soft knee is the
    quadratic that joins the two slopes across |x - T| <= W/2, mirrored from the compressor form
    of [1]: gain = -(R - 1)(x - T - W/2)^2 / (2W). An infinite ratio (s = 1) is a hard switch to
    -range below threshold.
    """
    d = x_db - threshold
    if slope >= 1.0:
        return -range_db if d < 0.0 else 0.0
    e_slope = slope / (1.0 - slope)  # R - 1
    if knee > 0.0:
        if 2.0 * d > knee:
            g = 0.0
        elif 2.0 * d >= -knee:
            e = d - 0.5 * knee
            g = -e_slope * e * e / (2.0 * knee)
        else:
            g = e_slope * d
    else:
        g = e_slope * d if d < 0.0 else 0.0
    if g < -range_db:
        return -range_db
    return g


@nb.njit(**JIT)
def ducker_gain(key_db, threshold, slope, knee, range_db):
    """Key-driven attenuation: the compressor curve of the key level, bounded by -range."""
    g = compressor_gain(key_db, threshold, slope, knee)
    if g < -range_db:
        return -range_db
    return g


# ---------------------------------------------------------------------------------------------
# Ballistics [1]. y is the smoothed value, target the new input; a_fast/a_slow are the one-pole
# coefficients of the two directions. Written for signals where "down" is the direction that
# uses a_down (gain in dB: down = more attenuation).


@nb.njit(**JIT)
def smooth_branching(y, target, a_down, a_up):
    """Smooth branching peak detector [1], eq. (16), in the gain domain."""
    if target < y:
        return a_down * y + (1.0 - a_down) * target
    return a_up * y + (1.0 - a_up) * target


@nb.njit(**JIT)
def level_branching(y, level, a_att, a_rel):
    """Smooth branching peak detector [1], eq. (16), on a level (rise uses attack)."""
    if level > y:
        return a_att * y + (1.0 - a_att) * level
    return a_rel * y + (1.0 - a_rel) * level

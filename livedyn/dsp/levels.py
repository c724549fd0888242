"""Level-meter ballistics: sample peak with hold and fall, and time-weighted RMS.

Per channel, from the samples ``x[n]``:

* peak bar: rises at once to ``|x[n]|`` and otherwise falls at a fixed rate in dB per second
  (a per-sample factor ``10 ** (-fall / (20 fs))``);
* peak hold: rises at once, stays for the hold time after its last rise, then falls at the same
  rate; it never reads below the bar;
* maximum peak: the largest ``|x[n]|`` since reset (no fall);
* RMS: exponential time weighting of the square, ``ms[n] = a ms[n-1] + (1 - a) x[n]^2`` with
  ``a = exp(-1 / (tau fs))``: a step reaches ``1 - 1/e`` (63.2 %) of its final mean square
  after ``tau``. IEC 61672-1 names tau = 125 ms "Fast" and tau = 1 s "Slow"; any tau > 0 works.

Readings in dBFS: peaks as ``20 log10(level)``; RMS as ``10 log10(2 ms)``, so that a full-scale
sine reads 0 dBFS like its peak (AES17 reference). A reading below ``LEVEL_FLOOR_DB`` (-200)
reads ``LEVEL_FLOOR_DB``.

Defaults: hold 1.0 s, fall 20 dB/s (common practice, no source).

Non-finite samples are taken as 0; levels below the floor and mean squares below 1e-30 are
flushed to 0, so no state becomes subnormal during silence.

References
----------
.. [1] IEC 61672-1:2013, "Electroacoustics - Sound level meters - Part 1: Specifications",
   time weightings F and S (exponential, time constants 125 ms and 1 s).
.. [2] AES17-2020, "AES standard method for digital audio engineering - Measurement of digital
   audio equipment": full-scale sine as the 0 dBFS reference for RMS readings.
"""
from __future__ import annotations

import math

import numba
import numpy as np

from ..params import LEVEL_FLOOR_DB

#: Default peak hold time (s) and fall rate (dB/s): common practice, no source.
DEFAULT_HOLD_S = 1.0
DEFAULT_FALL_DB_PER_S = 20.0
#: IEC 61672-1 time constants, seconds.
TAU_FAST = 0.125
TAU_SLOW = 1.0
#: Linear amplitude of LEVEL_FLOOR_DB: peak levels below it are set to 0.
PEAK_FLOOR = 10.0 ** (LEVEL_FLOOR_DB / 20.0)
#: Mean squares below this are set to 0.
TINY = 1e-30

# columns of the per-channel state (channels, NSTATE)
L_BAR = 0  # peak bar, linear
L_HOLD = 1  # peak hold, linear
L_HOLD_LEFT = 2  # samples of hold left
L_MAX = 3  # maximum |x| since reset
L_MS = 4  # time-weighted mean square
NSTATE = 5
# slots of the coefficient vector (NCOEF,)
K_FALL = 0  # per-sample fall factor
K_HOLD = 1  # hold time in samples
K_RMS_A = 2  # a = exp(-1 / (tau fs))
K_RMS_B = 3  # 1 - a
NCOEF = 4

_JIT = dict(cache=True, error_model="numpy", nogil=True)


def level_coeffs(fs, rms_tau_s=TAU_FAST, hold_s=DEFAULT_HOLD_S, fall_db_per_s=DEFAULT_FALL_DB_PER_S):
    """Coefficient vector for :func:`level_block`.

    Parameters
    ----------
    fs : float
        Sample rate, Hz (> 0).
    rms_tau_s : float
        RMS time constant tau in seconds (> 0); 0.125 is IEC 61672-1 Fast, 1.0 is Slow.
    hold_s : float
        Peak hold time, seconds (>= 0).
    fall_db_per_s : float
        Fall rate of the peak bar and hold, dB per second (> 0).

    Returns
    -------
    ndarray, float64 (NCOEF,)

    References
    ----------
    .. [1] IEC 61672-1:2013, exponential time weighting.
    """
    fs = _positive("samplerate", fs, "Hz")
    tau = _positive("rms_tau", rms_tau_s, "s")
    fall = _positive("fall", fall_db_per_s, "dB/s")
    hold = float(hold_s)
    if not (0.0 <= hold < math.inf):
        raise ValueError(f"hold = {hold_s!r} s: out of range, expected 0 or more seconds")
    c = np.zeros(NCOEF, dtype=np.float64)
    c[K_FALL] = 10.0 ** (-fall / (20.0 * fs))
    c[K_HOLD] = float(round(hold * fs))
    a = math.exp(-1.0 / (tau * fs))
    c[K_RMS_A] = a
    c[K_RMS_B] = 1.0 - a
    return c


def _positive(name, value, unit):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {value!r}: not a number, expected a number above 0 {unit}") from None
    if not (0.0 < v < math.inf):
        raise ValueError(f"{name} = {value!r} {unit}: out of range, expected above 0 {unit}")
    return v


def new_state(channels):
    """A reset level-meter state, float64 (channels, NSTATE)."""
    return np.zeros((int(channels), NSTATE), dtype=np.float64)


@numba.njit(**_JIT)
def level_block(x, coef, state):
    """Run the peak, peak-hold, maximum and RMS ballistics over one block.

    Parameters
    ----------
    x : ndarray, float32 (frames, channels)
        Input block.
    coef : ndarray, float64 (NCOEF,)
        From :func:`level_coeffs`.
    state : ndarray, float64 (channels, NSTATE)
        Columns ``L_BAR``, ``L_HOLD``, ``L_HOLD_LEFT``, ``L_MAX``, ``L_MS``; carried between
        blocks and read by the control side.

    Notes
    -----
    No allocation; the state after a signal does not depend on how it was split into blocks.

    References
    ----------
    .. [1] IEC 61672-1:2013, exponential time weighting (RMS part).
    """
    frames = x.shape[0]
    channels = x.shape[1]
    fall = coef[K_FALL]
    hold_n = coef[K_HOLD]
    ra = coef[K_RMS_A]
    rb = coef[K_RMS_B]
    for c in range(channels):
        bar = state[c, L_BAR]
        hold = state[c, L_HOLD]
        left = state[c, L_HOLD_LEFT]
        mx = state[c, L_MAX]
        ms = state[c, L_MS]
        for n in range(frames):
            v = float(x[n, c])
            if not (abs(v) < np.inf):
                v = 0.0
            a = abs(v)
            if a > bar:
                bar = a
            else:
                bar *= fall
                if bar < PEAK_FLOOR:
                    bar = 0.0
            if a >= hold and a > 0.0:
                hold = a
                left = hold_n
            elif left > 0.0:
                left -= 1.0
            else:
                hold *= fall
                if hold < PEAK_FLOOR:
                    hold = 0.0
            if a > mx:
                mx = a
            ms = ra * ms + rb * (v * v)
            if ms < TINY:
                ms = 0.0
        state[c, L_BAR] = bar
        state[c, L_HOLD] = hold
        state[c, L_HOLD_LEFT] = left
        state[c, L_MAX] = mx
        state[c, L_MS] = ms


@numba.njit(**_JIT)
def amplitude_to_db(v):
    """``20 log10(v)`` dBFS, or ``LEVEL_FLOOR_DB`` below the floor."""
    if v > PEAK_FLOOR:
        return 20.0 * math.log10(v)
    return LEVEL_FLOOR_DB


@numba.njit(**_JIT)
def mean_square_to_db(ms):
    """``10 log10(2 ms)`` dBFS (a full-scale sine reads 0), or ``LEVEL_FLOOR_DB``."""
    p = 2.0 * ms
    if p > PEAK_FLOOR * PEAK_FLOOR:
        return 10.0 * math.log10(p)
    return LEVEL_FLOOR_DB

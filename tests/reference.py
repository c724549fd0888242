"""Independent plain-numpy implementations of published equations, used as references by tests.

Written directly from the sources, in their own form (output level y_G rather than gain, GR as a
positive number x_L as in the paper), so they do not share code or arrangement with
livedyn.dsp.

[GMR2012] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design -
          A Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012.
"""
import numpy as np


def gmr_static_curve(x_g, T, R, W):
    """[GMR2012] eq. (4): soft-knee compressor output level y_G for input level x_G (dB).

    W = 0 gives the hard knee of eq. (3).
    """
    x_g = np.asarray(x_g, dtype=np.float64)
    y = np.empty_like(x_g)
    inv_r = 0.0 if np.isinf(R) else 1.0 / R
    for i, x in enumerate(x_g):
        if W == 0:
            y[i] = x if x <= T else T + (x - T) * inv_r
        elif 2 * (x - T) < -W:
            y[i] = x
        elif 2 * abs(x - T) <= W:
            y[i] = x + (inv_r - 1) * (x - T + W / 2) ** 2 / (2 * W)
        else:
            y[i] = T + (x - T) * inv_r
    return y


def gmr_alpha(tau_s, fs):
    """[GMR2012] eq. (9): alpha = exp(-1 / (tau fs))."""
    return 0.0 if tau_s <= 0 else np.exp(-1.0 / (tau_s * fs))


def gmr_smooth_branching(x_l, a_a, a_r):
    """[GMR2012] eq. (16), smooth branching peak detector on the gain reduction x_L >= 0."""
    y = np.zeros(len(x_l))
    prev = 0.0
    for n, x in enumerate(x_l):
        if x > prev:
            prev = a_a * prev + (1 - a_a) * x
        else:
            prev = a_r * prev + (1 - a_r) * x
        y[n] = prev
    return y


def gmr_smooth_decoupled(x_l, a_a, a_r):
    """[GMR2012] eq. (17), smooth decoupled peak detector on the gain reduction x_L >= 0."""
    y = np.zeros(len(x_l))
    y1 = 0.0
    prev = 0.0
    for n, x in enumerate(x_l):
        y1 = max(x, a_r * y1 + (1 - a_r) * x)
        prev = a_a * prev + (1 - a_a) * y1
        y[n] = prev
    return y


def square(fs, amp, frames, period=96, channels=1):
    """A square wave of exact amplitude: |x| = amp at every sample (no zero crossings on a sample)."""
    n = np.arange(frames)
    x = np.where((n // (period // 2)) % 2 == 0, amp, -amp).astype(np.float32)
    return np.repeat(x[:, None], channels, axis=1)


def db(x):
    return 20 * np.log10(np.maximum(np.abs(x), 1e-300))


def one_pole_db_step(g0_db, g1_db, tau_ms, fs, n):
    """A one-pole of time constant tau on a value in dB, from g0 toward g1 ([GMR2012] eq. (9)
    for the coefficient; the README's definition of release): g[k] = g1 + (g0 - g1) a^k."""
    a = gmr_alpha(tau_ms / 1000.0, fs)
    return g1_db + (g0_db - g1_db) * a ** np.arange(1, n + 1)


def linear_ramp_gain(r, steps, n):
    """A straight line of the linear gain from 1 down to r reached after ``steps`` samples,
    then held (the limiter's attack as the README defines it): 1 - (1 - r) min(k, steps)/steps
    for k = 1..n."""
    k = np.minimum(np.arange(1, n + 1), steps)
    return 1.0 - (1.0 - r) * k / steps


def expander_with_hysteresis_gain(x_db, T, R, hyst, range_db, was_open):
    """Hard-knee downward expander whose threshold drops to T - hyst while open (common
    practice, no source): the state after this sample and its gain in dB."""
    is_open = True if x_db >= T else (False if x_db < T - hyst else was_open)
    t_eff = T - hyst if is_open else T
    g = (R - 1.0) * min(x_db - t_eff, 0.0)
    return is_open, max(g, -range_db)

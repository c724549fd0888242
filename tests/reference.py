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

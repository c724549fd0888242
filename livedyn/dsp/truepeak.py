"""True-peak level by 4x oversampling (ITU-R BS.1770-4 Annex 2).

The input is interpolated to four times its sample rate with a 48-tap FIR split into four
phases of 12 taps; the true-peak value is the largest magnitude of the interpolated signal.

Layout and alignment
--------------------
``TP_TAPS[k, j]`` is tap ``4 * j + k`` of the 48-tap interpolation filter ``h``, so the
interpolated value of phase ``k`` after input sample ``n`` is::

    u[4 n + k] = sum_j TP_TAPS[k, j] * x[n - j]          (k = 0..3, j = 0..11)

which is exactly ``scipy.signal.upfirdn(h, x, up=4)``. ``h`` is symmetric (linear phase) with a
group delay of 23.5 samples at the 4x rate, so ``u[4 n + k]`` estimates the signal at input time
``n - TP_DELAY + k / 4`` with ``TP_DELAY = 23.5 / 4 = 5.875`` input samples: the four values
computed when sample ``n`` arrives lie between input samples ``n - 6`` and ``n - 5``, at 1/8, 3/8,
5/8 and 7/8 of that interval. A lookahead limiter that must keep these inter-sample values below
a ceiling therefore needs at least ``TP_LOOKAHEAD = 6`` samples more delay in its audio path than
in its true-peak detector, so that the gain acting on samples ``n - 6`` and ``n - 5`` is known
when they leave.

Fixed point note: Annex 2 also attenuates the input by 12.04 dB before interpolation and adds
12.04 dB back to the result. That gives headroom to integer arithmetic only; in floating point
it changes nothing and is not done here.

Sample rates: the same 4x filter is used at every rate (its response scales with the rate). At
44.1 and 48 kHz this is what Annex 2 asks for; at 96 kHz and above it gives a finer grid than
the standard requires, never a coarser one.

Non-finite input samples (NaN, +/-inf) are treated as 0 and samples smaller than 1e-30 in
magnitude are flushed to 0, so the history ring never holds NaN or subnormal numbers.

References
----------
.. [1] ITU-R BS.1770-4 (10/2015), "Algorithms to measure audio programme loudness and true-peak
   audio level", Annex 2, "Guidelines for accurate measurement of true-peak level".
"""
from __future__ import annotations

import numba
import numpy as np

#: Number of phases (oversampling factor) and taps per phase.
TP_PHASES = 4
TP_PHASE_TAPS = 12
#: Delay of the interpolation filter in input samples (phase k lines up with n - TP_DELAY + k/4).
TP_DELAY = 23.5 / 4.0
#: Whole samples of extra audio delay a limiter needs to act on every interpolated value.
TP_LOOKAHEAD = 6
#: Below this magnitude an input sample is stored as 0 (no subnormals in the ring).
TINY = 1e-30

# BS.1770-4 Annex 2, the example 48-tap, 4-phase interpolation filter (value recalled from
# memory). Phases 2 and 3 are phases 1 and 0 reversed (the filter is symmetric).
_PHASE0 = (
    0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000,
    -0.0594482421875, 0.1373291015625, 0.9721679687500, -0.1022949218750,
    0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500,
)
_PHASE1 = (
    -0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250,
    -0.1665039062500, 0.4650878906250, 0.7797851562500, -0.2003173828125,
    0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375,
)
#: float64 (4, 12): the interpolation filter by phase; ``TP_TAPS[k, j] = h[4 j + k]``.
TP_TAPS = np.array([_PHASE0, _PHASE1, _PHASE1[::-1], _PHASE0[::-1]], dtype=np.float64)
TP_TAPS.setflags(write=False)

_JIT = dict(cache=True, error_model="numpy", nogil=True)


def new_taps():
    """A writable copy of :data:`TP_TAPS` for a meter to own and pass to the kernels."""
    return np.array(TP_TAPS, dtype=np.float64)


def new_history(channels):
    """A zeroed history ring, float64 (12, channels)."""
    return np.zeros((TP_PHASE_TAPS, channels), dtype=np.float64)


@numba.njit(inline="always", **_JIT)
def _clean(x):
    # NaN fails both comparisons; +/-inf fails the first.
    v = float(x)
    if not (abs(v) < np.inf):
        return 0.0
    if abs(v) < TINY:
        return 0.0
    return v


@numba.njit(**_JIT)
def tp_tick(hist, pos, ch, x, taps):
    """Push one input sample of one channel and return its largest interpolated magnitude.

    Parameters
    ----------
    hist : ndarray, float64 (12, channels)
        Ring of past input samples; row ``pos`` is overwritten with ``x``.
    pos : int
        Ring row of the newest sample, 0..11. The caller advances it, ``pos = (pos + 1) % 12``,
        after every channel of the frame has been pushed.
    ch : int
        Channel (column of ``hist``).
    x : float
        The new input sample (non-finite is taken as 0).
    taps : ndarray, float64 (4, 12)
        The phase filters, normally a copy of :data:`TP_TAPS`.

    Returns
    -------
    float
        ``max_k |u[4 n + k]|`` over the four phases computed for this sample; these values
        describe the signal at input times ``n - TP_DELAY + k / 4`` (see the module notes).

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 2.
    """
    hist[pos, ch] = _clean(x)
    y0 = 0.0
    y1 = 0.0
    y2 = 0.0
    y3 = 0.0
    # newest first: rows pos, pos-1, ..., 0, then 11, 10, ..., pos+1 (no branch per tap)
    for j in range(pos + 1):
        v = hist[pos - j, ch]
        y0 += taps[0, j] * v
        y1 += taps[1, j] * v
        y2 += taps[2, j] * v
        y3 += taps[3, j] * v
    for j in range(pos + 1, TP_PHASE_TAPS):
        v = hist[pos - j + TP_PHASE_TAPS, ch]
        y0 += taps[0, j] * v
        y1 += taps[1, j] * v
        y2 += taps[2, j] * v
        y3 += taps[3, j] * v
    m = abs(y0)
    a = abs(y1)
    if a > m:
        m = a
    a = abs(y2)
    if a > m:
        m = a
    a = abs(y3)
    if a > m:
        m = a
    return m


@numba.njit(**_JIT)
def true_peak_block(x, hist, state, taps, peak_out):
    """Update the running true-peak maximum of every channel over one block.

    Parameters
    ----------
    x : ndarray, float32 (frames, channels)
        Input block.
    hist : ndarray, float64 (12, channels)
        History ring (see :func:`tp_tick`); carried from block to block.
    state : ndarray, int64 (1,)
        ``state[0]`` is the ring row that the next sample will be written to.
    taps : ndarray, float64 (4, 12)
        Phase filters, normally a copy of :data:`TP_TAPS`.
    peak_out : ndarray, float64 (channels,)
        Running maximum of the interpolated magnitude, linear (1.0 = 0 dBTP); only raised.

    Notes
    -----
    No allocation; the result does not depend on how a signal is split into blocks.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 2.
    """
    frames = x.shape[0]
    channels = x.shape[1]
    pos = state[0]
    for n in range(frames):
        for c in range(channels):
            p = tp_tick(hist, pos, c, x[n, c], taps)
            if p > peak_out[c]:
                peak_out[c] = p
        pos += 1
        if pos >= TP_PHASE_TAPS:
            pos = 0
    state[0] = pos

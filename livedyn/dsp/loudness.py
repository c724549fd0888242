"""Loudness after ITU-R BS.1770-4 with the EBU R 128 time windows.

Signal path per channel: K-weighting (a high shelf, then a high-pass; two biquads), squaring,
channel weight ``G_i``, then a sum over channels. The weighted squares are averaged over
consecutive 100 ms *sub-blocks* (the hop). From the last sub-blocks:

* momentary loudness: mean of the last 4 sub-blocks (400 ms window);
* short-term loudness: mean of the last 30 sub-blocks (3 s window);
* integrated loudness: the 400 ms momentary blocks, one every 100 ms (75 % overlap), are the
  gating blocks of BS.1770-4 section 2 / Annex 1. Each block above the absolute gate
  (-70 LUFS) is counted into a preallocated histogram of 0.01 LU bins that keeps, per bin, the
  number of blocks and the exact sum of their energies. The relative gate (-10 LU below the
  mean of the absolutely gated blocks) and the final mean are computed from the histogram by
  :func:`loudness_integrated`, so memory is fixed however long the stream runs.

Loudness of an energy ``z`` (weighted mean square): ``-0.691 + 10 log10(z)`` LUFS.

Conventions
-----------
* Silence: a reading whose energy is below the level floor reads ``LEVEL_FLOOR_DB`` (-200.0),
  never ``-inf``; integrated loudness with no block above the absolute gate reads the same.
* Before 400 ms (momentary) or 3 s (short-term) of input have been seen, the missing part of
  the window counts as silence (the ring starts at zero). Integrated loudness counts only full
  400 ms blocks.
* The hop is ``round(fs / 10)`` samples (exactly 100 ms at every usual rate); the windows are
  4 and 30 hops long.
* Non-finite input samples (NaN, +/-inf) are taken as 0 so that a meter is never poisoned;
  samples below 1e-30 in magnitude are flushed to 0, and so are both states of a biquad once
  both are below 1e-30 (flushing one alone would disturb the recursion and let it ring on), so
  no state becomes subnormal in silence.
* Channel weights ``G_i`` (BS.1770-4 Table 3): 1.0 per channel; for 6 channels in the order
  L R C LFE Ls Rs: 1, 1, 1, 0, 1.41, 1.41 (the LFE channel is not measured); for 5 channels in
  the order L R C Ls Rs: 1, 1, 1, 1.41, 1.41; for 8 channels in the order L R C LFE Lb Rb Ls
  Rs: 1, 1, 1, 0, 1, 1, 1.41, 1.41. Other layouts by name: :data:`LAYOUTS`.
* When a histogram bin straddles the relative gate, the whole bin is taken or left by its mean
  energy; the bins are 0.01 LU wide, so this touches only blocks within 0.01 LU of the gate.

K-weighting at any sample rate
------------------------------
BS.1770-4 prints the two biquads for 48 kHz only. Here each is the bilinear transform, pre-warped
at its corner frequency ``f0`` (``K = tan(pi f0 / fs)``), of an analog prototype

* shelf: ``H(s) = (Vh s^2 + Vb (w0 / Q) s + w0^2) / (s^2 + (w0 / Q) s + w0^2)``
* high-pass: ``H(s) = g s^2 / (s^2 + (w0 / Q) s + w0^2)``

whose parameters were obtained by inverting that transform on the printed 48 kHz coefficients:
from ``a1, a2``: ``K^2 = (1 + a1 + a2) / (1 - a1 + a2)``, ``Q = K (1 - a1 + a2) / (2 (1 - a2))``;
from the numerator: ``Vh = (b0 - b1 + b2) / (1 - a1 + a2)``, ``Vb = (b0 - b2) / (1 - a2)``; the
high-pass gain ``g`` is its 48 kHz ``1 + K/Q + K^2`` (the table's numerator is 1, -2, 1). The
table also satisfies ``b0 + b1 + b2 = 1 + a1 + a2`` (unity gain at DC) to 3e-16, so the four
shelf parameters describe it completely.

References
----------
.. [1] ITU-R BS.1770-4 (10/2015), "Algorithms to measure audio programme loudness and true-peak
   audio level", section 2, Annex 1 (Tables 1-3, equations 1-7).
.. [2] EBU R 128 (2020), "Loudness normalisation and permitted maximum level of audio signals",
   and EBU Tech 3341, "Loudness metering: 'EBU Mode' metering to supplement EBU R 128".
"""
from __future__ import annotations

import math

import numba
import numpy as np

from ..params import LEVEL_FLOOR_DB

# --- analog prototypes fitted to BS.1770-4 Tables 1 and 2 (see module notes) -----------------
KW_SHELF_F0 = 1681.9744509555323  # Hz
KW_SHELF_Q = 0.70717523695541928
KW_SHELF_VH = 1.5848647011308554  # high-frequency gain, +3.99984 dB
KW_SHELF_VB = 1.2587209302325613  # mid-band numerator gain (about sqrt(VH))
KW_HP_F0 = 38.135470876113047  # Hz
KW_HP_Q = 0.50032703732504213
KW_HP_GAIN = 1.0049948987146884  # passband gain implied by the unnormalised 48 kHz numerator

#: Loudness offset of BS.1770-4 equation (2), dB.
LUFS_OFFSET = -0.691
#: Absolute gate, LUFS, and relative gate, LU (BS.1770-4 section 2 / Annex 1).
ABS_GATE_LUFS = -70.0
REL_GATE_LU = -10.0
#: Sub-blocks in the momentary and short-term windows.
MOMENTARY_HOPS = 4
SHORT_TERM_HOPS = 30
#: Gating histogram: bins of HIST_STEP_LU from HIST_LO_LUFS; blocks above the top are put into
#: the last bin (their energy sum stays exact).
HIST_LO_LUFS = ABS_GATE_LUFS
HIST_STEP_LU = 0.01
HIST_BINS = 10000  # -70 .. +30 LUFS
#: Below this magnitude a sample or filter state is set to 0.
TINY = 1e-30

# Energy thresholds equivalent to the dB values above (module scalars are constants in numba).
_Z_FLOOR = 10.0 ** ((LEVEL_FLOOR_DB - LUFS_OFFSET) / 10.0)
_Z_ABS_GATE = 10.0 ** ((ABS_GATE_LUFS - LUFS_OFFSET) / 10.0)
_REL_GATE_FACTOR = 10.0 ** (REL_GATE_LU / 10.0)

# --- slots of the float64 state vector ------------------------------------------------------
S_ACC = 0  # weighted sum of squares in the current sub-block
S_FILL = 1  # samples so far in the current sub-block
S_HOP = 2  # samples per sub-block (set once: round(fs / 10))
S_POS = 3  # next row of the sub-block ring
S_NSUB = 4  # sub-blocks completed since reset
S_MOMENTARY = 5  # LUFS, updated every hop
S_SHORT_TERM = 6  # LUFS, updated every hop
S_MAX_MOMENTARY = 7
S_MAX_SHORT_TERM = 8
S_NGATED = 9  # gating blocks above the absolute gate (sum of hist_count)
NSTATE = 10

#: Offsets into the packed coefficient vector ``coef`` (float64, 10).
C_SHELF = 0  # b0 b1 b2 a1 a2 of the shelf
C_HP = 5  # b0 b1 b2 a1 a2 of the high-pass
NCOEF = 10

_JIT = dict(cache=True, error_model="numpy", nogil=True)


def _check_fs(fs):
    try:
        v = float(fs)
    except (TypeError, ValueError):
        raise ValueError(f"samplerate = {fs!r}: not a number, expected 8000 to 768000 Hz") from None
    if not (8000.0 <= v <= 768000.0):
        raise ValueError(f"samplerate = {fs!r}: out of range, expected 8000 to 768000 Hz")
    return v


def kweight_coeffs(fs):
    """The two K-weighting biquads of BS.1770-4 for sample rate ``fs``.

    Parameters
    ----------
    fs : float
        Sample rate in Hz, 8000 to 768000.

    Returns
    -------
    b_shelf, a_shelf, b_hp, a_hp : ndarray, float64 (3,)
        Numerator and denominator (``a[0] = 1``) of the high shelf (stage 1) and the high-pass
        (stage 2), in the form of ``scipy.signal.lfilter``. At 48 kHz they equal BS.1770-4
        Tables 1 and 2.

    Notes
    -----
    Bilinear transform of the analog prototypes in the module notes, pre-warped at each
    prototype's ``f0``.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 1, Tables 1 and 2.
    """
    fs = _check_fs(fs)
    k = math.tan(math.pi * KW_SHELF_F0 / fs)
    kq = k / KW_SHELF_Q
    k2 = k * k
    a0 = 1.0 + kq + k2
    b_shelf = np.array(
        [
            (KW_SHELF_VH + KW_SHELF_VB * kq + k2) / a0,
            2.0 * (k2 - KW_SHELF_VH) / a0,
            (KW_SHELF_VH - KW_SHELF_VB * kq + k2) / a0,
        ]
    )
    a_shelf = np.array([1.0, 2.0 * (k2 - 1.0) / a0, (1.0 - kq + k2) / a0])
    k = math.tan(math.pi * KW_HP_F0 / fs)
    kq = k / KW_HP_Q
    k2 = k * k
    a0 = 1.0 + kq + k2
    g = KW_HP_GAIN / a0
    b_hp = np.array([g, -2.0 * g, g])
    a_hp = np.array([1.0, 2.0 * (k2 - 1.0) / a0, (1.0 - kq + k2) / a0])
    return b_shelf, a_shelf, b_hp, a_hp


def pack_coeffs(fs):
    """K-weighting coefficients of ``fs`` packed for the kernels: float64 (10,)."""
    b1, a1, b2, a2 = kweight_coeffs(fs)
    return np.array([b1[0], b1[1], b1[2], a1[1], a1[2], b2[0], b2[1], b2[2], a2[1], a2[2]])


def hop_length(fs):
    """Samples per 100 ms sub-block: ``round(fs / 10)``."""
    return int(round(_check_fs(fs) / 10.0))


#: Channel layouts and their weights G_i (ITU-R BS.1770-4, Table 3: the LFE channel is not
#: measured; a loudspeaker at 60 to 120 degrees azimuth, the surrounds of 5.1 and the side
#: surrounds of 7.1, weighs 1.41 (+1.5 dB); the others 1.0 (the 7.1 back surrounds, at 135 to
#: 150 degrees, therefore 1.0: the table's azimuth rule, recalled from memory)). Channel order
#: as in WAVE_FORMAT_EXTENSIBLE files.
LAYOUTS = {
    "mono": ("C", (1.0,)),
    "stereo": ("L R", (1.0, 1.0)),
    "5.0": ("L R C Ls Rs", (1.0, 1.0, 1.0, 1.41, 1.41)),
    "5.1": ("L R C LFE Ls Rs", (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)),
    "7.1": ("L R C LFE Lb Rb Ls Rs", (1.0, 1.0, 1.0, 0.0, 1.0, 1.0, 1.41, 1.41)),
}


def layout_weights(layout, channels):
    """The weights G_i of a named layout (:data:`LAYOUTS`) for a file of ``channels``
    channels; ValueError with a one-line reason when the layout is unknown or does not fit."""
    if layout not in LAYOUTS:
        raise ValueError(f"layout = {layout!r}: expected one of {', '.join(LAYOUTS)}")
    order, weights = LAYOUTS[layout]
    if len(weights) != int(channels):
        raise ValueError(f"layout = {layout}: {len(weights)} channels ({order}), the signal "
                         f"has {channels}")
    return np.array(weights, dtype=np.float64)


def default_weights(channels, layout=None):
    """Channel weights G_i of BS.1770-4 Table 3 for a channel count (see module notes), or
    for a named ``layout`` (:func:`layout_weights`): 6 channels are taken as 5.1 and 8 as
    7.1 unless a layout says otherwise."""
    channels = int(channels)
    if channels < 1:
        raise ValueError(f"channels = {channels}: out of range, expected 1 or more")
    if layout is not None:
        return layout_weights(layout, channels)
    if channels == 8:
        return layout_weights("7.1", 8)
    if channels == 6:
        return np.array([1.0, 1.0, 1.0, 0.0, 1.41, 1.41])
    if channels == 5:
        return np.array([1.0, 1.0, 1.0, 1.41, 1.41])
    return np.ones(channels)


def new_state(fs):
    """A reset state vector, float64 (NSTATE,), for sample rate ``fs``."""
    st = np.zeros(NSTATE, dtype=np.float64)
    reset_state(st, hop_length(fs))
    return st


def reset_state(state, hop):
    """Reset a state vector in place (keeps the hop length)."""
    state[:] = 0.0
    state[S_HOP] = float(hop)
    state[S_MOMENTARY] = LEVEL_FLOOR_DB
    state[S_SHORT_TERM] = LEVEL_FLOOR_DB
    state[S_MAX_MOMENTARY] = LEVEL_FLOOR_DB
    state[S_MAX_SHORT_TERM] = LEVEL_FLOOR_DB


# --- kernels --------------------------------------------------------------------------------
@numba.njit(inline="always", **_JIT)
def _clean(x):
    v = float(x)
    if not (abs(v) < np.inf):
        return 0.0
    if abs(v) < TINY:
        return 0.0
    return v


@numba.njit(**_JIT)
def energy_to_lufs(z):
    """``-0.691 + 10 log10(z)``, or ``LEVEL_FLOOR_DB`` when that would lie below the floor."""
    if z > _Z_FLOOR:
        return LUFS_OFFSET + 10.0 * math.log10(z)
    return LEVEL_FLOOR_DB


@numba.njit(**_JIT)
def _end_subblock(z, ring, hist_count, hist_sum, state):
    nring = ring.shape[0]
    pos = int(state[S_POS])
    ring[pos] = z
    pos += 1
    if pos >= nring:
        pos = 0
    state[S_POS] = pos
    nsub = state[S_NSUB] + 1.0
    state[S_NSUB] = nsub
    # momentary: the last 4 sub-blocks, newest first
    zm = 0.0
    i = pos
    for _ in range(MOMENTARY_HOPS):
        i -= 1
        if i < 0:
            i += nring
        zm += ring[i]
    zm *= 1.0 / MOMENTARY_HOPS
    zs = 0.0
    for j in range(nring):
        zs += ring[j]
    zs *= 1.0 / nring
    lm = energy_to_lufs(zm)
    ls = energy_to_lufs(zs)
    state[S_MOMENTARY] = lm
    state[S_SHORT_TERM] = ls
    if lm > state[S_MAX_MOMENTARY]:
        state[S_MAX_MOMENTARY] = lm
    if ls > state[S_MAX_SHORT_TERM]:
        state[S_MAX_SHORT_TERM] = ls
    # gating block = the momentary block, once it is a full 400 ms of input
    if nsub >= MOMENTARY_HOPS and zm > _Z_ABS_GATE:
        nb = hist_count.shape[0]
        k = int((lm - HIST_LO_LUFS) * (1.0 / HIST_STEP_LU))
        if k < 0:
            k = 0
        if k >= nb:
            k = nb - 1
        hist_count[k] += 1.0
        hist_sum[k] += zm
        state[S_NGATED] += 1.0


@numba.njit(**_JIT)
def loudness_block(x, coef, weights, filt, ring, hist_count, hist_sum, state):
    """K-weight one block, accumulate 100 ms sub-blocks and update the loudness readings.

    Parameters
    ----------
    x : ndarray, float32 (frames, channels)
        Input block.
    coef : ndarray, float64 (10,)
        Packed K-weighting coefficients (:func:`pack_coeffs`).
    weights : ndarray, float64 (channels,)
        Channel weights G_i.
    filt : ndarray, float64 (channels, 4)
        Biquad states (transposed direct form II): shelf s1, s2, high-pass s1, s2.
    ring : ndarray, float64 (30,)
        Weighted mean square of the last 30 sub-blocks.
    hist_count, hist_sum : ndarray, float64 (HIST_BINS,)
        Gating histogram: blocks per bin and the sum of their energies.
    state : ndarray, float64 (NSTATE,)
        Accumulator, counters and the readings ``S_MOMENTARY``, ``S_SHORT_TERM``,
        ``S_MAX_MOMENTARY``, ``S_MAX_SHORT_TERM`` (LUFS), updated at every completed hop.

    Notes
    -----
    No allocation; every value depends only on the sample sequence, never on block size.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 1, equations (1)-(2); section 2 (gating blocks).
    .. [2] EBU Tech 3341, momentary (400 ms) and short-term (3 s) windows.
    """
    frames = x.shape[0]
    channels = x.shape[1]
    sb0 = coef[0]
    sb1 = coef[1]
    sb2 = coef[2]
    sa1 = coef[3]
    sa2 = coef[4]
    hb0 = coef[5]
    hb1 = coef[6]
    hb2 = coef[7]
    ha1 = coef[8]
    ha2 = coef[9]
    hop = int(state[S_HOP])
    inv_hop = 1.0 / hop
    acc = state[S_ACC]
    fill = int(state[S_FILL])
    for n in range(frames):
        for c in range(channels):
            v = _clean(x[n, c])
            y = sb0 * v + filt[c, 0]
            s1 = sb1 * v - sa1 * y + filt[c, 1]
            s2 = sb2 * v - sa2 * y
            if abs(s1) < TINY and abs(s2) < TINY:  # both at once: no limit cycle
                s1 = 0.0
                s2 = 0.0
            filt[c, 0] = s1
            filt[c, 1] = s2
            w = hb0 * y + filt[c, 2]
            s1 = hb1 * y - ha1 * w + filt[c, 3]
            s2 = hb2 * y - ha2 * w
            if abs(s1) < TINY and abs(s2) < TINY:
                s1 = 0.0
                s2 = 0.0
            filt[c, 2] = s1
            filt[c, 3] = s2
            acc += weights[c] * (w * w)
        fill += 1
        if fill >= hop:
            _end_subblock(acc * inv_hop, ring, hist_count, hist_sum, state)
            acc = 0.0
            fill = 0
    state[S_ACC] = acc
    state[S_FILL] = fill


@numba.njit(**_JIT)
def loudness_integrated(hist_count, hist_sum):
    """Gated integrated loudness, LUFS, from the gating histogram.

    Parameters
    ----------
    hist_count, hist_sum : ndarray, float64 (HIST_BINS,)
        Blocks per bin and their energy sums, as left by :func:`loudness_block`.

    Returns
    -------
    float
        ``-0.691 + 10 log10(mean energy of the blocks above both gates)``, or
        ``LEVEL_FLOOR_DB`` if no block passed the absolute gate.

    Notes
    -----
    The relative gate is 10 LU below the mean energy of all blocks above the absolute gate; a
    bin is taken when its mean energy lies above it. Allocation-free, so it may run on any
    thread; read while a kernel writes, it may see one block more in the counts than in the
    sums, an error of one 400 ms block.

    References
    ----------
    .. [1] ITU-R BS.1770-4, section 2 and Annex 1, equations (5)-(7).
    """
    nb = hist_count.shape[0]
    n = 0.0
    e = 0.0
    for i in range(nb):
        n += hist_count[i]
        e += hist_sum[i]
    if n <= 0.0:
        return LEVEL_FLOOR_DB
    zr = (e / n) * _REL_GATE_FACTOR
    n2 = 0.0
    e2 = 0.0
    for i in range(nb):
        c = hist_count[i]
        if c > 0.0 and hist_sum[i] > zr * c:
            n2 += c
            e2 += hist_sum[i]
    if n2 <= 0.0:
        return LEVEL_FLOOR_DB
    return energy_to_lufs(e2 / n2)

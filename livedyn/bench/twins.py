"""Plain-Python twins of the fused kernels, for the kernel benchmark.

A twin is the code a user would write without numba: per-sample loops in Python, the ``math``
module, state kept in the same numpy arrays. Each twin takes the kernel's arguments
``(x, key, out, p, st, ring, tr)`` and reads and writes the same state layout
(:mod:`livedyn.dsp.layout`), so the benchmark can run kernel and twin on identical fresh state and
compare outputs (and final states) sample by sample.

The twins implement the equations the kernels document, written again here, not imported from
:mod:`livedyn.dsp.stages`. Where two algebraically equal forms round differently, the twin uses
the form the kernel documents (for example ``20 / ln 10 * ln a`` for a level in dB rather than
``20 log10 a``, and the one-pole written ``a * y + (1 - a) * x``), so that bit-identical output is
the expected result and any difference points at a difference of logic. Neither the kernels nor
the twins contract multiply-adds (no fast math), so Python floats and numba's float64 round alike.

A ratio below 1 in the parameter array means "no ratio" (an algorithm without a ratio control):
its slope slot is 0, as in the kernel.

References
----------
.. [1] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design - A
       Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012: gain computer eqs. (3), (4);
       smooth branching and decoupled peak detectors eqs. (16), (17).
.. [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients".
.. [3] ITU-R BS.1770-4 (10/2015), Annex 2: true-peak by 4x oversampling.
"""
from __future__ import annotations

import math

from livedyn.dsp import layout as L
from livedyn.dsp.limiter import SUM_REFRESH, TP_DELAY, TP_SPREAD
from livedyn.dsp.truepeak import TP_PHASE_TAPS, TP_TAPS
from livedyn.params import (
    BALLISTICS_DECOUPLED, DELAY_XFADE_MS, DETECTOR_RMS, DOMAIN_LINEAR, GLIDE_MS, KEY_EXTERNAL,
    LAW_COMPRESSOR, LAW_DUCKER, LAW_EXPANDER, LAW_GATE, LEVEL_FLOOR_DB, LINK_MEAN, LINK_NONE,
    P_ATTACK, P_AUTOMAKEUP, P_BALLISTICS, P_CEILING, P_DETECTOR, P_DOMAIN, P_HOLD, P_HYSTERESIS,
    P_KEY, P_KEY_BPF, P_KEY_HPF, P_KEY_LPF, P_KEY_Q, P_KNEE, P_LAW, P_LINK, P_LOOKAHEAD, P_MAKEUP,
    P_MIX, P_RANGE, P_RATIO, P_RELEASE, P_RMS_TIME, P_SAMPLERATE, P_THRESHOLD, P_TOPOLOGY,
    P_START, P_TRUE_PEAK, START_CLOSED, TOPOLOGY_FEEDBACK, FEEDBACK_MAX_RATIO,
)

__all__ = ["dynamics_twin", "limiter_twin", "twin_for"]

TINY = 1e-30  # state values smaller than this are stored as 0 (no subnormals)
LN10_OVER_20 = math.log(10.0) / 20.0
DB_PER_NEPER_AMP = 20.0 / math.log(10.0)
DB_PER_NEPER_POW = 10.0 / math.log(10.0)
FLOOR_AMP = 10.0 ** (LEVEL_FLOOR_DB / 20.0)
FLOOR_POW = 10.0 ** (LEVEL_FLOOR_DB / 10.0)
BUTTERWORTH_Q = 1.0 / math.sqrt(2.0)
TP_ROWS = [[float(v) for v in row] for row in TP_TAPS]  # phase k, tap j [3]


# ---- small helpers --------------------------------------------------------------------------

def flush(v):
    return 0.0 if -TINY < v < TINY else v


def coeff(tau_ms, fs):
    """One-pole coefficient exp(-1 / (tau fs)) for tau in ms; 0 for tau <= 0."""
    if tau_ms <= 0.0:
        return 0.0
    return math.exp(-1000.0 / (tau_ms * fs))


def to_db(a):
    return LEVEL_FLOOR_DB if a <= FLOOR_AMP else DB_PER_NEPER_AMP * math.log(a)


def power_to_db(pw):
    return LEVEL_FLOOR_DB if pw <= FLOOR_POW else DB_PER_NEPER_POW * math.log(pw)


def from_db(db):
    return math.exp(LN10_OVER_20 * db)


def ms_to_samples(ms, fs):
    return int(math.floor(ms * fs / 1000.0 + 0.5))


def glide_step(v, target, g):
    d = target - v
    if -1e-9 < d < 1e-9:
        return target
    return v + g * d


# ---- key filters [2] ------------------------------------------------------------------------

def cookbook(kind, f0, q, fs):
    """(b0, b1, b2, a1, a2), normalised by a0, of the cookbook low-, high- or band-pass."""
    w0 = 2.0 * math.pi * f0 / fs
    cw = math.cos(w0)
    alpha = math.sin(w0) / (2.0 * q)
    if kind == "lowpass":
        b = ((1.0 - cw) * 0.5, 1.0 - cw, (1.0 - cw) * 0.5)
    elif kind == "highpass":
        b = ((1.0 + cw) * 0.5, -(1.0 + cw), (1.0 + cw) * 0.5)
    else:  # band-pass, constant 0 dB peak gain
        b = (alpha, 0.0, -alpha)
    a0, a1, a2 = 1.0 + alpha, -2.0 * cw, 1.0 - alpha
    return (b[0] / a0, b[1] / a0, b[2] / a0, a1 / a0, a2 / a0)


def biquad(c, st, zrow, j, v):
    """Transposed direct form II, state in st rows zrow, zrow + 1, column j."""
    b0, b1, b2, a1, a2 = c
    y = b0 * v + st[zrow, j]
    st[zrow, j] = flush(b1 * v - a1 * y + st[zrow + 1, j])
    st[zrow + 1, j] = flush(b2 * v - a2 * y)
    return y


# ---- gain computers [1] ---------------------------------------------------------------------

def compressor_curve(x_db, thr, s, knee):
    """Gain in dB of eq. (4) (knee > 0) or eq. (3); s = 1 - 1/ratio."""
    d = x_db - thr
    if knee > 0.0:
        if 2.0 * d < -knee:
            return 0.0
        if 2.0 * d <= knee:
            e = d + 0.5 * knee
            return -s * e * e / (2.0 * knee)
        return -s * d
    return -s * d if d > 0.0 else 0.0


def expander_curve(x_db, thr, s, knee, rng):
    d = x_db - thr
    if s >= 1.0:
        return -rng if d < 0.0 else 0.0
    r1 = s / (1.0 - s)  # ratio - 1
    if knee > 0.0:
        if 2.0 * d > knee:
            g = 0.0
        elif 2.0 * d >= -knee:
            e = d - 0.5 * knee
            g = -r1 * e * e / (2.0 * knee)
        else:
            g = r1 * d
    else:
        g = r1 * d if d < 0.0 else 0.0
    return -rng if g < -rng else g


# ---- lookahead delay with crossfade ---------------------------------------------------------

def xfade_len(fs):
    return max(1.0, math.floor(DELAY_XFADE_MS * fs / 1000.0 + 0.5))


def new_delay(st, d, fs):
    """Block boundary: take delay d (at once on the first block, else via :func:`next_delay`)."""
    if st[L.S_READY, 0] == 0.0:
        st[L.S_DCUR, 0] = d
        st[L.S_DOLD, 0] = d
        st[L.S_XF, 0] = 0.0
    else:
        next_delay(st, d, fs)


def next_delay(st, d, fs):
    """Start a crossfade from the delay in use to d, unless one is running or d is in use.

    A change that finds a crossfade running waits for its end (the sample loop calls this again
    then), so a half-faded tap is never dropped.
    """
    if st[L.S_XF, 0] <= 0.0 and d != int(st[L.S_DCUR, 0]):
        st[L.S_DOLD, 0] = st[L.S_DCUR, 0]
        st[L.S_DCUR, 0] = d
        st[L.S_XF, 0] = xfade_len(fs)


def delayed(ring, w, c, d_cur, d_old, xf, xf_n):
    n = ring.shape[0]
    v = ring[(w - d_cur) % n, c]
    if xf > 0.0:
        wgt = 1.0 - xf / xf_n
        v = wgt * v + (1.0 - wgt) * ring[(w - d_old) % n, c]
    return v


# ---- compressor / expander / gate / ducker --------------------------------------------------

_GLIDED = (L.S_THR, L.S_SLOPE, L.S_KNEE, L.S_MAKEUP, L.S_RANGE, L.S_MIX, L.S_CEIL, L.S_HYST)


def dynamics_twin(x, key, out, p, st, ring, tr):
    """One block of the compressor, expander, gate or ducker; same contract as the kernel.

    Parameters
    ----------
    x, key, out, p, st, ring, tr : ndarray
        As :func:`livedyn.dsp.dynamics.dynamics_block` (see :mod:`livedyn.dsp.layout`).

    References
    ----------
    .. [1] Giannoulis, Massberg, Reiss (2012), eqs. (3), (4), (16), (17).
    .. [2] Audio EQ Cookbook (key filters).
    """
    frames, ch = x.shape
    fs = float(p[P_SAMPLERATE])
    law = int(p[P_LAW])
    tracing = tr.shape[1] >= frames and frames > 0

    # block boundary: coefficients and modes
    a_att = coeff(float(p[P_ATTACK]), fs)
    a_rel = coeff(float(p[P_RELEASE]), fs)
    a_rms = coeff(float(p[P_RMS_TIME]), fs)
    g_glide = 1.0 - coeff(GLIDE_MS, fs)
    hold_n = math.floor(float(p[P_HOLD]) * fs / 1000.0 + 0.5)
    use_rms = int(p[P_DETECTOR]) == DETECTOR_RMS
    decoupled = (int(p[P_BALLISTICS]) == BALLISTICS_DECOUPLED
                 and law in (LAW_COMPRESSOR, LAW_DUCKER))
    linear = int(p[P_DOMAIN]) == DOMAIN_LINEAR and law == LAW_COMPRESSOR
    feedback = int(p[P_TOPOLOGY]) == TOPOLOGY_FEEDBACK and law == LAW_COMPRESSOR
    external = int(p[P_KEY]) == KEY_EXTERNAL and not feedback
    link = int(p[P_LINK])
    automakeup = p[P_AUTOMAKEUP] > 0.5 and law == LAW_COMPRESSOR
    gate_like = law in (LAW_EXPANDER, LAW_GATE)
    # coefficient toward more attenuation / toward less
    a_down, a_up = (a_rel, a_att) if gate_like else (a_att, a_rel)

    filters = []  # (coefficients, state row) in the order the key passes them
    for slot, kind, row_c, row_z, q in ((P_KEY_HPF, "highpass", L.C_HPF, L.R_HPZ, BUTTERWORTH_Q),
                                        (P_KEY_LPF, "lowpass", L.C_LPF, L.R_LPZ, BUTTERWORTH_Q),
                                        (P_KEY_BPF, "bandpass", L.C_BPF, L.R_BPZ,
                                         float(p[P_KEY_Q]))):
        if p[slot] > 0.0:
            c = cookbook(kind, float(p[slot]), q, fs)
            st[row_c, 0:5] = c
            filters.append((c, row_z))

    nk = key.shape[1] if external else ch
    ngain = ch if link == LINK_NONE else 1

    ratio = float(p[P_RATIO])
    slope = 1.0 - 1.0 / ratio if ratio >= 1.0 else 0.0  # below 1: no ratio, slot unused
    targets = [float(p[P_THRESHOLD]), slope, float(p[P_KNEE]), float(p[P_MAKEUP]),
               float(p[P_RANGE]), float(p[P_MIX]) * 0.01, float(p[P_CEILING]),
               float(p[P_HYSTERESIS])]

    d_target = ms_to_samples(float(p[P_LOOKAHEAD]), fs)
    new_delay(st, d_target, fs)
    if st[L.S_READY, 0] == 0.0:
        for row, t in zip(_GLIDED, targets):
            st[row, 0] = t
        if law in (LAW_EXPANDER, LAW_GATE) and p[P_START] == START_CLOSED:
            st[L.R_Y, :] = -targets[4]  # closed: at the full range
        st[L.S_READY, 0] = 1.0
    cur = [float(st[row, 0]) for row in _GLIDED]
    thr, slope, knee, mk, rng, mix, ceil, hyst = cur
    ceil_lin = from_db(ceil)
    mk_auto = -compressor_curve(0.0, thr, slope, knee) if automakeup else 0.0
    gliding = True

    d_cur = int(st[L.S_DCUR, 0])
    d_old = int(st[L.S_DOLD, 0])
    xf = float(st[L.S_XF, 0])
    xf_n = xfade_len(fs)
    w = int(st[L.S_WPOS, 0])
    ring_len = ring.shape[0]
    nonfinite = float(st[L.S_NONFINITE, 0])
    gr_max = 0.0

    for n in range(frames):
        # parameter glide, per sample, until every value sits on its target
        if gliding:
            cur = [glide_step(v, t, g_glide) for v, t in zip(cur, targets)]
            thr, slope, knee, mk, rng, mix, ceil, hyst = cur
            ceil_lin = from_db(ceil)
            if automakeup:
                mk_auto = -compressor_curve(0.0, thr, slope, knee)
            gliding = cur != targets
        # feedback: the curve on the output level has the slope R - 1 (so the set ratio holds)
        s_fb = slope / (1.0 - slope) if slope < 1.0 else FEEDBACK_MAX_RATIO - 1.0

        # main input into the delay line
        for c in range(ch):
            v = float(x[n, c])
            if not math.isfinite(v):
                v = 0.0
                nonfinite += 1.0
            ring[w, c] = v

        # key: source, filters, level measure
        for j in range(nk):
            if feedback:
                k = float(st[L.R_FB, j])
            elif external:
                k = float(key[n, j])
                if not math.isfinite(k):
                    k = 0.0
                    nonfinite += 1.0
            else:
                k = float(ring[w, j])
            for c, zrow in filters:
                k = biquad(c, st, zrow, j, k)
            if tracing:
                tr[L.T_KEY, n, j] = k
            if use_rms:
                ms = flush(a_rms * st[L.R_MS, j] + (1.0 - a_rms) * k * k)
                st[L.R_MS, j] = ms
                st[L.R_MEAS, j] = ms
            else:
                st[L.R_MEAS, j] = abs(k)

        # per gain channel: link, level, gain computer, ballistics
        for g in range(ngain):
            if ngain == 1:
                meas = [float(st[L.R_MEAS, j]) for j in range(nk)]
                if link == LINK_MEAN:
                    lv = meas[0]
                    for m in meas[1:]:
                        lv += m
                    lv /= nk
                else:
                    lv = max(meas)
            else:
                lv = float(st[L.R_MEAS, 0 if nk == 1 else g])

            if linear:
                amp = math.sqrt(2.0 * lv) if use_rms else lv
                if decoupled:
                    # eq. (17) on the level: release stage with instant rise (hold delaying its
                    # release), then attack
                    e1 = float(st[L.R_ENV1, g])
                    if amp >= e1:
                        e1 = amp
                        st[L.R_HOLD, g] = hold_n
                    elif st[L.R_HOLD, g] > 0.0:
                        st[L.R_HOLD, g] -= 1.0
                    else:
                        e1 = a_rel * e1 + (1.0 - a_rel) * amp
                        if amp > e1:
                            e1 = amp
                    e1 = flush(e1)
                    st[L.R_ENV1, g] = e1
                    env = flush(a_att * st[L.R_ENV, g] + (1.0 - a_att) * e1)
                else:
                    # eq. (16) on the level, hold delaying the release
                    env = float(st[L.R_ENV, g])
                    if amp < env and st[L.R_HOLD, g] > 0.0:
                        st[L.R_HOLD, g] -= 1.0
                    else:
                        if amp >= env:
                            st[L.R_HOLD, g] = hold_n
                        a = a_att if amp > env else a_rel
                        env = flush(a * env + (1.0 - a) * amp)
                st[L.R_ENV, g] = env
                x_db = to_db(env)
            elif use_rms:
                x_db = power_to_db(2.0 * lv)  # sine-referenced rms
            else:
                x_db = to_db(lv)

            if law == LAW_COMPRESSOR:
                gc = compressor_curve(x_db, thr, s_fb if feedback else slope, knee)
            elif law == LAW_DUCKER:
                gc = max(compressor_curve(x_db, thr, slope, knee), -rng)
            else:
                is_open = st[L.R_OPEN, g]
                if x_db >= thr:
                    is_open = 1.0
                elif x_db < thr - hyst:
                    is_open = 0.0
                st[L.R_OPEN, g] = is_open
                if law == LAW_EXPANDER:
                    gc = expander_curve(x_db, thr - hyst if is_open > 0.0 else thr, slope, knee,
                                        rng)
                else:
                    gc = 0.0 if is_open > 0.0 else -rng

            y = float(st[L.R_Y, g])
            if linear:
                y = gc
            elif decoupled:
                # eq. (17) in the gain domain: instant first stage with release and hold
                y1 = float(st[L.R_Y1, g])
                if gc <= y1:
                    y1 = gc
                    st[L.R_HOLD, g] = hold_n
                elif st[L.R_HOLD, g] > 0.0:
                    st[L.R_HOLD, g] -= 1.0
                else:
                    y1 = a_up * y1 + (1.0 - a_up) * gc
                    if gc < y1:
                        y1 = gc
                st[L.R_Y1, g] = flush(y1)
                y = a_down * y + (1.0 - a_down) * y1
            else:
                # eq. (16) in the gain domain; hold delays closing (expander, gate) or release
                down = gc < y
                waiting = down if gate_like else gc > y
                if waiting and st[L.R_HOLD, g] > 0.0:
                    st[L.R_HOLD, g] -= 1.0
                else:
                    if not waiting:
                        st[L.R_HOLD, g] = hold_n
                    a = a_down if down else a_up
                    y = a * y + (1.0 - a) * gc
            y = flush(y)
            st[L.R_Y, g] = y
            total = y + mk + mk_auto
            st[L.R_GAIN, g] = from_db(total)
            gr_max = max(gr_max, -y)
            if tracing:
                tr[L.T_LEVEL, n, g] = x_db
                tr[L.T_CURVE, n, g] = gc
                tr[L.T_GAIN, n, g] = y
                tr[L.T_TOTAL, n, g] = total

        # gain on the delayed main signal, dry/wet mix, ceiling
        for c in range(ch):
            g = 0 if ngain == 1 else c
            xd = delayed(ring, w, c, d_cur, d_old, xf, xf_n)
            wet = xd * st[L.R_GAIN, g]
            if feedback:
                st[L.R_FB, c] = flush(xd * from_db(float(st[L.R_Y, g])))
            o = mix * wet + (1.0 - mix) * xd
            out[n, c] = min(max(o, -ceil_lin), ceil_lin)
        if xf > 0.0:
            xf -= 1.0
            if xf <= 0.0 and d_target != d_cur:
                # a change that waited for this crossfade starts with the next sample
                st[L.S_XF, 0] = 0.0
                next_delay(st, d_target, fs)
                d_cur = int(st[L.S_DCUR, 0])
                d_old = int(st[L.S_DOLD, 0])
                xf = float(st[L.S_XF, 0])
        w = (w + 1) % ring_len

    for row, v in zip(_GLIDED, cur):
        st[row, 0] = v
    st[L.S_XF, 0] = xf
    st[L.S_WPOS, 0] = w
    st[L.S_NONFINITE, 0] = nonfinite
    st[L.S_FRAMES, 0] += frames
    st[L.S_GR_MAX, 0] = gr_max
    st[L.S_AUTOMAKEUP_DB, 0] = mk_auto


# ---- limiter --------------------------------------------------------------------------------

def _queue_push(ring, st, col, g, v, t):
    """Append (v, t) to channel g's queue of increasing values, dropping larger values first."""
    n_ring = ring.shape[0]
    head = int(st[L.R_DQ_HEAD, g])
    length = int(st[L.R_DQ_LEN, g])
    while length > 0 and ring[(head + length - 1) % n_ring, col + L.RING_DQ_VAL] >= v:
        length -= 1
    slot = (head + length) % n_ring
    ring[slot, col + L.RING_DQ_VAL] = v
    ring[slot, col + L.RING_DQ_IDX] = t
    st[L.R_DQ_LEN, g] = length + 1


def _box_sum(ring, col, w, count):
    """Sum of the last ``count`` minima, newest (row w) first."""
    n = ring.shape[0]
    s = 0.0
    for i in range(count):
        s += ring[(w - i) % n, col + L.RING_M]
    return s


def _true_peak(hist, pos, c, v):
    """Store v in the history ring at row pos; the largest of the 4 interpolated values [3]."""
    if not (abs(v) < math.inf) or abs(v) < TINY:
        v = 0.0
    hist[pos, c] = v
    sums = [0.0, 0.0, 0.0, 0.0]
    for j in range(TP_PHASE_TAPS):
        h = hist[(pos - j) % TP_PHASE_TAPS, c]
        for k in range(4):
            sums[k] += TP_ROWS[k][j] * h
    return max(abs(s) for s in sums)


def _back(i, n):
    return i + n if i < 0 else i


def _requirement(ring, ch, i, g, ngain):
    """Required gain at ring row i for gain channel g: its channel's, or (linked) the least."""
    if ngain == 1:
        r = float(ring[i, ch + L.RING_REQ])
        for c in range(1, ch):
            v = float(ring[i, ch + 4 * c + L.RING_REQ])
            if v < r:
                r = v
        return r
    return float(ring[i, ch + 4 * g + L.RING_REQ])


def _restart(ring, st, ch, w, t, window, att, ngain):
    """A new structure: refill each queue from the requirement history, start the moving
    average from the least requirement it can see, and no gain above the old least gain."""
    n_ring = ring.shape[0]
    g_old = 1.0
    for g in range(int(st[L.S_LIM_NGAIN, 0])):
        g_old = min(g_old, float(st[L.R_G, g]))
    for g in range(ngain):
        col = ch + 4 * g
        st[L.R_DQ_HEAD, g] = 0.0
        st[L.R_DQ_LEN, g] = 0.0
        for back in range(window, 0, -1):
            _queue_push(ring, st, col, g, _requirement(ring, ch, (w - back) % n_ring, g, ngain),
                        t - back)
        span = min(window + att, n_ring - 1)
        least = 1.0
        for back in range(1, span + 1):
            least = min(least, _requirement(ring, ch, (w - back) % n_ring, g, ngain))
        for back in range(1, att + 2):
            ring[(w - back) % n_ring, col + L.RING_M] = least
        st[L.R_BOX, g] = (att + 1.0) * least
        st[L.R_G, g] = min(g_old, least)
    st[L.S_LOOK, 0] = window
    st[L.S_ATT, 0] = att
    st[L.S_LIM_NGAIN, 0] = ngain


def limiter_twin(x, key, out, p, st, ring, tr):
    """One block of the lookahead limiter; same contract as the kernel.

    Requirement r = min(1, ceiling / |x|) per channel (optionally the 4x-oversampled true peak
    [3]), kept for every channel; linked gain uses the least over channels. Minimum over the
    last window + 1 requirements with a monotonic queue; moving average over attack + 1 minima;
    release one-pole with hold, never above the average; a last clamp to the requirement of the
    sample(s) leaving the delay line. A change of lookahead, attack, true-peak detection or link
    takes effect at the first sample with no delay crossfade running, by a conservative restart
    (:func:`_restart`); while the delay crossfades, the window covers both taps.

    Parameters
    ----------
    x, key, out, p, st, ring, tr : ndarray
        As :func:`livedyn.dsp.limiter.limiter_block` (see :mod:`livedyn.dsp.layout`).

    References
    ----------
    .. [3] ITU-R BS.1770-4, Annex 2.
    """
    frames, ch = x.shape
    fs = float(p[P_SAMPLERATE])
    tracing = tr.shape[1] >= frames and frames > 0
    n_ring = ring.shape[0]

    # what the parameters ask for
    tp_t = p[P_TRUE_PEAK] > 0.5
    look_t = ms_to_samples(float(p[P_LOOKAHEAD]), fs)
    att_t = min(ms_to_samples(float(p[P_ATTACK]), fs), look_t)
    window_t = look_t + (TP_DELAY + TP_SPREAD if tp_t else 0)
    d_t = look_t + (TP_DELAY if tp_t else 0)
    ngain_t = ch if int(p[P_LINK]) == LINK_NONE else 1
    a_rel = coeff(float(p[P_RELEASE]), fs)
    hold_n = math.floor(float(p[P_HOLD]) * fs / 1000.0 + 0.5)
    g_glide = 1.0 - coeff(GLIDE_MS, fs)
    t_ceil = float(p[P_CEILING])
    xf_n = xfade_len(fs)

    w = int(st[L.S_WPOS, 0])
    frame0 = float(st[L.S_FRAMES, 0])
    if st[L.S_READY, 0] == 0.0:
        st[L.S_CEIL, 0] = t_ceil
        st[L.S_DCUR, 0] = d_t
        st[L.S_DOLD, 0] = d_t
        st[L.S_XF, 0] = 0.0
        st[L.S_LOOK, 0] = window_t
        st[L.S_ATT, 0] = att_t
        st[L.S_LIM_NGAIN, 0] = ngain_t
        st[L.S_LIM_TP, 0] = 1.0 if tp_t else 0.0
        for g in range(ngain_t):
            st[L.R_BOX, g] = att_t + 1.0  # the minima history starts at 1
        st[L.S_READY, 0] = 1.0

    # what is in use
    tp = st[L.S_LIM_TP, 0] > 0.5
    window = int(st[L.S_LOOK, 0])
    att = int(st[L.S_ATT, 0])
    ngain = int(st[L.S_LIM_NGAIN, 0])
    d_cur = int(st[L.S_DCUR, 0])
    d_old = int(st[L.S_DOLD, 0])
    xf = float(st[L.S_XF, 0])
    pending = (window, att, ngain, d_cur, tp) != (window_t, att_t, ngain_t, d_t, tp_t)

    hist = st[L.R_TP:L.R_TP + TP_PHASE_TAPS]
    ceil = float(st[L.S_CEIL, 0])
    ceil_lin = from_db(ceil)
    nonfinite = float(st[L.S_NONFINITE, 0])
    clamps = float(st[L.S_CLAMP, 0])
    gr_max = 0.0
    meas = [0.0] * ch
    for n in range(frames):
        t = frame0 + n
        # a change of structure, at the first sample with no crossfade running
        if pending and xf <= 0.0:
            a_use = att_t
            if d_t != d_cur:
                look_old = d_cur - (TP_DELAY if tp else 0)
                d_old, d_cur, xf = d_cur, d_t, xf_n
                use = max(window_t, window)  # both taps inside the window while they fade
                if look_old < a_use:  # the average no longer than the shorter lookahead
                    a_use = max(look_old, 0)
            else:
                use = window_t
            tp = tp_t
            _restart(ring, st, ch, w, t, use, a_use, ngain_t)
            window, att, ngain = use, a_use, ngain_t
            pending = window != window_t or att != att_t
        if ceil != t_ceil:
            ceil = glide_step(ceil, t_ceil, g_glide)
            ceil_lin = from_db(ceil)
        for c in range(ch):
            v = float(x[n, c])
            if not math.isfinite(v):
                v = 0.0
                nonfinite += 1.0
            ring[w, c] = v
        tp_pos = int(st[L.R_TP_POS, 0])
        for c in range(ch):
            a = abs(float(ring[w, c]))
            if tp:
                a = max(a, _true_peak(hist, tp_pos, c, float(ring[w, c])))
            meas[c] = a
            st[L.R_MEAS, c] = a
            ring[w, ch + 4 * c + L.RING_REQ] = ceil_lin / a if a > ceil_lin else 1.0
        if tp:
            st[L.R_TP_POS, 0] = (tp_pos + 1) % TP_PHASE_TAPS
        refresh = t % SUM_REFRESH == 0.0
        n_box = att + 1.0
        for g in range(ngain):
            col = ch + 4 * g
            r = _requirement(ring, ch, w, g, ngain)
            # 1. minimum of the requirements over the window
            _queue_push(ring, st, col, g, r, t)
            h = int(st[L.R_DQ_HEAD, g])
            while ring[h, col + L.RING_DQ_IDX] < t - window:
                h = (h + 1) % n_ring
                st[L.R_DQ_LEN, g] -= 1.0
            st[L.R_DQ_HEAD, g] = h
            m = float(ring[h, col + L.RING_DQ_VAL])
            # 2. moving average of the last att + 1 minima
            oldest = float(ring[(w - att - 1) % n_ring, col + L.RING_M])
            ring[w, col + L.RING_M] = m
            box = _box_sum(ring, col, w, att + 1) if refresh else st[L.R_BOX, g] + m - oldest
            st[L.R_BOX, g] = box
            b = m if att == 0 else box / n_box
            # 3. release with hold, never above the average
            gp = float(st[L.R_G, g])
            if b < gp:
                gn = b
                st[L.R_HOLD, g] = hold_n
            elif st[L.R_HOLD, g] > 0.0:
                st[L.R_HOLD, g] -= 1.0
                gn = gp
            else:
                gn = min(math.exp(a_rel * math.log(gp) + (1.0 - a_rel) * math.log(b)), b)  # in dB
            # last clamp: the requirement of the sample leaving (both taps while crossfading)
            lim = _requirement(ring, ch, _back(w - d_cur, n_ring), g, ngain)
            if xf > 0.0:
                lim = min(lim, _requirement(ring, ch, _back(w - d_old, n_ring), g, ngain))
            if gn > lim:
                if gn > lim * (1.0 + 1e-9):
                    clamps += 1.0
                gn = lim
            st[L.R_G, g] = gn
            st[L.R_GAIN, g] = gn
            gdb = to_db(gn)
            gr_max = max(gr_max, -gdb)
            if tracing:
                a = max(meas) if ngain == 1 else meas[g]
                tr[L.T_KEY, n, g] = a
                tr[L.T_LEVEL, n, g] = to_db(a)
                tr[L.T_CURVE, n, g] = to_db(r)
                tr[L.T_GAIN, n, g] = gdb
                tr[L.T_TOTAL, n, g] = gdb
        for c in range(ch):
            g = 0 if ngain == 1 else c
            out[n, c] = delayed(ring, w, c, d_cur, d_old, xf, xf_n) * st[L.R_GAIN, g]
        if xf > 0.0:
            xf -= 1.0
        w = (w + 1) % n_ring

    st[L.S_CEIL, 0] = ceil
    st[L.S_DCUR, 0] = d_cur
    st[L.S_DOLD, 0] = d_old
    st[L.S_XF, 0] = xf
    st[L.S_LIM_TP, 0] = 1.0 if tp else 0.0
    st[L.S_WPOS, 0] = w
    st[L.S_NONFINITE, 0] = nonfinite
    st[L.S_CLAMP, 0] = clamps
    st[L.S_FRAMES, 0] += frames
    st[L.S_GR_MAX, 0] = gr_max


def twin_for(kind):
    """The twin of the kernel of this kind ("dynamics" or "limiter")."""
    if kind == "dynamics":
        return dynamics_twin
    if kind == "limiter":
        return limiter_twin
    raise ValueError(f"kind = {kind!r}: no twin, expected 'dynamics' or 'limiter'")

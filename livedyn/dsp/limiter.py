"""The lookahead peak limiter, with a ceiling that holds by construction.

Design. For every input sample the *required gain* is r[t] = min(1, ceiling / |x[t]|) (linked:
the largest |x| over channels). The main path is delayed by the lookahead L. The gain applied to
the delayed sample x[n - L] is built in three steps:

1. minimum hold over the last L + 1 requirements:  m[n] = min(r[n - L .. n]);
2. moving average over the last A + 1 values of m, with attack A <= L:
   b[n] = mean(m[n - A .. n]). Every m[j] in that average has r[n - L] inside its window
   (j - L <= n - L <= j), so b[n] <= r[n - L]: the delayed sample cannot pass the ceiling, and
   the gain moves to its target along a straight line over A samples;
3. release: a one-pole on the gain in dB, 20 log10 g[n] = a 20 log10 g[n-1] + (1 - a)
   20 log10 b[n], with the release coefficient a = exp(-1 / (tau fs)) (and hold), taken only
   while b[n] is above g[n-1] and clamped to b[n], so it never rises above b. A step of the
   requirement therefore recovers 63 % of its dB change after tau, as every other release.

The attack is not a one-pole: step 2 turns a step of the requirement into a straight ramp of
the *linear* gain over A = attack samples, which ends at the sample that needed it (the ramp
starts L - A samples after that sample entered the lookahead).

A last clamp g <= r of the sample leaving (and of the old delay tap during a lookahead
crossfade) absorbs floating-point rounding; the kernel counts every sample where it cut the gain
by more than 1e-9 relative (``S_CLAMP``), so tests can show that the design, not the clamp, holds
the ceiling. An attack longer than the lookahead acts as the lookahead.

Changes of structure (lookahead, attack, true-peak detection, link) take effect at a sample
where no delay crossfade is running: the queues are rebuilt from the per-channel requirement
history and the moving average is restarted from the smallest requirement its window can
see, which is conservative (the gain may dip, never rise past the ceiling). While the delay
crossfades, the hold window covers both the old and the new delay.

With ``true_peak = on`` the requirement also uses the 4x oversampled inter-sample peak
(ITU-R BS.1770-4 Annex 2 interpolation). The main path is then delayed by TP_DELAY more samples
and the hold window widened by TP_DELAY + TP_SPREAD so that the interpolated peaks around each
output sample lie inside it.

The running sum of step 2 is recomputed exactly every SUM_REFRESH frames (counted from reset, so
the result does not depend on block splits), which keeps rounding from drifting.
"""
import math

import numba as nb

from ..params import (
    DELAY_XFADE_MS, GLIDE_MS, LINK_NONE, P_ATTACK, P_CEILING, P_HOLD, P_LINK, P_LOOKAHEAD, P_RELEASE,
    P_SAMPLERATE, P_TRUE_PEAK,
)
from .dynamics import glide, ring_back, tap_fade
from .layout import (
    S_LIM_NGAIN, S_LIM_TP, R_BOX, R_DQ_HEAD, R_DQ_LEN, R_G, R_GAIN, R_HOLD, R_MEAS, R_TAPS, R_TP, R_TP_POS, RING_DQ_IDX,
    RING_DQ_VAL, RING_M, RING_REQ, S_ATT, S_CEIL, S_CLAMP, S_DCUR, S_DOLD, S_FRAMES, S_GR_MAX,
    S_LOOK, S_NONFINITE, S_READY, S_WPOS, S_XF, T_CURVE, T_GAIN, T_KEY, T_LEVEL, T_TOTAL,
)
from .truepeak import TP_PHASE_TAPS, tp_tick
from .stages import JIT, amp_to_db, db_to_amp, one_pole_coeff

# The interpolated values computed when sample n arrives describe the signal between n - 6 and
# n - 5 (livedyn.dsp.truepeak). With the main path TP_DELAY samples longer than the hold window's
# lookahead and the window TP_DELAY + TP_SPREAD longer, every interpolated value within a sample
# of an output sample, and the FIR's support around it, lies inside the window.
TP_DELAY = 12  # extra main-path delay in true-peak mode, samples
TP_SPREAD = 6  # extra hold-window length behind the output sample in true-peak mode
SUM_REFRESH = 4096


def limiter_init(st, ring, channels):
    """Fresh state: unity gain everywhere, requirement history at 1, true-peak taps loaded."""
    from .truepeak import TP_TAPS

    st[R_G, :] = 1.0
    base = channels
    for g in range(channels):
        col = base + 4 * g
        ring[:, col + RING_M] = 1.0
        ring[:, col + RING_REQ] = 1.0
    st[R_TAPS:R_TAPS + 4, :TP_PHASE_TAPS] = TP_TAPS


@nb.njit(**JIT)
def _req(ring, ch, i, g, ngain):
    """Requirement of gain channel g at ring row i: its channel's, or the least over channels."""
    if ngain == 1:
        r = ring[i, ch + RING_REQ]
        for c in range(1, ch):
            v = ring[i, ch + 4 * c + RING_REQ]
            if v < r:
                r = v
        return r
    return ring[i, ch + 4 * g + RING_REQ]


@nb.njit(**JIT)
def _dq_push(ring, st, col, g, v, t):
    """Push (v, t) onto gain channel g's monotonic queue (values increase from head to tail)."""
    n_ring = ring.shape[0]
    h = int(st[R_DQ_HEAD, g])
    ln = int(st[R_DQ_LEN, g])
    while ln > 0:
        back = h + ln - 1
        if back >= n_ring:
            back -= n_ring
        if ring[back, col + RING_DQ_VAL] >= v:
            ln -= 1
        else:
            break
    slot = h + ln
    if slot >= n_ring:
        slot -= n_ring
    ring[slot, col + RING_DQ_VAL] = v
    ring[slot, col + RING_DQ_IDX] = t
    st[R_DQ_LEN, g] = ln + 1


@nb.njit(**JIT)
def _rebuild(ring, st, ch, w, t, window, att, ngain):
    """Restart queues and moving averages for a new structure (see the module notes)."""
    n_ring = ring.shape[0]
    g_old = 1.0
    for g in range(int(st[S_LIM_NGAIN, 0])):
        if st[R_G, g] < g_old:
            g_old = st[R_G, g]
    for g in range(ngain):
        col = ch + 4 * g
        st[R_DQ_HEAD, g] = 0.0
        st[R_DQ_LEN, g] = 0.0
        for back in range(window, 0, -1):
            j = w - back
            if j < 0:
                j += n_ring
            _dq_push(ring, st, col, g, _req(ring, ch, j, g, ngain), t - back)
        span = min(window + att, n_ring - 1)
        mmin = 1.0
        for back in range(1, span + 1):
            j = w - back
            if j < 0:
                j += n_ring
            v = _req(ring, ch, j, g, ngain)
            if v < mmin:
                mmin = v
        for back in range(1, att + 2):
            j = w - back
            if j < 0:
                j += n_ring
            ring[j, col + RING_M] = mmin
        st[R_BOX, g] = (att + 1.0) * mmin
        st[R_G, g] = min(g_old, mmin)
    st[S_LOOK, 0] = window
    st[S_ATT, 0] = att
    st[S_LIM_NGAIN, 0] = ngain


@nb.njit(**JIT)
def _box_sum(ring, col, w, n_box):
    s = 0.0
    n = ring.shape[0]
    for i in range(n_box):
        j = w - i
        if j < 0:
            j += n
        s += ring[j, col + RING_M]
    return s


@nb.njit(**JIT)
def limiter_block(x, key, out, p, st, ring, tr):
    """Process one block. See livedyn.dsp.layout for the argument contract."""
    frames = x.shape[0]
    ch = x.shape[1]
    fs = p[P_SAMPLERATE]
    tracing = tr.shape[1] >= frames and frames > 0
    n_ring = ring.shape[0]

    # ---- targets of this block --------------------------------------------------------------
    tp_t = p[P_TRUE_PEAK] > 0.5
    look_t = int(math.floor(p[P_LOOKAHEAD] * fs / 1000.0 + 0.5))
    att_t = int(math.floor(p[P_ATTACK] * fs / 1000.0 + 0.5))
    if att_t > look_t:
        att_t = look_t
    extra_t = TP_DELAY + TP_SPREAD if tp_t else 0
    window_t = look_t + extra_t
    d_t = look_t + (TP_DELAY if tp_t else 0)
    ngain_t = ch if int(p[P_LINK]) == LINK_NONE else 1
    a_rel = one_pole_coeff(p[P_RELEASE], fs)
    hold_n = math.floor(p[P_HOLD] * fs / 1000.0 + 0.5)
    g_glide = 1.0 - one_pole_coeff(GLIDE_MS, fs)
    t_ceil = p[P_CEILING]
    xf_len = max(1.0, math.floor(DELAY_XFADE_MS * fs / 1000.0 + 0.5))

    w = int(st[S_WPOS, 0])
    frame0 = st[S_FRAMES, 0]
    if st[S_READY, 0] == 0.0:
        st[S_CEIL, 0] = t_ceil
        st[S_DCUR, 0] = d_t
        st[S_DOLD, 0] = d_t
        st[S_XF, 0] = 0.0
        st[S_LOOK, 0] = window_t
        st[S_ATT, 0] = att_t
        st[S_LIM_NGAIN, 0] = ngain_t
        st[S_LIM_TP, 0] = 1.0 if tp_t else 0.0
        for g in range(ngain_t):
            st[R_BOX, g] = att_t + 1.0
        st[S_READY, 0] = 1.0

    tp = st[S_LIM_TP, 0] > 0.5
    window = int(st[S_LOOK, 0])
    att = int(st[S_ATT, 0])
    ngain = int(st[S_LIM_NGAIN, 0])
    d_cur = int(st[S_DCUR, 0])
    d_old = int(st[S_DOLD, 0])
    xf = st[S_XF, 0]
    pending = (window != window_t or att != att_t or ngain != ngain_t or d_cur != d_t
               or tp != tp_t)

    tp_hist = st[R_TP:R_TP + TP_PHASE_TAPS]
    tp_taps = st[R_TAPS:R_TAPS + 4, :TP_PHASE_TAPS]
    ceil = st[S_CEIL, 0]
    ceil_lin = db_to_amp(ceil)
    nonfinite = st[S_NONFINITE, 0]
    clamps = st[S_CLAMP, 0]
    gr_max = 0.0
    for n in range(frames):
        t = frame0 + n
        # ---- structure changes, at a sample with no crossfade running --------------------
        if pending and xf <= 0.0:
            a_use = att_t
            if d_t != d_cur:
                look_old = d_cur - (TP_DELAY if tp else 0)
                d_old = d_cur
                d_cur = d_t
                xf = xf_len
                # cover both taps while they crossfade, and keep the moving average no longer
                # than the shorter lookahead, so that the old tap's sample is inside every term
                w_use = window_t if window_t > window else window
                if look_old < a_use:
                    a_use = look_old if look_old > 0 else 0
            else:
                w_use = window_t
            tp = tp_t
            _rebuild(ring, st, ch, w, t, w_use, a_use, ngain_t)
            window = w_use
            att = a_use
            ngain = ngain_t
            pending = window != window_t or att != att_t
        if ceil != t_ceil:
            ceil = glide(ceil, t_ceil, g_glide)
            ceil_lin = db_to_amp(ceil)
        for c in range(ch):
            v = x[n, c]
            if not math.isfinite(v):
                v = 0.0
                nonfinite += 1.0
            ring[w, c] = v
        tp_pos = int(st[R_TP_POS, 0])
        for c in range(ch):
            a = abs(ring[w, c])
            if tp:
                a_tp = tp_tick(tp_hist, tp_pos, c, ring[w, c], tp_taps)
                if a_tp > a:
                    a = a_tp
            st[R_MEAS, c] = a
            ring[w, ch + 4 * c + RING_REQ] = ceil_lin / a if a > ceil_lin else 1.0
        if tp:
            tp_pos += 1
            st[R_TP_POS, 0] = 0 if tp_pos >= TP_PHASE_TAPS else tp_pos
        refresh = (t % SUM_REFRESH) == 0.0
        n_box = float(att + 1)  # (float: the variant keeps its precision)
        for g in range(ngain):
            col = ch + 4 * g
            r = _req(ring, ch, w, g, ngain)
            # 1. minimum over the window
            _dq_push(ring, st, col, g, r, t)
            h = int(st[R_DQ_HEAD, g])
            while ring[h, col + RING_DQ_IDX] < t - window:
                h += 1
                if h >= n_ring:
                    h = 0
                st[R_DQ_LEN, g] -= 1.0
            st[R_DQ_HEAD, g] = h
            m = ring[h, col + RING_DQ_VAL]
            # 2. moving average over att + 1 values of m
            j = w - att - 1
            if j < 0:
                j += n_ring
            oldest = ring[j, col + RING_M]
            ring[w, col + RING_M] = m
            if refresh:
                box = _box_sum(ring, col, w, att + 1)
            else:
                box = st[R_BOX, g] + m - oldest
            st[R_BOX, g] = box
            b = box / n_box
            if att == 0:
                b = m
            # 3. release with hold, never above b
            gp = st[R_G, g]
            if b < gp:
                gn = b
                st[R_HOLD, g] = hold_n
            elif st[R_HOLD, g] > 0.0:
                st[R_HOLD, g] -= 1.0
                gn = gp
            else:
                # the release one-pole acts on the gain in dB (so tau is 63 % of the recovery
                # in dB): ln gn = a ln gp + (1 - a) ln b
                gn = math.exp(a_rel * math.log(gp) + (1.0 - a_rel) * math.log(b))
                if gn > b:
                    gn = b
            # last clamp: the requirement of the sample(s) this gain is applied to
            i = w - d_cur
            if i < 0:
                i += n_ring
            lim = _req(ring, ch, i, g, ngain)
            if xf > 0.0:
                i = w - d_old
                if i < 0:
                    i += n_ring
                v = _req(ring, ch, i, g, ngain)
                if v < lim:
                    lim = v
            if gn > lim:
                if gn > lim * (1.0 + 1e-9):
                    clamps += 1.0
                gn = lim
            st[R_G, g] = gn
            st[R_GAIN, g] = gn
            gdb = amp_to_db(gn)
            if -gdb > gr_max:
                gr_max = -gdb
            if tracing:
                a = st[R_MEAS, g]
                if ngain == 1:
                    for c in range(1, ch):
                        if st[R_MEAS, c] > a:
                            a = st[R_MEAS, c]
                tr[T_KEY, n, g] = a
                tr[T_LEVEL, n, g] = amp_to_db(a)
                tr[T_CURVE, n, g] = amp_to_db(r)
                tr[T_GAIN, n, g] = gdb
                tr[T_TOTAL, n, g] = gdb
        for c in range(ch):
            g = 0 if ngain == 1 else c
            # the delayed sample, crossfading from the old delay (see dynamics.ring_back)
            xd = ring[ring_back(w, d_cur, n_ring), c]
            if xf > 0.0:
                xd = tap_fade(xd, ring[ring_back(w, d_old, n_ring), c], xf, xf_len)
            out[n, c] = xd * st[R_GAIN, g]
        if xf > 0.0:
            xf -= 1.0
        w += 1
        if w >= n_ring:
            w = 0

    st[S_CEIL, 0] = ceil
    st[S_DCUR, 0] = d_cur
    st[S_DOLD, 0] = d_old
    st[S_XF, 0] = xf
    st[S_LIM_TP, 0] = 1.0 if tp else 0.0
    st[S_WPOS, 0] = w
    st[S_NONFINITE, 0] = nonfinite
    st[S_CLAMP, 0] = clamps
    st[S_FRAMES, 0] += frames
    st[S_GR_MAX, 0] = gr_max

"""The fused per-block kernel of the compressor, expander, gate and ducker.

Per sample, in order: parameter glide; main input into the lookahead delay line (non-finite
samples replaced by 0 and counted); key (main, external or, in feedback topology, the last
output) through the key filters; level measure (peak |k| or mean square); channel link;
level in dB (linear-domain ballistics first when ``domain = linear``); gain computer;
log-domain ballistics with hold (when ``domain = log``); makeup; gain applied to the delayed main
signal; dry/wet mix with the delayed dry signal; ceiling (clip).

Only block-boundary work (coefficients, delay changes) happens outside the sample loop, and it
depends only on the parameter values, so the output is identical for any block split.

References
----------
.. [1] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design - A
       Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012.
.. [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients".
"""
import math

import numba as nb

from ..params import (
    FEEDBACK_MAX_RATIO,
    BALLISTICS_DECOUPLED, DELAY_XFADE_MS, DETECTOR_RMS, DOMAIN_LINEAR, GLIDE_MS, KEY_EXTERNAL,
    LAW_COMPRESSOR, LAW_DUCKER, LAW_EXPANDER, LAW_GATE, LAW_USER, LINK_MEAN, LINK_NONE, P_ATTACK,
    P_AUTOMAKEUP, P_BALLISTICS, P_CEILING, P_DETECTOR, P_DOMAIN, P_HOLD, P_HYSTERESIS, P_KEY,
    P_KEY_BPF, P_KEY_HPF, P_KEY_LPF, P_KEY_Q, P_KNEE, P_LAW, P_LINK, P_LOOKAHEAD, P_MAKEUP,
    P_MIX, P_RANGE, P_RATIO, P_RELEASE, P_RMS_TIME, P_SAMPLERATE, P_START, P_THRESHOLD, P_TOPOLOGY,
    P_USER_CURVE, P_USER_DETECTOR, P_USER_SMOOTHER,
    START_CLOSED, TOPOLOGY_FEEDBACK,
)
from .calls import call_curve, call_stage
from .layout import (
    C_BPF, C_HPF, C_LPF, NROWS, R_BPZ, R_ENV, R_ENV1, R_FB, R_GAIN, R_HOLD, R_HPZ, R_LPZ, R_MEAS,
    R_MS, R_OPEN, R_Y, R_Y1, S_AUTOMAKEUP_DB, S_CEIL, S_DCUR, S_DOLD, S_FRAMES, S_GR_MAX, S_HYST,
    S_KNEE, S_MAKEUP, S_MIX, S_NONFINITE, S_RANGE, S_READY, S_SLOPE, S_THR, S_WPOS, S_XF,
    T_CURVE, T_GAIN, T_KEY, T_LEVEL, T_TOTAL,
)
from .stages import (
    JIT, amp_to_db, biquad_bandpass, biquad_highpass, biquad_lowpass, biquad_tick,
    compressor_gain, db_to_amp, ducker_gain, expander_gain, flush, level_branching,
    one_pole_coeff, pow_to_db, smooth_branching,
)

BUTTERWORTH_Q = 1.0 / math.sqrt(2.0)


@nb.njit(**JIT)
def glide(v, target, g):
    """One step of the per-sample parameter glide; snaps when the remaining step is negligible."""
    d = target - v
    if -1e-9 < d < 1e-9:
        return target
    return v + g * d


@nb.njit(**JIT)
def feedback_slope(slope):
    """Slope of the gain computer on the output level that gives the set ratio in feedback.

    With the detector on the output, the steady state is y = x + g(y). A hard-knee curve of
    slope s' above threshold, g(y) = -s' (y - T), gives y = (x + s' T) / (1 + s'), an output
    slope 1 / (1 + s'); the set ratio R holds when s' = R - 1 = s / (1 - s) with s = 1 - 1/R.
    An infinite ratio cannot be reached (params.feedback_problem refuses it); s >= 1 returns the
    largest slope the parameter check lets through, so a glide can never divide by zero.
    """
    if slope >= 1.0:
        return FEEDBACK_MAX_RATIO - 1.0
    return slope / (1.0 - slope)


@nb.njit(**JIT)
def delay_samples(lookahead_ms, fs):
    return int(math.floor(lookahead_ms * fs / 1000.0 + 0.5))


@nb.njit(**JIT)
def xfade_len(fs):
    return max(1.0, math.floor(DELAY_XFADE_MS * fs / 1000.0 + 0.5))


@nb.njit(**JIT)
def ring_back(w, d, n_ring):
    """Row of the delay line ``d`` samples behind the write position ``w``."""
    i = w - d
    if i < 0:
        i += n_ring
    return i


@nb.njit(**JIT)
def tap_fade(v_new, v_old, xf, xf_len):
    """The delayed sample while a lookahead change crossfades from the old tap's ``v_old`` to
    the new tap's ``v_new`` (``xf`` of ``xf_len`` samples of the fade remain)."""
    wgt = float(1.0 - xf / xf_len)  # (float: the variant keeps its precision)
    return wgt * v_new + (1.0 - wgt) * v_old


# The delay-tap read is shared through ring_back and tap_fade, which take scalars only. A
# helper taking the ring array itself costs reference counting per call: measured with
# inspect_llvm (numba 0.68), such a helper with inline="always" added 8 NRT_incref and 9
# NRT_decref calls to the dynamics kernel (0 and 13 without it), so the array read stays in
# the kernels. With these scalar helpers the kernels keep their counts (0/13 here, 9/22 in the
# limiter) and `python -m bench kernels --blocksize 64` showed no loss: numba/C medians of the
# six cases 1.38 1.25 1.00 1.23 1.23 1.13 against 1.29 1.31 1.20 1.20 1.01 1.34 written out.


@nb.njit(**JIT)
def start_block_delay(st, d_new, fs):
    """Block boundary: take a new main-path delay, starting a crossfade from the old one.

    A change that arrives while a crossfade is running waits until it has finished (the
    sample loop starts it then, see ``next_delay``), so the old tap is never dropped half-faded.
    """
    if st[S_READY, 0] == 0.0:
        st[S_DCUR, 0] = d_new
        st[S_DOLD, 0] = d_new
        st[S_XF, 0] = 0.0
    else:
        next_delay(st, d_new, fs)


@nb.njit(**JIT)
def next_delay(st, d_new, fs):
    """Start a crossfade to d_new if none is running and the delay differs."""
    if st[S_XF, 0] <= 0.0 and d_new != int(st[S_DCUR, 0]):
        st[S_DOLD, 0] = st[S_DCUR, 0]
        st[S_DCUR, 0] = d_new
        st[S_XF, 0] = xfade_len(fs)


# Bits of the structural choices a block runs with (dynamics_modes): a variant compiled for
# one value of them (livedyn.dsp.variants) runs only the code those choices use.
M_LAW = 7  # bits 0-2: the gain law
M_RMS = 1 << 3
M_DECOUPLED = 1 << 4
M_LINEAR = 1 << 5
M_FEEDBACK = 1 << 6
M_EXTERNAL = 1 << 7
M_LINK_SHIFT = 8  # bits 8-9: the channel link
M_AUTOMAKEUP = 1 << 10
M_HPF = 1 << 11
M_LPF = 1 << 12
M_BPF = 1 << 13
M_USER_DETECTOR = 1 << 14
M_USER_SMOOTHER = 1 << 15


@nb.njit(**JIT)
def dynamics_modes(p):
    """The structural choices of parameter array ``p`` as one integer of M_* bits: the gain
    law, the detector, ballistics, domain, topology and key, the link, automatic makeup, which
    key filters are on and which user stages there are."""
    law = int(p[P_LAW])
    user_det = p[P_USER_DETECTOR] != 0.0
    comp_like = law == LAW_COMPRESSOR or law == LAW_USER
    m = law
    if int(p[P_DETECTOR]) == DETECTOR_RMS and not user_det:
        m |= M_RMS
    if int(p[P_BALLISTICS]) == BALLISTICS_DECOUPLED and (comp_like or law == LAW_DUCKER):
        m |= M_DECOUPLED
    if int(p[P_DOMAIN]) == DOMAIN_LINEAR and comp_like:
        m |= M_LINEAR
    feedback = int(p[P_TOPOLOGY]) == TOPOLOGY_FEEDBACK and comp_like
    if feedback:
        m |= M_FEEDBACK
    if int(p[P_KEY]) == KEY_EXTERNAL and not feedback:
        m |= M_EXTERNAL
    m |= int(p[P_LINK]) << M_LINK_SHIFT
    if p[P_AUTOMAKEUP] > 0.5 and law == LAW_COMPRESSOR:
        m |= M_AUTOMAKEUP
    if p[P_KEY_HPF] > 0.0:
        m |= M_HPF
    if p[P_KEY_LPF] > 0.0:
        m |= M_LPF
    if p[P_KEY_BPF] > 0.0:
        m |= M_BPF
    if user_det:
        m |= M_USER_DETECTOR
    if p[P_USER_SMOOTHER] != 0.0:
        m |= M_USER_SMOOTHER
    return m


@nb.njit(**JIT)
def dynamics_block(x, key, out, p, st, ring, tr):
    """Process one block. See livedyn.dsp.layout for the argument contract."""
    frames = x.shape[0]
    ch = x.shape[1]
    fs = p[P_SAMPLERATE]
    modes = dynamics_modes(p)  # (a variant for one value of the modes has a constant here)
    law = modes & M_LAW
    tracing = tr.shape[1] >= frames and frames > 0

    # ---- block boundary: coefficients and modes --------------------------------------------
    a_att = one_pole_coeff(p[P_ATTACK], fs)
    a_rel = one_pole_coeff(p[P_RELEASE], fs)
    a_rms = one_pole_coeff(p[P_RMS_TIME], fs)
    g_glide = 1.0 - one_pole_coeff(GLIDE_MS, fs)
    hold_n = math.floor(p[P_HOLD] * fs / 1000.0 + 0.5)
    user_det = (modes & M_USER_DETECTOR) != 0
    user_smooth = (modes & M_USER_SMOOTHER) != 0
    nstate = (st.shape[0] - NROWS) // 2  # a user algorithm's declared state per channel
    s_off = NROWS * st.shape[1]
    rms = (modes & M_RMS) != 0
    decoupled = (modes & M_DECOUPLED) != 0
    linear = (modes & M_LINEAR) != 0
    feedback = (modes & M_FEEDBACK) != 0
    external = (modes & M_EXTERNAL) != 0
    link = (modes >> M_LINK_SHIFT) & 3
    automakeup = (modes & M_AUTOMAKEUP) != 0
    gate_like = law == LAW_EXPANDER or law == LAW_GATE
    # Direction of the gain-domain ballistics: "down" = toward more attenuation.
    if gate_like:
        a_down = a_rel  # closing
        a_up = a_att  # opening
    else:
        a_down = a_att
        a_up = a_rel
    hp_on = (modes & M_HPF) != 0
    lp_on = (modes & M_LPF) != 0
    bp_on = (modes & M_BPF) != 0
    if hp_on:
        biquad_highpass(st, C_HPF, p[P_KEY_HPF], BUTTERWORTH_Q, fs)
    if lp_on:
        biquad_lowpass(st, C_LPF, p[P_KEY_LPF], BUTTERWORTH_Q, fs)
    if bp_on:
        biquad_bandpass(st, C_BPF, p[P_KEY_BPF], p[P_KEY_Q], fs)

    nk = key.shape[1] if external else ch
    ngain = ch if link == LINK_NONE else 1

    t_thr = p[P_THRESHOLD]
    t_slope = 1.0 - 1.0 / p[P_RATIO] if p[P_RATIO] >= 1.0 else 0.0  # (no ratio: slot unused)
    t_knee = p[P_KNEE]
    t_mk = p[P_MAKEUP]
    t_range = p[P_RANGE]
    t_mix = p[P_MIX] * 0.01
    t_ceil = p[P_CEILING]
    t_hyst = p[P_HYSTERESIS]

    d_target = delay_samples(p[P_LOOKAHEAD], fs)
    start_block_delay(st, d_target, fs)
    if st[S_READY, 0] == 0.0:
        st[S_THR, 0] = t_thr
        st[S_SLOPE, 0] = t_slope
        st[S_KNEE, 0] = t_knee
        st[S_MAKEUP, 0] = t_mk
        st[S_RANGE, 0] = t_range
        st[S_MIX, 0] = t_mix
        st[S_CEIL, 0] = t_ceil
        st[S_HYST, 0] = t_hyst
        if gate_like and p[P_START] == START_CLOSED:
            # closed: the state the processor reaches after silence, at the full range
            for g in range(st.shape[1]):
                st[R_Y, g] = -t_range
        st[S_READY, 0] = 1.0
    thr = st[S_THR, 0]
    slope = st[S_SLOPE, 0]
    knee = st[S_KNEE, 0]
    mk = st[S_MAKEUP, 0]
    rng = st[S_RANGE, 0]
    mix = st[S_MIX, 0]
    ceil = st[S_CEIL, 0]
    hyst = st[S_HYST, 0]
    gliding = True
    ceil_lin = db_to_amp(ceil)
    mk_auto = -compressor_gain(0.0, thr, slope, knee) if automakeup else 0.0
    fb_slope = feedback_slope(slope)

    d_cur = int(st[S_DCUR, 0])
    d_old = int(st[S_DOLD, 0])
    xf = st[S_XF, 0]
    xf_len = xfade_len(fs)
    w = int(st[S_WPOS, 0])
    ring_len = ring.shape[0]
    nonfinite = st[S_NONFINITE, 0]
    gr_max = 0.0

    for n in range(frames):
        # ---- parameter glide (per sample) --------------------------------------------------
        if gliding:
            thr = glide(thr, t_thr, g_glide)
            slope = glide(slope, t_slope, g_glide)
            knee = glide(knee, t_knee, g_glide)
            mk = glide(mk, t_mk, g_glide)
            rng = glide(rng, t_range, g_glide)
            mix = glide(mix, t_mix, g_glide)
            ceil = glide(ceil, t_ceil, g_glide)
            hyst = glide(hyst, t_hyst, g_glide)
            ceil_lin = db_to_amp(ceil)
            if automakeup:
                mk_auto = -compressor_gain(0.0, thr, slope, knee)
            fb_slope = feedback_slope(slope)
            gliding = not (thr == t_thr and slope == t_slope and knee == t_knee and mk == t_mk
                           and rng == t_range and mix == t_mix and ceil == t_ceil
                           and hyst == t_hyst)

        # ---- main input into the delay line ------------------------------------------------
        for c in range(ch):
            v = x[n, c]
            if not math.isfinite(v):
                v = 0.0
                nonfinite += 1.0
            ring[w, c] = v

        # ---- key: filters and level measure ------------------------------------------------
        for j in range(nk):
            if feedback:
                k = st[R_FB, j]
            elif external:
                k = key[n, j]
                if not math.isfinite(k):
                    k = 0.0
                    nonfinite += 1.0
            else:
                k = ring[w, j]
            if hp_on:
                k = biquad_tick(st, C_HPF, R_HPZ, j, k)
            if lp_on:
                k = biquad_tick(st, C_LPF, R_LPZ, j, k)
            if bp_on:
                k = biquad_tick(st, C_BPF, R_BPZ, j, k)
            if tracing:
                tr[T_KEY, n, j] = k
            if user_det:
                st[R_MEAS, j] = call_stage(p[P_USER_DETECTOR], k, p, st, s_off + j * nstate)
            elif rms:
                ms = flush(a_rms * st[R_MS, j] + (1.0 - a_rms) * k * k)
                st[R_MS, j] = ms
                st[R_MEAS, j] = ms
            else:
                st[R_MEAS, j] = abs(k)

        # ---- per gain channel: link, level, curve, ballistics ------------------------------
        for g in range(ngain):
            if ngain == 1:
                lv = st[R_MEAS, 0]
                if link == LINK_MEAN:
                    for j in range(1, nk):
                        lv += st[R_MEAS, j]
                    lv /= float(nk)  # (float: the variant keeps its precision)
                else:
                    for j in range(1, nk):
                        if st[R_MEAS, j] > lv:
                            lv = st[R_MEAS, j]
            elif nk == 1:
                lv = st[R_MEAS, 0]
            else:
                lv = st[R_MEAS, g]

            if linear:
                amp = math.sqrt(2.0 * lv) if rms else lv
                if decoupled:
                    # Smooth decoupled peak detector [1], eq. (17), on the level; hold delays
                    # the release of its first stage.
                    e1 = st[R_ENV1, g]
                    if amp >= e1:
                        e1 = amp
                        st[R_HOLD, g] = hold_n
                    elif st[R_HOLD, g] > 0.0:
                        st[R_HOLD, g] -= 1.0
                    else:
                        e1 = a_rel * e1 + (1.0 - a_rel) * amp
                        if amp > e1:
                            e1 = amp
                    e1 = flush(e1)
                    st[R_ENV1, g] = e1
                    env = flush(a_att * st[R_ENV, g] + (1.0 - a_att) * e1)
                else:
                    env = st[R_ENV, g]
                    if amp < env and st[R_HOLD, g] > 0.0:
                        st[R_HOLD, g] -= 1.0
                    else:
                        if amp >= env:
                            st[R_HOLD, g] = hold_n
                        env = flush(level_branching(env, amp, a_att, a_rel))
                st[R_ENV, g] = env
                x_db = amp_to_db(env)
            elif rms:
                x_db = pow_to_db(2.0 * lv)
            else:
                x_db = amp_to_db(lv)

            if law == LAW_COMPRESSOR:
                # feedback: the curve reads the output level, with the slope that makes the
                # set ratio hold at steady state (feedback_slope)
                gc = compressor_gain(x_db, thr, fb_slope if feedback else slope, knee)
            elif law == LAW_DUCKER:
                gc = ducker_gain(x_db, thr, slope, knee, rng)
            elif law == LAW_USER:
                gc = call_curve(p[P_USER_CURVE], x_db, p)
            else:
                opened = st[R_OPEN, g]
                if x_db >= thr:
                    opened = 1.0
                elif x_db < thr - hyst:
                    opened = 0.0
                st[R_OPEN, g] = opened
                t_eff = thr - hyst if opened > 0.0 else thr
                if law == LAW_EXPANDER:
                    gc = expander_gain(x_db, t_eff, slope, knee, rng)
                else:
                    gc = 0.0 if opened > 0.0 else -rng

            y = st[R_Y, g]
            if user_smooth:
                # the smoother's rows follow the detector's: (ncols + g) of the state block
                y = call_stage(p[P_USER_SMOOTHER], gc, p, st, s_off + (st.shape[1] + g) * nstate)
            elif linear:
                y = gc
            elif decoupled:
                # Smooth decoupled peak detector [1], eq. (17), in the gain domain: an instant
                # first stage with release (and hold), then the attack one-pole.
                y1 = st[R_Y1, g]
                if gc <= y1:
                    y1 = gc
                    st[R_HOLD, g] = hold_n
                elif st[R_HOLD, g] > 0.0:
                    st[R_HOLD, g] -= 1.0
                else:
                    y1 = a_up * y1 + (1.0 - a_up) * gc
                    if gc < y1:
                        y1 = gc
                st[R_Y1, g] = flush(y1)
                y = a_down * y + (1.0 - a_down) * y1
            else:
                towards_down = gc < y
                if gate_like:
                    # hold delays closing
                    if towards_down and st[R_HOLD, g] > 0.0:
                        st[R_HOLD, g] -= 1.0
                    else:
                        if not towards_down:
                            st[R_HOLD, g] = hold_n
                        y = smooth_branching(y, gc, a_down, a_up)
                else:
                    # hold delays release
                    if gc > y and st[R_HOLD, g] > 0.0:
                        st[R_HOLD, g] -= 1.0
                    else:
                        if gc <= y:
                            st[R_HOLD, g] = hold_n
                        y = smooth_branching(y, gc, a_down, a_up)
            y = flush(y)
            st[R_Y, g] = y
            total = y + mk + mk_auto
            st[R_GAIN, g] = db_to_amp(total)
            if -y > gr_max:
                gr_max = -y
            if tracing:
                tr[T_LEVEL, n, g] = x_db
                tr[T_CURVE, n, g] = gc
                tr[T_GAIN, n, g] = y
                tr[T_TOTAL, n, g] = total

        # ---- gain, mix, ceiling ------------------------------------------------------------
        for c in range(ch):
            g = 0 if ngain == 1 else c
            # the delayed sample, crossfading from the old delay (see ring_back)
            xd = ring[ring_back(w, d_cur, ring_len), c]
            if xf > 0.0:
                xd = tap_fade(xd, ring[ring_back(w, d_old, ring_len), c], xf, xf_len)
            wet = xd * st[R_GAIN, g]
            if feedback:
                st[R_FB, c] = flush(xd * db_to_amp(st[R_Y, g]))
            o = mix * wet + (1.0 - mix) * xd
            if o > ceil_lin:
                o = ceil_lin
            elif o < -ceil_lin:
                o = -ceil_lin
            out[n, c] = o
        if xf > 0.0:
            xf -= 1.0
            if xf <= 0.0 and d_target != d_cur:
                st[S_XF, 0] = 0.0
                next_delay(st, d_target, fs)
                d_cur = int(st[S_DCUR, 0])
                d_old = int(st[S_DOLD, 0])
                xf = st[S_XF, 0]
        w += 1
        if w >= ring_len:
            w = 0

    st[S_THR, 0] = thr
    st[S_SLOPE, 0] = slope
    st[S_KNEE, 0] = knee
    st[S_MAKEUP, 0] = mk
    st[S_RANGE, 0] = rng
    st[S_MIX, 0] = mix
    st[S_CEIL, 0] = ceil
    st[S_HYST, 0] = hyst
    st[S_XF, 0] = xf
    st[S_WPOS, 0] = w
    st[S_NONFINITE, 0] = nonfinite
    st[S_FRAMES, 0] += frames
    st[S_GR_MAX, 0] = gr_max
    st[S_AUTOMAKEUP_DB, 0] = mk_auto

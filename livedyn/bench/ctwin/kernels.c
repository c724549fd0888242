/*
 * Plain-C twins of livedyn's fused kernels, for the kernel benchmark (livedyn/bench/ctwin.py).
 *
 * ctwin_dynamics_block: the compressor, expander, gate and ducker kernel
 *                       (livedyn.dsp.dynamics.dynamics_block), all four gain laws.
 * ctwin_limiter_block:  the lookahead peak limiter (livedyn.dsp.limiter.limiter_block),
 *                       with its 4x true-peak detector (ITU-R BS.1770-4 Annex 2).
 *
 * The same argument contract as the numba kernels (livedyn/dsp/layout.py): the arrays x, key,
 * out (float32, frames x channels, C order), p (float64, NPARAM), st (float64, NROWS x st_cols),
 * ring (float64, ring_len x ring_cols) and tr (float64, NTRACE x tr_frames x tr_cols), passed as
 * pointers to their first element with their shapes as integers.
 *
 * Precision: double state, float audio, libm exp/log/sin/cos/sqrt/floor/fmod, the same
 * operations in the same order as the numba kernels, so that outputs and states come out
 * bit-identical. Build without fast math and with -ffp-contract=off: LLVM, as numba drives it
 * without fastmath, contracts none of the kernels' multiply-adds either (its one fused
 * instruction, in the limiter, is the exact expansion of t % 4096, equal to fmod here).
 *
 * ctwin_drive_dynamics / ctwin_drive_limiter: consecutive whole blocks over a preallocated
 * signal (as livedyn.bench.kernels.drive does for the numba kernel); they return the elapsed
 * nanoseconds of CLOCK_MONOTONIC around the loop.
 *
 * Every constant (layout rows, parameter slots, choice indices, float constants) comes from the
 * generated header ctwin_consts.h, written by livedyn/bench/ctwin.py from the Python modules.
 *
 * References
 * ----------
 * [1] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design - A
 *     Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012.
 * [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients".
 * [3] ITU-R BS.1770-4 (10/2015), Annex 2.
 */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stdint.h>
#include <time.h>

#include "ctwin_consts.h"

typedef int64_t i64;

/* Row-major element of a 2-D array with `cols` columns. */
#define AT(a, cols, r, c) ((a)[(i64)(r) * (cols) + (c)])

/* ---- stages (livedyn.dsp.stages) ------------------------------------------------------------ */

static inline double one_pole_coeff(double tau_ms, double fs)
{
    if (tau_ms <= 0.0)
        return 0.0;
    return exp(-1000.0 / (tau_ms * fs));
}

static inline double amp_to_db(double a)
{
    if (a <= LEVEL_FLOOR_AMP)
        return LEVEL_FLOOR_DB;
    return DB_PER_NEPER_AMP * log(a);
}

static inline double pow_to_db(double p)
{
    if (p <= LEVEL_FLOOR_POW)
        return LEVEL_FLOOR_DB;
    return DB_PER_NEPER_POW * log(p);
}

static inline double db_to_amp(double db) { return exp(LN10_OVER_20 * db); }

static inline double flush(double v)
{
    if (-TINY < v && v < TINY)
        return 0.0;
    return v;
}

static void biquad_store(double *st, i64 sc, i64 crow, double b0, double b1, double b2,
                         double a0, double a1, double a2)
{
    AT(st, sc, crow, 0) = b0 / a0;
    AT(st, sc, crow, 1) = b1 / a0;
    AT(st, sc, crow, 2) = b2 / a0;
    AT(st, sc, crow, 3) = a1 / a0;
    AT(st, sc, crow, 4) = a2 / a0;
}

static void biquad_lowpass(double *st, i64 sc, i64 crow, double f0, double q, double fs)
{
    double w0 = 2.0 * MATH_PI * f0 / fs;
    double cw = cos(w0);
    double alpha = sin(w0) / (2.0 * q);
    biquad_store(st, sc, crow, (1.0 - cw) * 0.5, 1.0 - cw, (1.0 - cw) * 0.5, 1.0 + alpha,
                 -2.0 * cw, 1.0 - alpha);
}

static void biquad_highpass(double *st, i64 sc, i64 crow, double f0, double q, double fs)
{
    double w0 = 2.0 * MATH_PI * f0 / fs;
    double cw = cos(w0);
    double alpha = sin(w0) / (2.0 * q);
    biquad_store(st, sc, crow, (1.0 + cw) * 0.5, -(1.0 + cw), (1.0 + cw) * 0.5, 1.0 + alpha,
                 -2.0 * cw, 1.0 - alpha);
}

static void biquad_bandpass(double *st, i64 sc, i64 crow, double f0, double q, double fs)
{
    double w0 = 2.0 * MATH_PI * f0 / fs;
    double cw = cos(w0);
    double alpha = sin(w0) / (2.0 * q);
    biquad_store(st, sc, crow, alpha, 0.0, -alpha, 1.0 + alpha, -2.0 * cw, 1.0 - alpha);
}

/* Transposed direct form II [2], state in rows zrow, zrow + 1, column j. */
static inline double biquad_tick(double *st, i64 sc, i64 crow, i64 zrow, i64 j, double x)
{
    double y = AT(st, sc, crow, 0) * x + AT(st, sc, zrow, j);
    AT(st, sc, zrow, j) = flush(AT(st, sc, crow, 1) * x - AT(st, sc, crow, 3) * y
                                + AT(st, sc, zrow + 1, j));
    AT(st, sc, zrow + 1, j) = flush(AT(st, sc, crow, 2) * x - AT(st, sc, crow, 4) * y);
    return y;
}

/* Gain computers [1], eqs. (3), (4); slope = 1 - 1/ratio. */
static inline double compressor_gain(double x_db, double threshold, double slope, double knee)
{
    double d = x_db - threshold;
    if (knee > 0.0) {
        if (2.0 * d < -knee)
            return 0.0;
        if (2.0 * d <= knee) {
            double e = d + 0.5 * knee;
            return -slope * e * e / (2.0 * knee);
        }
        return -slope * d;
    }
    if (d > 0.0)
        return -slope * d;
    return 0.0;
}

static inline double expander_gain(double x_db, double threshold, double slope, double knee,
                                   double range_db)
{
    double d = x_db - threshold;
    double g;
    if (slope >= 1.0)
        return d < 0.0 ? -range_db : 0.0;
    double e_slope = slope / (1.0 - slope);
    if (knee > 0.0) {
        if (2.0 * d > knee) {
            g = 0.0;
        } else if (2.0 * d >= -knee) {
            double e = d - 0.5 * knee;
            g = -e_slope * e * e / (2.0 * knee);
        } else {
            g = e_slope * d;
        }
    } else {
        g = d < 0.0 ? e_slope * d : 0.0;
    }
    if (g < -range_db)
        return -range_db;
    return g;
}

static inline double ducker_gain(double key_db, double threshold, double slope, double knee,
                                 double range_db)
{
    double g = compressor_gain(key_db, threshold, slope, knee);
    if (g < -range_db)
        return -range_db;
    return g;
}

/* Smooth branching peak detector [1], eq. (16). */
static inline double smooth_branching(double y, double target, double a_down, double a_up)
{
    if (target < y)
        return a_down * y + (1.0 - a_down) * target;
    return a_up * y + (1.0 - a_up) * target;
}

static inline double level_branching(double y, double level, double a_att, double a_rel)
{
    if (level > y)
        return a_att * y + (1.0 - a_att) * level;
    return a_rel * y + (1.0 - a_rel) * level;
}

/* ---- glide and lookahead delay (livedyn.dsp.dynamics) --------------------------------------- */

static inline double glide(double v, double target, double g)
{
    double d = target - v;
    if (-1e-9 < d && d < 1e-9)
        return target;
    return v + g * d;
}

/* livedyn.dsp.dynamics.feedback_slope: the curve slope on the output level that gives the set
 * ratio in feedback (20.0 is livedyn.params.FEEDBACK_MAX_RATIO). */
static inline double feedback_slope(double slope)
{
    if (slope >= 1.0)
        return 20.0 - 1.0;
    return slope / (1.0 - slope);
}

/* numba's math.floor of a float is an int64: floor, then truncation to integer. */
static inline i64 floor_int(double v) { return (i64)floor(v); }

static inline i64 delay_samples(double lookahead_ms, double fs)
{
    return floor_int(lookahead_ms * fs / 1000.0 + 0.5);
}

static inline double xfade_len(double fs)
{
    double f = (double)floor_int(DELAY_XFADE_MS * fs / 1000.0 + 0.5);
    return f > 1.0 ? f : 1.0;
}

static void next_delay(double *st, i64 sc, i64 d_new, double fs)
{
    if (AT(st, sc, S_XF, 0) <= 0.0 && d_new != (i64)AT(st, sc, S_DCUR, 0)) {
        AT(st, sc, S_DOLD, 0) = AT(st, sc, S_DCUR, 0);
        AT(st, sc, S_DCUR, 0) = (double)d_new;
        AT(st, sc, S_XF, 0) = xfade_len(fs);
    }
}

static void start_block_delay(double *st, i64 sc, i64 d_new, double fs)
{
    if (AT(st, sc, S_READY, 0) == 0.0) {
        AT(st, sc, S_DCUR, 0) = (double)d_new;
        AT(st, sc, S_DOLD, 0) = (double)d_new;
        AT(st, sc, S_XF, 0) = 0.0;
    } else {
        next_delay(st, sc, d_new, fs);
    }
}

static inline double read_delayed(const double *ring, i64 n, i64 rc, i64 w, i64 c, i64 d_cur,
                                  i64 d_old, double xf, double xf_len)
{
    i64 i = w - d_cur;
    if (i < 0)
        i += n;
    double v = AT(ring, rc, i, c);
    if (xf > 0.0) {
        i64 j = w - d_old;
        if (j < 0)
            j += n;
        double wgt = 1.0 - xf / xf_len;
        v = wgt * v + (1.0 - wgt) * AT(ring, rc, j, c);
    }
    return v;
}

/* ---- the dynamics kernel -------------------------------------------------------------------- */

#define TR(t, n, j) tr[((i64)(t) * tr_frames + (n)) * tr_cols + (j)]

void ctwin_dynamics_block(const float *x, const float *key, float *out, const double *p,
                          double *st, double *ring, double *tr, i64 frames, i64 ch, i64 key_ch,
                          i64 sc, i64 ring_len, i64 rc, i64 tr_frames, i64 tr_cols)
{
    const double fs = p[P_SAMPLERATE];
    const i64 law = (i64)p[P_LAW];
    const int tracing = tr_frames >= frames && frames > 0;

    /* block boundary: coefficients and modes */
    const double a_att = one_pole_coeff(p[P_ATTACK], fs);
    const double a_rel = one_pole_coeff(p[P_RELEASE], fs);
    const double a_rms = one_pole_coeff(p[P_RMS_TIME], fs);
    const double g_glide = 1.0 - one_pole_coeff(GLIDE_MS, fs);
    const i64 hold_n = floor_int(p[P_HOLD] * fs / 1000.0 + 0.5);
    const int rms = (i64)p[P_DETECTOR] == DETECTOR_RMS;
    const int decoupled = (i64)p[P_BALLISTICS] == BALLISTICS_DECOUPLED
                          && (law == LAW_COMPRESSOR || law == LAW_DUCKER);
    const int linear = (i64)p[P_DOMAIN] == DOMAIN_LINEAR && law == LAW_COMPRESSOR;
    const int feedback = (i64)p[P_TOPOLOGY] == TOPOLOGY_FEEDBACK && law == LAW_COMPRESSOR;
    const int external = (i64)p[P_KEY] == KEY_EXTERNAL && !feedback;
    const i64 link = (i64)p[P_LINK];
    const int automakeup = p[P_AUTOMAKEUP] > 0.5 && law == LAW_COMPRESSOR;
    const int gate_like = law == LAW_EXPANDER || law == LAW_GATE;
    const double a_down = gate_like ? a_rel : a_att;
    const double a_up = gate_like ? a_att : a_rel;
    const int hp_on = p[P_KEY_HPF] > 0.0;
    const int lp_on = p[P_KEY_LPF] > 0.0;
    const int bp_on = p[P_KEY_BPF] > 0.0;
    if (hp_on)
        biquad_highpass(st, sc, C_HPF, p[P_KEY_HPF], BUTTERWORTH_Q, fs);
    if (lp_on)
        biquad_lowpass(st, sc, C_LPF, p[P_KEY_LPF], BUTTERWORTH_Q, fs);
    if (bp_on)
        biquad_bandpass(st, sc, C_BPF, p[P_KEY_BPF], p[P_KEY_Q], fs);

    const i64 nk = external ? key_ch : ch;
    const i64 ngain = link == LINK_NONE ? ch : 1;

    const double t_thr = p[P_THRESHOLD];
    const double t_slope = p[P_RATIO] >= 1.0 ? 1.0 - 1.0 / p[P_RATIO] : 0.0;
    const double t_knee = p[P_KNEE];
    const double t_mk = p[P_MAKEUP];
    const double t_range = p[P_RANGE];
    const double t_mix = p[P_MIX] * 0.01;
    const double t_ceil = p[P_CEILING];
    const double t_hyst = p[P_HYSTERESIS];

    const i64 d_target = delay_samples(p[P_LOOKAHEAD], fs);
    start_block_delay(st, sc, d_target, fs);
    if (AT(st, sc, S_READY, 0) == 0.0) {
        AT(st, sc, S_THR, 0) = t_thr;
        AT(st, sc, S_SLOPE, 0) = t_slope;
        AT(st, sc, S_KNEE, 0) = t_knee;
        AT(st, sc, S_MAKEUP, 0) = t_mk;
        AT(st, sc, S_RANGE, 0) = t_range;
        AT(st, sc, S_MIX, 0) = t_mix;
        AT(st, sc, S_CEIL, 0) = t_ceil;
        AT(st, sc, S_HYST, 0) = t_hyst;
        if (gate_like && p[P_START] == 0.0) /* START_CLOSED */
            for (i64 g = 0; g < sc; g++)
                AT(st, sc, R_Y, g) = -t_range;
        AT(st, sc, S_READY, 0) = 1.0;
    }
    double thr = AT(st, sc, S_THR, 0);
    double slope = AT(st, sc, S_SLOPE, 0);
    double knee = AT(st, sc, S_KNEE, 0);
    double mk = AT(st, sc, S_MAKEUP, 0);
    double rng = AT(st, sc, S_RANGE, 0);
    double mix = AT(st, sc, S_MIX, 0);
    double ceil_db = AT(st, sc, S_CEIL, 0);
    double hyst = AT(st, sc, S_HYST, 0);
    int gliding = 1;
    double ceil_lin = db_to_amp(ceil_db);
    double mk_auto = automakeup ? -compressor_gain(0.0, thr, slope, knee) : 0.0;
    double fb_slope = feedback_slope(slope);

    i64 d_cur = (i64)AT(st, sc, S_DCUR, 0);
    i64 d_old = (i64)AT(st, sc, S_DOLD, 0);
    double xf = AT(st, sc, S_XF, 0);
    const double xf_len = xfade_len(fs);
    i64 w = (i64)AT(st, sc, S_WPOS, 0);
    double nonfinite = AT(st, sc, S_NONFINITE, 0);
    double gr_max = 0.0;

    for (i64 n = 0; n < frames; n++) {
        /* parameter glide (per sample) */
        if (gliding) {
            thr = glide(thr, t_thr, g_glide);
            slope = glide(slope, t_slope, g_glide);
            knee = glide(knee, t_knee, g_glide);
            mk = glide(mk, t_mk, g_glide);
            rng = glide(rng, t_range, g_glide);
            mix = glide(mix, t_mix, g_glide);
            ceil_db = glide(ceil_db, t_ceil, g_glide);
            hyst = glide(hyst, t_hyst, g_glide);
            ceil_lin = db_to_amp(ceil_db);
            if (automakeup)
                mk_auto = -compressor_gain(0.0, thr, slope, knee);
            fb_slope = feedback_slope(slope);
            gliding = !(thr == t_thr && slope == t_slope && knee == t_knee && mk == t_mk
                        && rng == t_range && mix == t_mix && ceil_db == t_ceil
                        && hyst == t_hyst);
        }

        /* main input into the delay line */
        for (i64 c = 0; c < ch; c++) {
            double v = (double)AT(x, ch, n, c);
            if (!isfinite(v)) {
                v = 0.0;
                nonfinite += 1.0;
            }
            AT(ring, rc, w, c) = v;
        }

        /* key: filters and level measure */
        for (i64 j = 0; j < nk; j++) {
            double k;
            if (feedback) {
                k = AT(st, sc, R_FB, j);
            } else if (external) {
                k = (double)AT(key, key_ch, n, j);
                if (!isfinite(k)) {
                    k = 0.0;
                    nonfinite += 1.0;
                }
            } else {
                k = AT(ring, rc, w, j);
            }
            if (hp_on)
                k = biquad_tick(st, sc, C_HPF, R_HPZ, j, k);
            if (lp_on)
                k = biquad_tick(st, sc, C_LPF, R_LPZ, j, k);
            if (bp_on)
                k = biquad_tick(st, sc, C_BPF, R_BPZ, j, k);
            if (tracing)
                TR(T_KEY, n, j) = k;
            if (rms) {
                double ms = flush(a_rms * AT(st, sc, R_MS, j) + (1.0 - a_rms) * k * k);
                AT(st, sc, R_MS, j) = ms;
                AT(st, sc, R_MEAS, j) = ms;
            } else {
                AT(st, sc, R_MEAS, j) = fabs(k);
            }
        }

        /* per gain channel: link, level, curve, ballistics */
        for (i64 g = 0; g < ngain; g++) {
            double lv;
            if (ngain == 1) {
                lv = AT(st, sc, R_MEAS, 0);
                if (link == LINK_MEAN) {
                    for (i64 j = 1; j < nk; j++)
                        lv += AT(st, sc, R_MEAS, j);
                    lv /= (double)nk;
                } else {
                    for (i64 j = 1; j < nk; j++)
                        if (AT(st, sc, R_MEAS, j) > lv)
                            lv = AT(st, sc, R_MEAS, j);
                }
            } else if (nk == 1) {
                lv = AT(st, sc, R_MEAS, 0);
            } else {
                lv = AT(st, sc, R_MEAS, g);
            }

            double x_db;
            if (linear) {
                double amp = rms ? sqrt(2.0 * lv) : lv;
                double env;
                if (decoupled) {
                    /* smooth decoupled peak detector [1], eq. (17), on the level */
                    double e1 = AT(st, sc, R_ENV1, g);
                    if (amp >= e1) {
                        e1 = amp;
                        AT(st, sc, R_HOLD, g) = (double)hold_n;
                    } else if (AT(st, sc, R_HOLD, g) > 0.0) {
                        AT(st, sc, R_HOLD, g) -= 1.0;
                    } else {
                        e1 = a_rel * e1 + (1.0 - a_rel) * amp;
                        if (amp > e1)
                            e1 = amp;
                    }
                    e1 = flush(e1);
                    AT(st, sc, R_ENV1, g) = e1;
                    env = flush(a_att * AT(st, sc, R_ENV, g) + (1.0 - a_att) * e1);
                } else {
                    env = AT(st, sc, R_ENV, g);
                    if (amp < env && AT(st, sc, R_HOLD, g) > 0.0) {
                        AT(st, sc, R_HOLD, g) -= 1.0;
                    } else {
                        if (amp >= env)
                            AT(st, sc, R_HOLD, g) = (double)hold_n;
                        env = flush(level_branching(env, amp, a_att, a_rel));
                    }
                }
                AT(st, sc, R_ENV, g) = env;
                x_db = amp_to_db(env);
            } else if (rms) {
                x_db = pow_to_db(2.0 * lv);
            } else {
                x_db = amp_to_db(lv);
            }

            double gc;
            if (law == LAW_COMPRESSOR) {
                gc = compressor_gain(x_db, thr, feedback ? fb_slope : slope, knee);
            } else if (law == LAW_DUCKER) {
                gc = ducker_gain(x_db, thr, slope, knee, rng);
            } else {
                double opened = AT(st, sc, R_OPEN, g);
                if (x_db >= thr)
                    opened = 1.0;
                else if (x_db < thr - hyst)
                    opened = 0.0;
                AT(st, sc, R_OPEN, g) = opened;
                double t_eff = opened > 0.0 ? thr - hyst : thr;
                if (law == LAW_EXPANDER)
                    gc = expander_gain(x_db, t_eff, slope, knee, rng);
                else
                    gc = opened > 0.0 ? 0.0 : -rng;
            }

            double y = AT(st, sc, R_Y, g);
            if (linear) {
                y = gc;
            } else if (decoupled) {
                /* smooth decoupled peak detector [1], eq. (17), in the gain domain */
                double y1 = AT(st, sc, R_Y1, g);
                if (gc <= y1) {
                    y1 = gc;
                    AT(st, sc, R_HOLD, g) = (double)hold_n;
                } else if (AT(st, sc, R_HOLD, g) > 0.0) {
                    AT(st, sc, R_HOLD, g) -= 1.0;
                } else {
                    y1 = a_up * y1 + (1.0 - a_up) * gc;
                    if (gc < y1)
                        y1 = gc;
                }
                AT(st, sc, R_Y1, g) = flush(y1);
                y = a_down * y + (1.0 - a_down) * y1;
            } else {
                int towards_down = gc < y;
                if (gate_like) {
                    /* hold delays closing */
                    if (towards_down && AT(st, sc, R_HOLD, g) > 0.0) {
                        AT(st, sc, R_HOLD, g) -= 1.0;
                    } else {
                        if (!towards_down)
                            AT(st, sc, R_HOLD, g) = (double)hold_n;
                        y = smooth_branching(y, gc, a_down, a_up);
                    }
                } else {
                    /* hold delays release */
                    if (gc > y && AT(st, sc, R_HOLD, g) > 0.0) {
                        AT(st, sc, R_HOLD, g) -= 1.0;
                    } else {
                        if (gc <= y)
                            AT(st, sc, R_HOLD, g) = (double)hold_n;
                        y = smooth_branching(y, gc, a_down, a_up);
                    }
                }
            }
            y = flush(y);
            AT(st, sc, R_Y, g) = y;
            double total = y + mk + mk_auto;
            AT(st, sc, R_GAIN, g) = db_to_amp(total);
            if (-y > gr_max)
                gr_max = -y;
            if (tracing) {
                TR(T_LEVEL, n, g) = x_db;
                TR(T_CURVE, n, g) = gc;
                TR(T_GAIN, n, g) = y;
                TR(T_TOTAL, n, g) = total;
            }
        }

        /* gain, mix, ceiling */
        for (i64 c = 0; c < ch; c++) {
            i64 g = ngain == 1 ? 0 : c;
            double xd = read_delayed(ring, ring_len, rc, w, c, d_cur, d_old, xf, xf_len);
            double wet = xd * AT(st, sc, R_GAIN, g);
            if (feedback)
                AT(st, sc, R_FB, c) = flush(xd * db_to_amp(AT(st, sc, R_Y, g)));
            double o = mix * wet + (1.0 - mix) * xd;
            if (o > ceil_lin)
                o = ceil_lin;
            else if (o < -ceil_lin)
                o = -ceil_lin;
            AT(out, ch, n, c) = (float)o;
        }
        if (xf > 0.0) {
            xf -= 1.0;
            if (xf <= 0.0 && d_target != d_cur) {
                AT(st, sc, S_XF, 0) = 0.0;
                next_delay(st, sc, d_target, fs);
                d_cur = (i64)AT(st, sc, S_DCUR, 0);
                d_old = (i64)AT(st, sc, S_DOLD, 0);
                xf = AT(st, sc, S_XF, 0);
            }
        }
        w += 1;
        if (w >= ring_len)
            w = 0;
    }

    AT(st, sc, S_THR, 0) = thr;
    AT(st, sc, S_SLOPE, 0) = slope;
    AT(st, sc, S_KNEE, 0) = knee;
    AT(st, sc, S_MAKEUP, 0) = mk;
    AT(st, sc, S_RANGE, 0) = rng;
    AT(st, sc, S_MIX, 0) = mix;
    AT(st, sc, S_CEIL, 0) = ceil_db;
    AT(st, sc, S_HYST, 0) = hyst;
    AT(st, sc, S_XF, 0) = xf;
    AT(st, sc, S_WPOS, 0) = (double)w;
    AT(st, sc, S_NONFINITE, 0) = nonfinite;
    AT(st, sc, S_FRAMES, 0) += (double)frames;
    AT(st, sc, S_GR_MAX, 0) = gr_max;
    AT(st, sc, S_AUTOMAKEUP_DB, 0) = mk_auto;
}

/* ---- true peak (livedyn.dsp.truepeak) [3] --------------------------------------------------- */

static inline double tp_clean(double v)
{
    if (!(fabs(v) < INFINITY))
        return 0.0;
    if (fabs(v) < TP_TINY)
        return 0.0;
    return v;
}

/* hist: TP_PHASE_TAPS rows of `sc` columns; taps: 4 rows of `sc` columns (first 12 used). */
static inline double tp_tick(double *hist, const double *taps, i64 sc, i64 pos, i64 c, double x)
{
    AT(hist, sc, pos, c) = tp_clean(x);
    double y0 = 0.0, y1 = 0.0, y2 = 0.0, y3 = 0.0;
    for (i64 j = 0; j < pos + 1; j++) {
        double v = AT(hist, sc, pos - j, c);
        y0 += AT(taps, sc, 0, j) * v;
        y1 += AT(taps, sc, 1, j) * v;
        y2 += AT(taps, sc, 2, j) * v;
        y3 += AT(taps, sc, 3, j) * v;
    }
    for (i64 j = pos + 1; j < TP_PHASE_TAPS; j++) {
        double v = AT(hist, sc, pos - j + TP_PHASE_TAPS, c);
        y0 += AT(taps, sc, 0, j) * v;
        y1 += AT(taps, sc, 1, j) * v;
        y2 += AT(taps, sc, 2, j) * v;
        y3 += AT(taps, sc, 3, j) * v;
    }
    double m = fabs(y0);
    double a = fabs(y1);
    if (a > m)
        m = a;
    a = fabs(y2);
    if (a > m)
        m = a;
    a = fabs(y3);
    if (a > m)
        m = a;
    return m;
}

/* ---- the limiter kernel (livedyn.dsp.limiter) ----------------------------------------------- */

/* Requirement of gain channel g at ring row i: its channel's, or the least over channels. */
static inline double lim_req(const double *ring, i64 rc, i64 ch, i64 i, i64 g, i64 ngain)
{
    if (ngain == 1) {
        double r = AT(ring, rc, i, ch + RING_REQ);
        for (i64 c = 1; c < ch; c++) {
            double v = AT(ring, rc, i, ch + 4 * c + RING_REQ);
            if (v < r)
                r = v;
        }
        return r;
    }
    return AT(ring, rc, i, ch + 4 * g + RING_REQ);
}

/* Push (v, t) onto gain channel g's monotonic queue (values increase from head to tail). */
static inline void dq_push(double *ring, i64 n_ring, i64 rc, double *st, i64 sc, i64 col, i64 g,
                           double v, double t)
{
    i64 h = (i64)AT(st, sc, R_DQ_HEAD, g);
    i64 ln = (i64)AT(st, sc, R_DQ_LEN, g);
    while (ln > 0) {
        i64 back = h + ln - 1;
        if (back >= n_ring)
            back -= n_ring;
        if (AT(ring, rc, back, col + RING_DQ_VAL) >= v)
            ln -= 1;
        else
            break;
    }
    i64 slot = h + ln;
    if (slot >= n_ring)
        slot -= n_ring;
    AT(ring, rc, slot, col + RING_DQ_VAL) = v;
    AT(ring, rc, slot, col + RING_DQ_IDX) = t;
    AT(st, sc, R_DQ_LEN, g) = (double)(ln + 1);
}

static void lim_rebuild(double *ring, i64 n_ring, i64 rc, double *st, i64 sc, i64 ch, i64 w,
                        double t, i64 window, i64 att, i64 ngain)
{
    double g_old = 1.0;
    i64 ng_old = (i64)AT(st, sc, S_LIM_NGAIN, 0);
    for (i64 g = 0; g < ng_old; g++)
        if (AT(st, sc, R_G, g) < g_old)
            g_old = AT(st, sc, R_G, g);
    for (i64 g = 0; g < ngain; g++) {
        i64 col = ch + 4 * g;
        AT(st, sc, R_DQ_HEAD, g) = 0.0;
        AT(st, sc, R_DQ_LEN, g) = 0.0;
        for (i64 back = window; back > 0; back--) {
            i64 j = w - back;
            if (j < 0)
                j += n_ring;
            dq_push(ring, n_ring, rc, st, sc, col, g, lim_req(ring, rc, ch, j, g, ngain),
                    t - (double)back);
        }
        i64 span = window + att;
        if (n_ring - 1 < span)
            span = n_ring - 1;
        double mmin = 1.0;
        for (i64 back = 1; back < span + 1; back++) {
            i64 j = w - back;
            if (j < 0)
                j += n_ring;
            double v = lim_req(ring, rc, ch, j, g, ngain);
            if (v < mmin)
                mmin = v;
        }
        for (i64 back = 1; back < att + 2; back++) {
            i64 j = w - back;
            if (j < 0)
                j += n_ring;
            AT(ring, rc, j, col + RING_M) = mmin;
        }
        AT(st, sc, R_BOX, g) = ((double)att + 1.0) * mmin;
        AT(st, sc, R_G, g) = g_old < mmin ? g_old : mmin;
    }
    AT(st, sc, S_LOOK, 0) = (double)window;
    AT(st, sc, S_ATT, 0) = (double)att;
    AT(st, sc, S_LIM_NGAIN, 0) = (double)ngain;
}

static inline double box_sum(const double *ring, i64 n, i64 rc, i64 col, i64 w, i64 n_box)
{
    double s = 0.0;
    for (i64 i = 0; i < n_box; i++) {
        i64 j = w - i;
        if (j < 0)
            j += n;
        s += AT(ring, rc, j, col + RING_M);
    }
    return s;
}

void ctwin_limiter_block(const float *x, const float *key, float *out, const double *p,
                         double *st, double *ring, double *tr, i64 frames, i64 ch, i64 key_ch,
                         i64 sc, i64 n_ring, i64 rc, i64 tr_frames, i64 tr_cols)
{
    (void)key;
    (void)key_ch;
    const double fs = p[P_SAMPLERATE];
    const int tracing = tr_frames >= frames && frames > 0;

    /* targets of this block */
    const int tp_t = p[P_TRUE_PEAK] > 0.5;
    const i64 look_t = floor_int(p[P_LOOKAHEAD] * fs / 1000.0 + 0.5);
    i64 att_t = floor_int(p[P_ATTACK] * fs / 1000.0 + 0.5);
    if (att_t > look_t)
        att_t = look_t;
    const i64 extra_t = tp_t ? LIM_TP_DELAY + LIM_TP_SPREAD : 0;
    const i64 window_t = look_t + extra_t;
    const i64 d_t = look_t + (tp_t ? LIM_TP_DELAY : 0);
    const i64 ngain_t = (i64)p[P_LINK] == LINK_NONE ? ch : 1;
    const double a_rel = one_pole_coeff(p[P_RELEASE], fs);
    const i64 hold_n = floor_int(p[P_HOLD] * fs / 1000.0 + 0.5);
    const double g_glide = 1.0 - one_pole_coeff(GLIDE_MS, fs);
    const double t_ceil = p[P_CEILING];
    const double xf_len = xfade_len(fs);

    i64 w = (i64)AT(st, sc, S_WPOS, 0);
    const double frame0 = AT(st, sc, S_FRAMES, 0);
    if (AT(st, sc, S_READY, 0) == 0.0) {
        AT(st, sc, S_CEIL, 0) = t_ceil;
        AT(st, sc, S_DCUR, 0) = (double)d_t;
        AT(st, sc, S_DOLD, 0) = (double)d_t;
        AT(st, sc, S_XF, 0) = 0.0;
        AT(st, sc, S_LOOK, 0) = (double)window_t;
        AT(st, sc, S_ATT, 0) = (double)att_t;
        AT(st, sc, S_LIM_NGAIN, 0) = (double)ngain_t;
        AT(st, sc, S_LIM_TP, 0) = tp_t ? 1.0 : 0.0;
        for (i64 g = 0; g < ngain_t; g++)
            AT(st, sc, R_BOX, g) = (double)att_t + 1.0;
        AT(st, sc, S_READY, 0) = 1.0;
    }

    int tp = AT(st, sc, S_LIM_TP, 0) > 0.5;
    i64 window = (i64)AT(st, sc, S_LOOK, 0);
    i64 att = (i64)AT(st, sc, S_ATT, 0);
    i64 ngain = (i64)AT(st, sc, S_LIM_NGAIN, 0);
    i64 d_cur = (i64)AT(st, sc, S_DCUR, 0);
    i64 d_old = (i64)AT(st, sc, S_DOLD, 0);
    double xf = AT(st, sc, S_XF, 0);
    int pending = window != window_t || att != att_t || ngain != ngain_t || d_cur != d_t
                  || tp != tp_t;

    double *tp_hist = &AT(st, sc, R_TP, 0);
    const double *tp_taps = &AT(st, sc, R_TAPS, 0);
    double ceil_db = AT(st, sc, S_CEIL, 0);
    double ceil_lin = db_to_amp(ceil_db);
    double nonfinite = AT(st, sc, S_NONFINITE, 0);
    double clamps = AT(st, sc, S_CLAMP, 0);
    double gr_max = 0.0;
    for (i64 n = 0; n < frames; n++) {
        double t = frame0 + (double)n;
        /* structure changes, at a sample with no crossfade running */
        if (pending && xf <= 0.0) {
            i64 a_use = att_t;
            i64 w_use;
            if (d_t != d_cur) {
                i64 look_old = d_cur - (tp ? LIM_TP_DELAY : 0);
                d_old = d_cur;
                d_cur = d_t;
                xf = xf_len;
                w_use = window_t > window ? window_t : window;
                if (look_old < a_use)
                    a_use = look_old > 0 ? look_old : 0;
            } else {
                w_use = window_t;
            }
            tp = tp_t;
            lim_rebuild(ring, n_ring, rc, st, sc, ch, w, t, w_use, a_use, ngain_t);
            window = w_use;
            att = a_use;
            ngain = ngain_t;
            pending = window != window_t || att != att_t;
        }
        if (ceil_db != t_ceil) {
            ceil_db = glide(ceil_db, t_ceil, g_glide);
            ceil_lin = db_to_amp(ceil_db);
        }
        for (i64 c = 0; c < ch; c++) {
            double v = (double)AT(x, ch, n, c);
            if (!isfinite(v)) {
                v = 0.0;
                nonfinite += 1.0;
            }
            AT(ring, rc, w, c) = v;
        }
        i64 tp_pos = (i64)AT(st, sc, R_TP_POS, 0);
        for (i64 c = 0; c < ch; c++) {
            double a = fabs(AT(ring, rc, w, c));
            if (tp) {
                double a_tp = tp_tick(tp_hist, tp_taps, sc, tp_pos, c, AT(ring, rc, w, c));
                if (a_tp > a)
                    a = a_tp;
            }
            AT(st, sc, R_MEAS, c) = a;
            AT(ring, rc, w, ch + 4 * c + RING_REQ) = a > ceil_lin ? ceil_lin / a : 1.0;
        }
        if (tp) {
            tp_pos += 1;
            AT(st, sc, R_TP_POS, 0) = tp_pos >= TP_PHASE_TAPS ? 0.0 : (double)tp_pos;
        }
        const int refresh = fmod(t, (double)SUM_REFRESH) == 0.0;
        const double n_box = (double)att + 1.0;
        for (i64 g = 0; g < ngain; g++) {
            i64 col = ch + 4 * g;
            double r = lim_req(ring, rc, ch, w, g, ngain);
            /* 1. minimum over the window */
            dq_push(ring, n_ring, rc, st, sc, col, g, r, t);
            i64 h = (i64)AT(st, sc, R_DQ_HEAD, g);
            while (AT(ring, rc, h, col + RING_DQ_IDX) < t - (double)window) {
                h += 1;
                if (h >= n_ring)
                    h = 0;
                AT(st, sc, R_DQ_LEN, g) -= 1.0;
            }
            AT(st, sc, R_DQ_HEAD, g) = (double)h;
            double m = AT(ring, rc, h, col + RING_DQ_VAL);
            /* 2. moving average over att + 1 values of m */
            i64 j = w - att - 1;
            if (j < 0)
                j += n_ring;
            double oldest = AT(ring, rc, j, col + RING_M);
            AT(ring, rc, w, col + RING_M) = m;
            double box;
            if (refresh)
                box = box_sum(ring, n_ring, rc, col, w, att + 1);
            else
                box = AT(st, sc, R_BOX, g) + m - oldest;
            AT(st, sc, R_BOX, g) = box;
            double b = box / n_box;
            if (att == 0)
                b = m;
            /* 3. release with hold, never above b */
            double gp = AT(st, sc, R_G, g);
            double gn;
            if (b < gp) {
                gn = b;
                AT(st, sc, R_HOLD, g) = (double)hold_n;
            } else if (AT(st, sc, R_HOLD, g) > 0.0) {
                AT(st, sc, R_HOLD, g) -= 1.0;
                gn = gp;
            } else {
                /* release one-pole on the gain in dB */
                gn = exp(a_rel * log(gp) + (1.0 - a_rel) * log(b));
                if (gn > b)
                    gn = b;
            }
            /* last clamp: the requirement of the sample(s) this gain is applied to */
            i64 i = w - d_cur;
            if (i < 0)
                i += n_ring;
            double lim = lim_req(ring, rc, ch, i, g, ngain);
            if (xf > 0.0) {
                i = w - d_old;
                if (i < 0)
                    i += n_ring;
                double v = lim_req(ring, rc, ch, i, g, ngain);
                if (v < lim)
                    lim = v;
            }
            if (gn > lim) {
                if (gn > lim * (1.0 + 1e-9))
                    clamps += 1.0;
                gn = lim;
            }
            AT(st, sc, R_G, g) = gn;
            AT(st, sc, R_GAIN, g) = gn;
            double gdb = amp_to_db(gn);
            if (-gdb > gr_max)
                gr_max = -gdb;
            if (tracing) {
                double a = AT(st, sc, R_MEAS, g);
                if (ngain == 1) {
                    for (i64 c = 1; c < ch; c++)
                        if (AT(st, sc, R_MEAS, c) > a)
                            a = AT(st, sc, R_MEAS, c);
                }
                TR(T_KEY, n, g) = a;
                TR(T_LEVEL, n, g) = amp_to_db(a);
                TR(T_CURVE, n, g) = amp_to_db(r);
                TR(T_GAIN, n, g) = gdb;
                TR(T_TOTAL, n, g) = gdb;
            }
        }
        for (i64 c = 0; c < ch; c++) {
            i64 g = ngain == 1 ? 0 : c;
            double xd = read_delayed(ring, n_ring, rc, w, c, d_cur, d_old, xf, xf_len);
            AT(out, ch, n, c) = (float)(xd * AT(st, sc, R_GAIN, g));
        }
        if (xf > 0.0)
            xf -= 1.0;
        w += 1;
        if (w >= n_ring)
            w = 0;
    }

    AT(st, sc, S_CEIL, 0) = ceil_db;
    AT(st, sc, S_DCUR, 0) = (double)d_cur;
    AT(st, sc, S_DOLD, 0) = (double)d_old;
    AT(st, sc, S_XF, 0) = xf;
    AT(st, sc, S_LIM_TP, 0) = tp ? 1.0 : 0.0;
    AT(st, sc, S_WPOS, 0) = (double)w;
    AT(st, sc, S_NONFINITE, 0) = nonfinite;
    AT(st, sc, S_CLAMP, 0) = clamps;
    AT(st, sc, S_FRAMES, 0) += (double)frames;
    AT(st, sc, S_GR_MAX, 0) = gr_max;
}

/* ---- drivers and clock ---------------------------------------------------------------------- */

/* CLOCK_MONOTONIC in nanoseconds (also called from the numba-side timed driver). */
int64_t ctwin_now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000000 + ts.tv_nsec;
}

typedef void (*block_fn)(const float *, const float *, float *, const double *, double *,
                         double *, double *, i64, i64, i64, i64, i64, i64, i64, i64);

static inline int64_t drive(block_fn kernel, const float *x, const float *key, float *out,
                            const double *p, double *st, double *ring, double *tr, i64 frames,
                            i64 ch, i64 key_ch, i64 sc, i64 ring_len, i64 rc, i64 tr_frames,
                            i64 tr_cols, i64 blocksize)
{
    i64 n = frames - frames % blocksize;
    int64_t t0 = ctwin_now_ns();
    for (i64 i = 0; i < n; i += blocksize)
        kernel(x + i * ch, key + i * key_ch, out + i * ch, p, st, ring, tr, blocksize, ch,
               key_ch, sc, ring_len, rc, tr_frames, tr_cols);
    return ctwin_now_ns() - t0;
}

/* Consecutive whole blocks of `blocksize` frames over x (frames rows); elapsed ns. */
int64_t ctwin_drive_dynamics(const float *x, const float *key, float *out, const double *p,
                             double *st, double *ring, double *tr, i64 frames, i64 ch, i64 key_ch,
                             i64 sc, i64 ring_len, i64 rc, i64 tr_frames, i64 tr_cols,
                             i64 blocksize)
{
    return drive(ctwin_dynamics_block, x, key, out, p, st, ring, tr, frames, ch, key_ch, sc,
                 ring_len, rc, tr_frames, tr_cols, blocksize);
}

int64_t ctwin_drive_limiter(const float *x, const float *key, float *out, const double *p,
                            double *st, double *ring, double *tr, i64 frames, i64 ch, i64 key_ch,
                            i64 sc, i64 ring_len, i64 rc, i64 tr_frames, i64 tr_cols,
                            i64 blocksize)
{
    return drive(ctwin_limiter_block, x, key, out, p, st, ring, tr, frames, ch, key_ch, sc,
                 ring_len, rc, tr_frames, tr_cols, blocksize);
}

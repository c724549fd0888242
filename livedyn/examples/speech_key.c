/*
 * The stages of speech_key.py in C, ported by hand: a worked example of filling in the
 * skeleton that `livedyn port-kit --algorithm FILE.py` writes (the kit copies a NAME.c found
 * beside NAME.py into its c/stages.c). The same operations in the same order as the Python
 * stages, so that `make exact` passes bit for bit; see speech_key.py for the equations
 * (Audio EQ Cookbook high- and low-pass at Q = 1/sqrt(2), a one-pole mean square, a
 * smoothstep ducking curve).
 *
 * Slots (P_low, S_ms, ...) come from stages_slots.h, which the kit writes from the file.
 */
#include <math.h>

#include "livedyn_ref.h"
#include "stages_slots.h"

#define SK_BUTTERWORTH_Q (1.0 / sqrt(2.0))
#define SK_TINY 1e-30

static void design(double *s, double low, double high, double tau_ms, double fs)
{
    s[S_c_low] = low;
    s[S_c_high] = high;
    s[S_c_fs] = fs;
    s[S_c_tau] = tau_ms;
    if (0.45 * fs < high) /* Python's min(high, 0.45 fs) */
        high = 0.45 * fs;
    double w0 = 2.0 * MATH_PI * low / fs;
    double cw = cos(w0);
    double alpha = sin(w0) / (2.0 * SK_BUTTERWORTH_Q);
    double a0 = 1.0 + alpha;
    s[S_hb0] = 0.5 * (1.0 + cw) / a0;
    s[S_hb1] = -(1.0 + cw) / a0;
    s[S_hb2] = 0.5 * (1.0 + cw) / a0;
    s[S_ha1] = -2.0 * cw / a0;
    s[S_ha2] = (1.0 - alpha) / a0;
    w0 = 2.0 * MATH_PI * high / fs;
    cw = cos(w0);
    alpha = sin(w0) / (2.0 * SK_BUTTERWORTH_Q);
    a0 = 1.0 + alpha;
    s[S_lb0] = 0.5 * (1.0 - cw) / a0;
    s[S_lb1] = (1.0 - cw) / a0;
    s[S_lb2] = 0.5 * (1.0 - cw) / a0;
    s[S_la1] = -2.0 * cw / a0;
    s[S_la2] = (1.0 - alpha) / a0;
    s[S_a_ms] = exp(-1000.0 / (tau_ms * fs));
}

static double detector(double k, const double *p, double *s)
{
    double fs = p[P_samplerate];
    double low = p[P_low];
    double high = p[P_high];
    double tau = p[P_rms_time];
    if (low != s[S_c_low] || high != s[S_c_high] || fs != s[S_c_fs] || tau != s[S_c_tau])
        design(s, low, high, tau, fs);
    if (!isfinite(k))
        k = 0.0;
    double y = s[S_hb0] * k + s[S_hz1];
    double z1 = s[S_hb1] * k - s[S_ha1] * y + s[S_hz2];
    double z2 = s[S_hb2] * k - s[S_ha2] * y;
    if (fabs(z1) < SK_TINY && fabs(z2) < SK_TINY) {
        z1 = 0.0;
        z2 = 0.0;
    }
    s[S_hz1] = z1;
    s[S_hz2] = z2;
    double v = s[S_lb0] * y + s[S_lz1];
    z1 = s[S_lb1] * y - s[S_la1] * v + s[S_lz2];
    z2 = s[S_lb2] * y - s[S_la2] * v;
    if (fabs(z1) < SK_TINY && fabs(z2) < SK_TINY) {
        z1 = 0.0;
        z2 = 0.0;
    }
    s[S_lz1] = z1;
    s[S_lz2] = z2;
    double a = s[S_a_ms];
    double ms = a * s[S_ms] + (1.0 - a) * v * v;
    if (ms < SK_TINY)
        ms = 0.0;
    s[S_ms] = ms;
    return sqrt(2.0 * ms);
}

static double gain_curve(double level_db, const double *p)
{
    double d = level_db - p[P_threshold];
    double w = p[P_knee];
    double depth = p[P_depth];
    if (2.0 * d <= -w)
        return 0.0;
    if (2.0 * d >= w)
        return -depth;
    double t = (d + 0.5 * w) / w;
    return -depth * t * t * (3.0 - 2.0 * t);
}

void ld_port_stages(ld_stages *stages)
{
    stages->detector = detector;
    stages->gain_curve = gain_curve;
    stages->smoother = NULL; /* livedyn's built-in ballistics */
}

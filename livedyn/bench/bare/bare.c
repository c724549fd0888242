/*
 * Bare-C reference loops for the bench (livedyn/bench/bare.py): what a hand-written C loop of
 * only the features one configuration uses costs, in the precision it is built for.
 *
 * Three configurations, each written once in loops.h and compiled twice here, with float
 * state and the float libm functions (expf, logf, tanhf, ...) and with double state and the
 * double ones:
 *
 *   comp:     stereo feed-forward compressor: peak detector, channels linked by their larger
 *             level, level in dB, soft-knee curve [1] eq. (4), log-domain smooth branching
 *             ballistics [1] eq. (16), makeup, lookahead delay line, clip at the ceiling;
 *   comp_x:   the same with one tanh and one log more per sample in the curve (the bench's
 *             "costlier curve");
 *   limiter:  stereo linked lookahead limiter of livedyn/dsp/limiter.py without true peak and
 *             without hold: requirement, minimum over the lookahead (a monotonic queue),
 *             moving average over the attack, release one-pole on the gain in dB, last clamp;
 *   ducker:   stereo ducker with an external key of 1 or 2 channels: key high-pass [2],
 *             mean-square detector, linked by the larger level, the compressor curve bounded
 *             by -range, branching ballistics with hold, clip at the ceiling.
 *
 * The maths is the kernels' (livedyn/dsp/stages.py, dynamics.py, limiter.py), operation for
 * operation where a feature is used, so that the double loops agree with the float64 kernels
 * to rounding and the float loops with the float32 kernels to float rounding. What the loops
 * leave out: every feature the configuration does not use (other laws, detectors, topologies,
 * key filters, mix, parameter glides, delay crossfades, traces, counters); block-boundary work
 * (coefficients from the parameter array p) is done per block, as in the kernels. Settings are
 * read from the kernels' float64 parameter array p (slots P_* of the generated header) and are
 * taken as constant; bare_*_init refuses a configuration a loop does not cover (return < 0).
 *
 * Each configuration <cfg> exports, with <sfx> = f32 or f64 (e.g. bare_comp_block_f32):
 *   size_t  bare_<cfg>_size_<sfx>(void)                  bytes of its state
 *   int     bare_<cfg>_init_<sfx>(void *s, const double *p)   fresh state; < 0: not covered
 *   void    bare_<cfg>_block_<sfx>(void *s, const double *p, const float *x, const float *key,
 *                                  float *out, int64_t frames, int64_t key_ch)
 *   int64_t bare_<cfg>_drive_<sfx>(... as block ..., int64_t blocksize)  whole blocks, ns
 *   double  bare_<cfg>_gr_max_<sfx>(const void *s)       the last block's largest reduction, dB
 * x, out: float32 (frames x 2), C order; key: float32 (frames x key_ch) or ignored.
 *
 * Build: livedyn/bench/ctwin.py's build(), the C twin's flags (no fast math,
 * -ffp-contract=off), with the generated header ctwin_consts.h.
 *
 * References
 * ----------
 * [1] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design - A
 *     Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012.
 * [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients".
 */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stddef.h>
#include <stdint.h>
#include <string.h>
#include <time.h>

#include "ctwin_consts.h"

typedef int64_t i64;

/* Frames of the delay lines and queues: a power of two above the longest lookahead
 * (MAX_LOOKAHEAD_MS) at 384 kHz. */
#define BARE_RING 8192
#define BARE_MASK (BARE_RING - 1)

int64_t bare_now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000000 + ts.tv_nsec;
}

/* Block-boundary helpers, in double as the kernels compute them from p. */
static inline double bare_one_pole(double tau_ms, double fs)
{
    if (tau_ms <= 0.0)
        return 0.0;
    return exp(-1000.0 / (tau_ms * fs));
}

static inline i64 bare_frames_of(double ms, double fs) { return (i64)floor(ms * fs / 1000.0 + 0.5); }

#define REAL float
#define SFX(name) name##_f32
#define EXP expf
#define LOG logf
#define TANH tanhf
#define FABS fabsf
#include "loops.h"

#define REAL double
#define SFX(name) name##_f64
#define EXP exp
#define LOG log
#define TANH tanh
#define FABS fabs
#include "loops.h"

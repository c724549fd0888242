/*
 * livedyn reference in C: the built-in dynamics kernels (compressor, expander, gate, ducker,
 * and the lookahead limiter) as one standalone source, for checking a port against the golden
 * vectors that `livedyn port-kit` writes.
 *
 * Contract
 * --------
 * - No allocation: every buffer lives in ld_state, which the caller owns (static, stack or its
 *   own allocator). Its size is set at compile time by LD_MAX_SAMPLERATE (the lookahead delay
 *   line holds 20 ms at that rate) and LD_MAX_STATE (a user algorithm's state slots).
 * - float32 audio in and out, interleaved (frames x channels, C order); double state.
 * - ld_init() once, ld_set_param() for any parameter slot (values in the kernel's units: the
 *   manifest's "kernel_parameters" array), then ld_process() per block of any length.
 * - The same operations in the same order as livedyn's numba kernels (livedyn/dsp/dynamics.py,
 *   livedyn/dsp/limiter.py), so a build without fast math and with -ffp-contract=off
 *   reproduces livedyn's output and traces bit for bit (see the Makefile).
 *
 * A user algorithm file's stages (detector, gain curve, smoother) are C functions with the
 * signatures of ld_detector_fn, ld_curve_fn and ld_smoother_fn, set in ld_state.stages before
 * processing; their state is the user block of ld_state.st (see ld_user_state()).
 *
 * References
 * ----------
 * [1] D. Giannoulis, M. Massberg, J. D. Reiss, "Digital Dynamic Range Compressor Design - A
 *     Tutorial and Analysis", J. Audio Eng. Soc. 60(6), 2012.
 * [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter coefficients".
 * [3] ITU-R BS.1770-4 (10/2015), Annex 2 (true peak).
 */
#ifndef LIVEDYN_REF_H
#define LIVEDYN_REF_H

#include <stddef.h>
#include <stdint.h>

#include "livedyn_consts.h"

#ifndef LD_MAX_SAMPLERATE
#define LD_MAX_SAMPLERATE 192000
#endif
#ifndef LD_MAX_STATE
#define LD_MAX_STATE 64
#endif
#define LD_MAX_CHANNELS 8
#define LD_NCOLS 12 /* state columns: max(channels, key channels, 12) with at most 8 channels */
/* delay-line rows: ceil(20 ms * fs) + true-peak delay + spread + 8, as livedyn.Processor */
#define LD_RING_ROWS_FOR(fs) \
    ((int64_t)(((fs) * LD_MAX_LOOKAHEAD_MS_INT + 999) / 1000) + LIM_TP_DELAY + LIM_TP_SPREAD + 8)
#define LD_MAX_RING_ROWS LD_RING_ROWS_FOR(LD_MAX_SAMPLERATE)

typedef double (*ld_detector_fn)(double k, const double *p, double *s);
typedef double (*ld_curve_fn)(double level_db, const double *p);
typedef double (*ld_smoother_fn)(double gain_db, const double *p, double *s);

typedef struct {
    ld_detector_fn detector; /* NULL: the built-in peak / rms measure */
    ld_curve_fn gain_curve;  /* used when p[P_LAW] == LAW_USER */
    ld_smoother_fn smoother; /* NULL: the built-in ballistics */
} ld_stages;

typedef struct {
    int kind;         /* LD_KIND_DYNAMICS or LD_KIND_LIMITER */
    int64_t channels; /* main channels, 1..8 */
    int64_t key_channels; /* external key channels, 0..8 (0: the key is the main input) */
    int64_t nstate;   /* a user algorithm's state slots per channel (0 for the built-ins) */
    int64_t ring_rows;
    double p[NPARAM];
    double st[(NROWS + 2 * LD_MAX_STATE) * LD_NCOLS];
    double ring[LD_MAX_RING_ROWS * RING_COLS_PER_CHANNEL * LD_MAX_CHANNELS];
    ld_stages stages;
} ld_state;

#define LD_KIND_DYNAMICS 0
#define LD_KIND_LIMITER 1

/* Set up for a sample rate and channel layout; every parameter at 0 but the sample rate.
 * Returns 0, or -1 when a size is outside the compiled limits. */
int ld_init(ld_state *s, int kind, double samplerate, int64_t channels, int64_t key_channels,
            int64_t nstate);
/* Forget all signal history (parameters stay). */
void ld_reset(ld_state *s);
/* Write one slot of the parameter array (takes effect at the next block). */
void ld_set_param(ld_state *s, int slot, double value);
/* Delay of the main path in samples for the current parameters. */
int64_t ld_latency(const ld_state *s);
/* One block: in (frames x channels), key (frames x key_channels, or NULL for the main input),
 * out (frames x channels). */
void ld_process(ld_state *s, const float *in, const float *key, float *out, int64_t frames);
/* The same, also writing every stage's trace into tr: NTRACE x frames x LD_NCOLS doubles
 * (rows T_KEY, T_LEVEL, T_CURVE, T_GAIN, T_TOTAL of livedyn/dsp/layout.py). */
void ld_process_traced(ld_state *s, const float *in, const float *key, float *out,
                       int64_t frames, double *tr);
/* A user stage's state: the detector's of key channel j (which = 0) or the smoother's of gain
 * channel j (which = 1); nstate doubles. */
double *ld_user_state(ld_state *s, int which, int64_t j);

#endif

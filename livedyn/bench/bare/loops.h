/*
 * The bare loops, written once for the precision REAL (float or double); bare.c includes this
 * file once per precision with REAL, SFX(name), EXP, LOG, TANH and FABS defined, and it
 * undefines them at its end. See bare.c for what each loop covers.
 */

#define RL(v) ((REAL)(v))

static inline REAL SFX(bare_flush)(REAL v)
{
    if (-RL(TINY) < v && v < RL(TINY))
        return RL(0.0);
    return v;
}

/* Frame n of the stereo input x into row (non-finite samples replaced by 0, as the kernels do). */
static inline void SFX(bare_take)(const float *x, i64 n, REAL *row)
{
    for (int c = 0; c < 2; c++) {
        REAL v = RL(x[2 * n + c]);
        row[c] = isfinite(v) ? v : RL(0.0);
    }
}

/* Soft-knee compressor curve [1] eq. (4) as gain in dB (knee > 0: init checks). */
static inline REAL SFX(bare_curve)(REAL x_db, REAL thr, REAL slope, REAL knee)
{
    REAL d = x_db - thr;
    if (RL(2.0) * d < -knee)
        return RL(0.0);
    if (RL(2.0) * d <= knee) {
        REAL e = d + RL(0.5) * knee;
        return -slope * e * e / (RL(2.0) * knee);
    }
    return -slope * d;
}

/* Smooth branching [1] eq. (16) on the gain in dB (attack toward more attenuation), flushed. */
static inline REAL SFX(bare_branch)(REAL y, REAL gc, REAL a_att, REAL a_rel)
{
    if (gc < y)
        y = a_att * y + (RL(1.0) - a_att) * gc;
    else
        y = a_rel * y + (RL(1.0) - a_rel) * gc;
    return SFX(bare_flush)(y);
}

/* ---- compressor (and its costlier-curve copy) ------------------------------------------ */

typedef struct {
    REAL y;       /* smoothed gain, dB */
    REAL gr_max;  /* largest reduction of the last block, dB */
    i64 w;        /* write position of the delay line */
    REAL ring[BARE_RING][2];
} SFX(bare_comp_state);

static int SFX(bare_comp_init_)(void *sv, const double *p)
{
    SFX(bare_comp_state) *s = sv;
    memset(s, 0, sizeof *s);
    if (!(p[P_KNEE] > 0.0) || !(p[P_RATIO] >= 1.0) || p[P_HOLD] != 0.0)
        return -1; /* the loop is soft knee, ratio >= 1, no hold */
    if (bare_frames_of(p[P_LOOKAHEAD], p[P_SAMPLERATE]) >= BARE_RING)
        return -2;
    return 0;
}

static inline void SFX(bare_comp_run)(void *sv, const double *p, const float *x, float *out,
                                      i64 frames, int costly)
{
    SFX(bare_comp_state) *s = sv;
    const double fs = p[P_SAMPLERATE];
    const REAL a_att = RL(bare_one_pole(p[P_ATTACK], fs));
    const REAL a_rel = RL(bare_one_pole(p[P_RELEASE], fs));
    const REAL thr = RL(p[P_THRESHOLD]);
    const REAL slope = RL(1.0 - 1.0 / p[P_RATIO]);
    const REAL knee = RL(p[P_KNEE]);
    const REAL mk = RL(p[P_MAKEUP]);
    const REAL ceil_lin = RL(exp(LN10_OVER_20 * p[P_CEILING]));
    const i64 d = bare_frames_of(p[P_LOOKAHEAD], fs);
    REAL y = s->y, gr = RL(0.0);
    i64 w = s->w;
    for (i64 n = 0; n < frames; n++) {
        SFX(bare_take)(x, n, s->ring[w]);
        REAL a0 = FABS(s->ring[w][0]), a1 = FABS(s->ring[w][1]);
        REAL lv = a1 > a0 ? a1 : a0;
        REAL x_db = lv <= RL(LEVEL_FLOOR_AMP) ? RL(LEVEL_FLOOR_DB)
                                              : RL(DB_PER_NEPER_AMP) * LOG(lv);
        REAL gc = SFX(bare_curve)(x_db, thr, slope, knee);
        if (costly) /* the costlier curve: one tanh and one log more per sample */
            gc = gc - RL(1e-6) * LOG(RL(2.0) + TANH(x_db * RL(0.05)));
        y = SFX(bare_branch)(y, gc, a_att, a_rel);
        if (-y > gr)
            gr = -y;
        REAL g = EXP(RL(LN10_OVER_20) * (y + mk));
        i64 r = (w - d) & BARE_MASK;
        for (int c = 0; c < 2; c++) {
            REAL o = s->ring[r][c] * g;
            if (o > ceil_lin)
                o = ceil_lin;
            else if (o < -ceil_lin)
                o = -ceil_lin;
            out[2 * n + c] = (float)o;
        }
        w = (w + 1) & BARE_MASK;
    }
    s->y = y;
    s->w = w;
    s->gr_max = gr;
}

size_t SFX(bare_comp_size)(void) { return sizeof(SFX(bare_comp_state)); }
size_t SFX(bare_comp_x_size)(void) { return sizeof(SFX(bare_comp_state)); }
int SFX(bare_comp_init)(void *s, const double *p) { return SFX(bare_comp_init_)(s, p); }
int SFX(bare_comp_x_init)(void *s, const double *p) { return SFX(bare_comp_init_)(s, p); }

void SFX(bare_comp_block)(void *s, const double *p, const float *x, const float *key, float *out,
                          i64 frames, i64 key_ch)
{
    (void)key, (void)key_ch;
    SFX(bare_comp_run)(s, p, x, out, frames, 0);
}

void SFX(bare_comp_x_block)(void *s, const double *p, const float *x, const float *key,
                            float *out, i64 frames, i64 key_ch)
{
    (void)key, (void)key_ch;
    SFX(bare_comp_run)(s, p, x, out, frames, 1);
}

double SFX(bare_comp_gr_max)(const void *s) { return ((const SFX(bare_comp_state) *)s)->gr_max; }
double SFX(bare_comp_x_gr_max)(const void *s) { return SFX(bare_comp_gr_max)(s); }

/* ---- limiter ----------------------------------------------------------------------------- */

typedef struct {
    REAL g;        /* gain of the last sample (linear) */
    REAL box;      /* running sum of the moving average */
    REAL gr_max;
    i64 w, t;      /* write position, frames since reset */
    i64 head, len; /* the monotonic queue: values increase from head to tail */
    REAL q_val[BARE_RING];
    i64 q_idx[BARE_RING];
    REAL m[BARE_RING];    /* minimum over the window, per frame */
    REAL req[BARE_RING];  /* linked requirement, per frame */
    REAL ring[BARE_RING][2];
} SFX(bare_limiter_state);

size_t SFX(bare_limiter_size)(void) { return sizeof(SFX(bare_limiter_state)); }

int SFX(bare_limiter_init)(void *sv, const double *p)
{
    SFX(bare_limiter_state) *s = sv;
    memset(s, 0, sizeof *s);
    if (p[P_TRUE_PEAK] > 0.5 || p[P_HOLD] != 0.0 || (int)p[P_LINK] == LINK_NONE)
        return -1; /* the loop is sample peak, no hold, linked */
    i64 look = bare_frames_of(p[P_LOOKAHEAD], p[P_SAMPLERATE]);
    i64 att = bare_frames_of(p[P_ATTACK], p[P_SAMPLERATE]);
    if (att > look)
        att = look;
    if (look + 2 >= BARE_RING)
        return -2;
    s->g = RL(1.0);
    s->box = RL(att + 1.0);
    for (i64 i = 0; i < BARE_RING; i++)
        s->m[i] = s->req[i] = RL(1.0);
    return 0;
}

void SFX(bare_limiter_block)(void *sv, const double *p, const float *x, const float *key,
                             float *out, i64 frames, i64 key_ch)
{
    (void)key, (void)key_ch;
    SFX(bare_limiter_state) *s = sv;
    const double fs = p[P_SAMPLERATE];
    const i64 look = bare_frames_of(p[P_LOOKAHEAD], fs);
    i64 att = bare_frames_of(p[P_ATTACK], fs);
    if (att > look)
        att = look;
    const REAL a_rel = RL(bare_one_pole(p[P_RELEASE], fs));
    const REAL ceil_lin = RL(exp(LN10_OVER_20 * p[P_CEILING]));
    const REAL n_box = RL(att + 1.0);
    REAL g = s->g, box = s->box, g_min = RL(1.0);
    i64 w = s->w, t = s->t, head = s->head, len = s->len;
    for (i64 n = 0; n < frames; n++, t++) {
        SFX(bare_take)(x, n, s->ring[w]);
        REAL a0 = FABS(s->ring[w][0]), a1 = FABS(s->ring[w][1]);
        REAL r0 = a0 > ceil_lin ? ceil_lin / a0 : RL(1.0);
        REAL r1 = a1 > ceil_lin ? ceil_lin / a1 : RL(1.0);
        REAL r = r1 < r0 ? r1 : r0;
        s->req[w] = r;
        /* 1. minimum over the last look + 1 requirements */
        while (len > 0 && s->q_val[(head + len - 1) & BARE_MASK] >= r)
            len--;
        s->q_val[(head + len) & BARE_MASK] = r;
        s->q_idx[(head + len) & BARE_MASK] = t;
        len++;
        while (s->q_idx[head] < t - look) {
            head = (head + 1) & BARE_MASK;
            len--;
        }
        REAL m = s->q_val[head];
        /* 2. moving average over att + 1 values of m, re-summed every SUM_REFRESH frames */
        REAL oldest = s->m[(w - att - 1) & BARE_MASK];
        s->m[w] = m;
        if (t % SUM_REFRESH == 0) {
            box = RL(0.0);
            for (i64 i = 0; i <= att; i++)
                box += s->m[(w - i) & BARE_MASK];
        } else {
            box = box + m - oldest;
        }
        REAL b = att == 0 ? m : box / n_box;
        /* 3. release on the gain in dB, never above b; then the last clamp */
        REAL gn;
        if (b < g)
            gn = b;
        else {
            gn = EXP(a_rel * LOG(g) + (RL(1.0) - a_rel) * LOG(b));
            if (gn > b)
                gn = b;
        }
        i64 i = (w - look) & BARE_MASK;
        if (gn > s->req[i])
            gn = s->req[i];
        g = gn;
        if (g < g_min)
            g_min = g;
        out[2 * n] = (float)(s->ring[i][0] * g);
        out[2 * n + 1] = (float)(s->ring[i][1] * g);
        w = (w + 1) & BARE_MASK;
    }
    s->g = g, s->box = box, s->w = w, s->t = t, s->head = head, s->len = len;
    /* the meter: one level conversion per block (of the smallest gain) */
    s->gr_max = g_min <= RL(LEVEL_FLOOR_AMP) ? RL(-LEVEL_FLOOR_DB)
                                             : -(RL(DB_PER_NEPER_AMP) * LOG(g_min));
}

double SFX(bare_limiter_gr_max)(const void *s)
{
    return ((const SFX(bare_limiter_state) *)s)->gr_max;
}

/* ---- ducker ------------------------------------------------------------------------------ */

typedef struct {
    REAL y, hold, gr_max;
    REAL ms[2], z1[2], z2[2]; /* per key channel: mean square, high-pass state */
} SFX(bare_ducker_state);

size_t SFX(bare_ducker_size)(void) { return sizeof(SFX(bare_ducker_state)); }

int SFX(bare_ducker_init)(void *sv, const double *p)
{
    SFX(bare_ducker_state) *s = sv;
    memset(s, 0, sizeof *s);
    if (!(p[P_KNEE] > 0.0) || !(p[P_KEY_HPF] > 0.0) || p[P_KEY_LPF] > 0.0 || p[P_KEY_BPF] > 0.0
        || p[P_LOOKAHEAD] != 0.0 || (int)p[P_LINK] != LINK_MAX)
        return -1; /* soft knee, high-pass only, no lookahead, max link */
    return 0;
}

void SFX(bare_ducker_block)(void *sv, const double *p, const float *x, const float *key,
                            float *out, i64 frames, i64 key_ch)
{
    SFX(bare_ducker_state) *s = sv;
    const double fs = p[P_SAMPLERATE];
    const REAL a_att = RL(bare_one_pole(p[P_ATTACK], fs));
    const REAL a_rel = RL(bare_one_pole(p[P_RELEASE], fs));
    const REAL a_rms = RL(bare_one_pole(p[P_RMS_TIME], fs));
    const REAL hold_n = RL(floor(p[P_HOLD] * fs / 1000.0 + 0.5));
    const REAL thr = RL(p[P_THRESHOLD]);
    const REAL slope = RL(p[P_RATIO] >= 1.0 ? 1.0 - 1.0 / p[P_RATIO] : 0.0);
    const REAL knee = RL(p[P_KNEE]);
    const REAL range = RL(p[P_RANGE]);
    const REAL mk = RL(p[P_MAKEUP]);
    const REAL ceil_lin = RL(exp(LN10_OVER_20 * p[P_CEILING]));
    /* key high-pass, Audio EQ Cookbook [2], a0 normalised to 1 */
    const double w0 = 2.0 * MATH_PI * p[P_KEY_HPF] / fs;
    const double cw = cos(w0), alpha = sin(w0) / (2.0 * BUTTERWORTH_Q), a0 = 1.0 + alpha;
    const REAL b0 = RL((1.0 + cw) * 0.5 / a0), b1 = RL(-(1.0 + cw) / a0);
    const REAL b2 = RL((1.0 + cw) * 0.5 / a0), a1 = RL(-2.0 * cw / a0), a2 = RL((1.0 - alpha) / a0);
    const i64 nk = key_ch < 2 ? 1 : 2;
    REAL y = s->y, hold = s->hold, gr = RL(0.0);
    for (i64 n = 0; n < frames; n++) {
        REAL lv = RL(0.0);
        for (i64 j = 0; j < nk; j++) {
            REAL k = RL(key[n * key_ch + j]);
            if (!isfinite(k))
                k = RL(0.0);
            REAL f = b0 * k + s->z1[j];
            s->z1[j] = SFX(bare_flush)(b1 * k - a1 * f + s->z2[j]);
            s->z2[j] = SFX(bare_flush)(b2 * k - a2 * f);
            REAL ms = SFX(bare_flush)(a_rms * s->ms[j] + (RL(1.0) - a_rms) * f * f);
            s->ms[j] = ms;
            if (j == 0 || ms > lv)
                lv = ms;
        }
        REAL pw = RL(2.0) * lv;
        REAL x_db = pw <= RL(LEVEL_FLOOR_POW) ? RL(LEVEL_FLOOR_DB) : RL(DB_PER_NEPER_POW) * LOG(pw);
        REAL gc = SFX(bare_curve)(x_db, thr, slope, knee);
        if (gc < -range)
            gc = -range;
        if (gc > y && hold > RL(0.0))
            hold -= RL(1.0); /* hold delays release; y is already flushed */
        else {
            if (gc <= y)
                hold = hold_n;
            y = SFX(bare_branch)(y, gc, a_att, a_rel);
        }
        if (-y > gr)
            gr = -y;
        REAL g = EXP(RL(LN10_OVER_20) * (y + mk));
        REAL v[2];
        SFX(bare_take)(x, n, v);
        for (int c = 0; c < 2; c++) {
            REAL o = v[c] * g;
            if (o > ceil_lin)
                o = ceil_lin;
            else if (o < -ceil_lin)
                o = -ceil_lin;
            out[2 * n + c] = (float)o;
        }
    }
    s->y = y, s->hold = hold, s->gr_max = gr;
}

double SFX(bare_ducker_gr_max)(const void *s) { return ((const SFX(bare_ducker_state) *)s)->gr_max; }

/* ---- drivers: consecutive whole blocks over a preallocated signal; elapsed ns ------------ */

#define BARE_DRIVE(cfg)                                                                      \
    int64_t SFX(bare_##cfg##_drive)(void *s, const double *p, const float *x, const float *key, \
                                    float *out, i64 frames, i64 key_ch, i64 blocksize)       \
    {                                                                                        \
        i64 n = frames - frames % blocksize;                                                 \
        int64_t t0 = bare_now_ns();                                                          \
        for (i64 i = 0; i < n; i += blocksize)                                               \
            SFX(bare_##cfg##_block)(s, p, x + 2 * i, key + i * key_ch, out + 2 * i,          \
                                    blocksize, key_ch);                                      \
        return bare_now_ns() - t0;                                                           \
    }
BARE_DRIVE(comp)
BARE_DRIVE(comp_x)
BARE_DRIVE(limiter)
BARE_DRIVE(ducker)
#undef BARE_DRIVE

#undef RL
#undef REAL
#undef SFX
#undef EXP
#undef LOG
#undef TANH
#undef FABS

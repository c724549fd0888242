/*
 * ld_runner: runs the C reference (livedyn_ref.c, with the stages in stages.c) over the golden
 * vectors that `livedyn port-kit` wrote, block by block at each block size of the kit, and
 * reports the largest and the rms error of every stage against them, with a pass or fail per
 * stage against the manifest's tolerance.
 *
 *     ld_runner KIT_FOLDER [--exact]
 *
 * --exact: pass only when every stage is bit-identical (as float32) to the vectors.
 * Exit code 0 when every stage passes, 1 when one fails, 2 when the folder cannot be read.
 *
 * The folder holds vectors.txt (what this program reads: one item a line, numbers as C99
 * hexadecimal floats, so that every parameter value is exact) and one folder per block size
 * with raw little-endian float32 files, frames x width interleaved.
 */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "livedyn_ref.h"

void ld_port_stages(ld_stages *stages); /* stages.c */

#define MAX_STAGES 8
#define MAX_BLOCKS 8

typedef struct {
    char name[64];
    int row; /* trace row, or -1 for the output */
    int64_t width;
    int is_db;
    double tol_max;
    double tol_rms;
    float *want;
    double err_max, err_sq;
    int64_t count;
} stage;

static ld_state S; /* the reference's state: caller-owned, here static */

static void die(const char *what, const char *detail)
{
    fprintf(stderr, "ld_runner: error: %s%s%s\n", what, detail ? ": " : "", detail ? detail : "");
    exit(2);
}

static float *read_f32(const char *dir, const char *name, int64_t count)
{
    char path[4096];
    snprintf(path, sizeof path, "%s/%s.f32", dir, name);
    FILE *f = fopen(path, "rb");
    if (!f)
        die("cannot open", path);
    float *buf = malloc(sizeof(float) * (size_t)(count ? count : 1));
    if (!buf)
        die("out of memory reading", path);
    size_t got = fread(buf, sizeof(float), (size_t)count, f);
    fclose(f);
    if ((int64_t)got != count)
        die("short file (expected frames x width float32 values)", path);
    return buf;
}

int main(int argc, char **argv)
{
    if (argc < 2 || argc > 3 || (argc == 3 && strcmp(argv[2], "--exact") != 0)) {
        fprintf(stderr, "usage: ld_runner KIT_FOLDER [--exact]\n");
        return 2;
    }
    const char *kit = argv[1];
    int exact = argc == 3;
    char path[4096];
    snprintf(path, sizeof path, "%s/vectors.txt", kit);
    FILE *f = fopen(path, "r");
    if (!f)
        die("cannot open", path);

    int kind = 0;
    double fs = 0.0, params[NPARAM] = {0};
    int64_t ch = 0, kch = 0, nstate = 0, frames = 0;
    int64_t blocks[MAX_BLOCKS];
    int nblocks = 0, nstages = 0;
    double db_floor = -120.0;
    stage stages[MAX_STAGES];
    char line[1024], key[64];
    while (fgets(line, sizeof line, f)) {
        if (line[0] == '#' || line[0] == '\n')
            continue;
        if (sscanf(line, "%63s", key) != 1)
            continue;
        char *rest = line + strlen(key);
        if (!strcmp(key, "kind"))
            kind = atoi(rest);
        else if (!strcmp(key, "samplerate"))
            fs = strtod(rest, NULL);
        else if (!strcmp(key, "channels"))
            ch = atoll(rest);
        else if (!strcmp(key, "key_channels"))
            kch = atoll(rest);
        else if (!strcmp(key, "nstate"))
            nstate = atoll(rest);
        else if (!strcmp(key, "frames"))
            frames = atoll(rest);
        else if (!strcmp(key, "db_floor"))
            db_floor = strtod(rest, NULL);
        else if (!strcmp(key, "param")) {
            char *end;
            long slot = strtol(rest, &end, 10);
            if (slot < 0 || slot >= NPARAM)
                die("parameter slot out of range in", path);
            params[slot] = strtod(end, NULL);
        } else if (!strcmp(key, "block")) {
            if (nblocks == MAX_BLOCKS)
                die("too many block sizes in", path);
            blocks[nblocks++] = atoll(rest);
        } else if (!strcmp(key, "stage")) {
            if (nstages == MAX_STAGES)
                die("too many stages in", path);
            stage *s = &stages[nstages++];
            memset(s, 0, sizeof *s);
            char tol1[64], tol2[64];
            if (sscanf(rest, "%63s %d %lld %d %63s %63s", s->name, &s->row,
                       (long long *)&s->width, &s->is_db, tol1, tol2) != 6)
                die("bad stage line in", path);
            s->tol_max = strtod(tol1, NULL);
            s->tol_rms = strtod(tol2, NULL);
        }
    }
    fclose(f);
    if (fs <= 0.0 || ch < 1 || frames < 1 || nblocks == 0 || nstages == 0)
        die("incomplete vectors.txt (samplerate, channels, frames, block, stage)", path);

    int all_pass = 1;
    for (int b = 0; b < nblocks; b++) {
        int64_t bs = blocks[b];
        char dir[4096];
        snprintf(dir, sizeof dir, "%s/block-%lld", kit, (long long)bs);
        if (ld_init(&S, kind, fs, ch, kch, nstate) != 0)
            die("sizes outside the compiled limits (LD_MAX_SAMPLERATE, LD_MAX_STATE)", dir);
        for (int i = 0; i < NPARAM; i++)
            if (i != P_SAMPLERATE)
                ld_set_param(&S, i, params[i]);
        ld_port_stages(&S.stages);
        float *in = read_f32(dir, "main", frames * ch);
        float *k = kch ? read_f32(dir, "key", frames * kch) : NULL;
        float *out = malloc(sizeof(float) * (size_t)(bs * ch));
        double *tr = malloc(sizeof(double) * (size_t)(NTRACE * bs * LD_NCOLS));
        if (!out || !tr)
            die("out of memory", NULL);
        for (int i = 0; i < nstages; i++) {
            stages[i].want = read_f32(dir, stages[i].name, frames * stages[i].width);
            stages[i].err_max = stages[i].err_sq = 0.0;
            stages[i].count = 0;
        }
        for (int64_t pos = 0; pos < frames; pos += bs) {
            int64_t n = frames - pos < bs ? frames - pos : bs;
            ld_process_traced(&S, in + pos * ch, k ? k + pos * kch : NULL, out, n, tr);
            for (int i = 0; i < nstages; i++) {
                stage *s = &stages[i];
                for (int64_t t = 0; t < n; t++) {
                    for (int64_t j = 0; j < s->width; j++) {
                        float got = s->row < 0 ? out[t * ch + j]
                                               : (float)tr[((int64_t)s->row * n + t) * LD_NCOLS + j];
                        float want = s->want[(pos + t) * s->width + j];
                        double e;
                        if (exact) {
                            e = (got == want || (isnan(got) && isnan(want))) ? 0.0
                                : fabs((double)got - (double)want);
                            if (e == 0.0 && got != want)
                                e = INFINITY;
                        } else {
                            double g = got, w = want;
                            if (s->is_db) {
                                g = g < db_floor ? db_floor : g;
                                w = w < db_floor ? db_floor : w;
                            }
                            e = fabs(g - w);
                        }
                        if (!(e <= s->err_max))
                            s->err_max = e;
                        s->err_sq += e * e;
                        s->count++;
                    }
                }
            }
        }
        printf("block size %lld (%lld frames, %lld ch, key %lld ch, %g Hz)%s\n", (long long)bs,
               (long long)frames, (long long)ch, (long long)kch, fs,
               exact ? ", bit-exact check" : "");
        printf("  %-16s %14s %14s %12s %12s  %s\n", "stage", "max error", "rms error",
               "tol max", "tol rms", "verdict");
        for (int i = 0; i < nstages; i++) {
            stage *s = &stages[i];
            double rms = s->count ? sqrt(s->err_sq / (double)s->count) : 0.0;
            int pass = exact ? s->err_max == 0.0 : (s->err_max <= s->tol_max && rms <= s->tol_rms);
            all_pass &= pass;
            printf("  %-16s %14.6g %14.6g %12.3g %12.3g  %s%s\n", s->name, s->err_max, rms,
                   s->tol_max, s->tol_rms, pass ? "pass" : "FAIL",
                   s->is_db ? " (dB)" : "");
            free(s->want);
        }
        free(in);
        free(k);
        free(out);
        free(tr);
    }
    printf("%s\n", all_pass ? "PASS: every stage within its tolerance"
                            : "FAIL: a stage is outside its tolerance");
    return all_pass ? 0 : 1;
}

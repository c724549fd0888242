/* A plain-C PortAudio client that only copies its input to its output, and counts late and
 * flagged blocks by livedyn's own rule (livedyn/engine/callback.py): a block is late when it
 * starts more than 1.5 periods after the previous one (unless that one overran) or when its own
 * time passes the period; flagged when PortAudio passes non-zero status flags.
 *
 * PortAudio is opened with dlopen, and the few declarations it needs are written here (the
 * development headers may be missing); they follow portaudio.h of PortAudio v19, as
 * sounddevice's own declarations of the same library do.
 *
 * usage: copy_client LIBPORTAUDIO DEVICE_NAME SAMPLERATE BLOCKSIZE CHANNELS SECONDS
 * prints: blocks=N late=N flagged=N hostapi=NAME
 */
#define _GNU_SOURCE
#include <dlfcn.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

typedef int PaError;
typedef void PaStream;
typedef struct {
    int device;
    int channelCount;
    unsigned long sampleFormat;
    double suggestedLatency;
    void *hostApiSpecificStreamInfo;
} PaStreamParameters;
typedef struct {
    int structVersion;
    const char *name;
    int hostApi;
    int maxInputChannels;
    int maxOutputChannels;
    double defaultLowInputLatency;
    double defaultLowOutputLatency;
    double defaultHighInputLatency;
    double defaultHighOutputLatency;
    double defaultSampleRate;
} PaDeviceInfo;
typedef struct {
    int structVersion;
    int type;
    const char *name;
    int deviceCount;
    int defaultInputDevice;
    int defaultOutputDevice;
} PaHostApiInfo;
typedef int PaStreamCallback(const void *, void *, unsigned long, const void *, unsigned long,
                             void *);
#define paFloat32 ((unsigned long)1)

static int64_t period_ns, t_last, blocks, late, flagged, last_over;
static int channels;

static int64_t now_ns(void) {
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000000LL + ts.tv_nsec;
}

static int copy(const void *in, void *out, unsigned long frames, const void *ti,
                unsigned long status, void *user) {
    (void)ti;
    (void)user;
    int64_t t0 = now_ns();
    int started_late = 0;
    if (blocks > 0) {
        int64_t iv = t0 - t_last;
        started_late = 2 * iv > 3 * period_ns && last_over == 0;
        if (started_late)
            late++;
    }
    t_last = t0;
    if (status != 0)
        flagged++;
    size_t n = (size_t)frames * (size_t)channels;
    if (in)
        memcpy(out, in, n * sizeof(float));
    else
        memset(out, 0, n * sizeof(float));
    blocks++;
    int64_t el = now_ns() - t0;
    int over = el > period_ns;
    if (over && !started_late)
        late++;
    last_over = over;
    return 0;
}

#define SYM(name) name##_t name = (name##_t)dlsym(h, #name); if (!name) { \
    fprintf(stderr, "missing %s\n", #name); return 2; }

typedef PaError (*Pa_Initialize_t)(void);
typedef PaError (*Pa_Terminate_t)(void);
typedef int (*Pa_GetDeviceCount_t)(void);
typedef const PaDeviceInfo *(*Pa_GetDeviceInfo_t)(int);
typedef const PaHostApiInfo *(*Pa_GetHostApiInfo_t)(int);
typedef PaError (*Pa_OpenStream_t)(PaStream **, const PaStreamParameters *,
                                   const PaStreamParameters *, double, unsigned long,
                                   unsigned long, PaStreamCallback *, void *);
typedef PaError (*Pa_StartStream_t)(PaStream *);
typedef PaError (*Pa_StopStream_t)(PaStream *);
typedef PaError (*Pa_CloseStream_t)(PaStream *);
typedef const char *(*Pa_GetErrorText_t)(PaError);

int main(int argc, char **argv) {
    if (argc != 7) {
        fprintf(stderr, "usage: %s LIB DEVICE RATE BLOCK CHANNELS SECONDS\n", argv[0]);
        return 2;
    }
    void *h = dlopen(argv[1], RTLD_NOW);
    if (!h) {
        fprintf(stderr, "dlopen %s: %s\n", argv[1], dlerror());
        return 2;
    }
    SYM(Pa_Initialize) SYM(Pa_Terminate) SYM(Pa_GetDeviceCount) SYM(Pa_GetDeviceInfo)
    SYM(Pa_GetHostApiInfo) SYM(Pa_OpenStream) SYM(Pa_StartStream) SYM(Pa_StopStream)
    SYM(Pa_CloseStream) SYM(Pa_GetErrorText)
    double rate = atof(argv[3]);
    unsigned long block = strtoul(argv[4], NULL, 10);
    channels = atoi(argv[5]);
    double seconds = atof(argv[6]);
    period_ns = (int64_t)(1e9 * (double)block / rate + 0.5);
    PaError e = Pa_Initialize();
    if (e) {
        fprintf(stderr, "Pa_Initialize: %s\n", Pa_GetErrorText(e));
        return 2;
    }
    int dev = -1, n = Pa_GetDeviceCount();
    for (int i = 0; i < n; i++) {
        const PaDeviceInfo *d = Pa_GetDeviceInfo(i);
        if (d && strcmp(d->name, argv[2]) == 0 && d->maxInputChannels >= channels &&
            d->maxOutputChannels >= channels) {
            dev = i;
            break;
        }
    }
    if (dev < 0) {
        fprintf(stderr, "no device named %s with %d channels\n", argv[2], channels);
        Pa_Terminate();
        return 2;
    }
    const PaDeviceInfo *d = Pa_GetDeviceInfo(dev);
    PaStreamParameters ip = {dev, channels, paFloat32, d->defaultLowInputLatency, NULL};
    PaStreamParameters op = {dev, channels, paFloat32, d->defaultLowOutputLatency, NULL};
    PaStream *s = NULL;
    e = Pa_OpenStream(&s, &ip, &op, rate, block, 0, copy, NULL);
    if (e) {
        fprintf(stderr, "Pa_OpenStream: %s\n", Pa_GetErrorText(e));
        Pa_Terminate();
        return 2;
    }
    e = Pa_StartStream(s);
    if (e) {
        fprintf(stderr, "Pa_StartStream: %s\n", Pa_GetErrorText(e));
        Pa_Terminate();
        return 2;
    }
    struct timespec ts = {(time_t)seconds, (long)((seconds - (time_t)seconds) * 1e9)};
    while (nanosleep(&ts, &ts) != 0) {
    }
    Pa_StopStream(s);
    Pa_CloseStream(s);
    printf("blocks=%lld late=%lld flagged=%lld hostapi=%s\n", (long long)blocks,
           (long long)late, (long long)flagged, Pa_GetHostApiInfo(d->hostApi)->name);
    Pa_Terminate();
    return 0;
}

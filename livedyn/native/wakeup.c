/* Wake-up lateness of a thread woken every period: the readiness check's measurement.
 *
 * ld_wakeup() starts one thread (SCHED_FIFO at the priority asked for, or the default policy
 * when that is refused), which sleeps to absolute deadlines t0 + k * period with
 * clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME) and records, for every wake-up, how long
 * after its deadline it woke (ns). POSIX.1-2008: clock_nanosleep, pthread_attr_setschedpolicy,
 * pthread_attr_setinheritsched.
 *
 * Built by livedyn on demand with the system C compiler into the user's cache folder.
 */
#define _GNU_SOURCE
#include <errno.h>
#include <pthread.h>
#include <sched.h>
#include <stdint.h>
#include <string.h>
#include <time.h>

struct job {
    int64_t period_ns;
    int64_t duration_ns;
    int64_t *late_ns; /* room for capacity values */
    int64_t capacity;
    int64_t count;    /* wake-ups recorded */
    int policy;       /* what the thread ran with */
    int priority;
};

static int64_t now_ns(void) {
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000000LL + ts.tv_nsec;
}

static void *run(void *arg) {
    struct job *j = (struct job *)arg;
    struct sched_param sp;
    int pol = 0;
    pthread_getschedparam(pthread_self(), &pol, &sp);
    j->policy = pol;
    j->priority = sp.sched_priority;
    int64_t start = now_ns() + j->period_ns;
    int64_t end = start + j->duration_ns;
    int64_t next = start;
    int64_t n = 0;
    while (next < end && n < j->capacity) {
        struct timespec ts;
        ts.tv_sec = (time_t)(next / 1000000000LL);
        ts.tv_nsec = (long)(next % 1000000000LL);
        while (clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME, &ts, NULL) == EINTR) {
        }
        int64_t late = now_ns() - next;
        j->late_ns[n++] = late; /* >= 0: TIMER_ABSTIME never wakes early */
        next += j->period_ns;
    }
    j->count = n;
    return NULL;
}

/* Returns 0, or the pthread error of the plain (non-real-time) attempt. out[0] = count,
 * out[1] = policy, out[2] = priority, out[3] = the real-time attempt's error (0 if granted). */
int ld_wakeup(int64_t period_ns, int64_t duration_ns, int priority, int64_t *late_ns,
              int64_t capacity, int64_t *out) {
    struct job j;
    memset(&j, 0, sizeof j);
    j.period_ns = period_ns;
    j.duration_ns = duration_ns;
    j.late_ns = late_ns;
    j.capacity = capacity;
    pthread_t t;
    pthread_attr_t a;
    int rt_err = EPERM;
    if (priority > 0) {
        struct sched_param sp;
        memset(&sp, 0, sizeof sp);
        sp.sched_priority = priority;
        pthread_attr_init(&a);
        pthread_attr_setinheritsched(&a, PTHREAD_EXPLICIT_SCHED);
        pthread_attr_setschedpolicy(&a, SCHED_FIFO);
        pthread_attr_setschedparam(&a, &sp);
        rt_err = pthread_create(&t, &a, run, &j);
        pthread_attr_destroy(&a);
    }
    if (rt_err != 0) {
        int err = pthread_create(&t, NULL, run, &j);
        if (err != 0)
            return err;
    }
    pthread_join(t, NULL);
    out[0] = j.count;
    out[1] = j.policy;
    out[2] = j.priority;
    out[3] = rt_err;
    return 0;
}

/*
 * stall_probe.c -- see stall_probe.h.
 */
#ifndef _GNU_SOURCE
#define _GNU_SOURCE
#endif
#include <errno.h>
#include <pthread.h>
#include <sched.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "stall_probe.h"

const double ss_probe_bin_edges_us[SS_PROBE_BINS - 1] = {20, 50, 100, 250, 500, 1000, 2000, 5000};

typedef struct ss_probe_slot {
    struct ss_probe *owner;
    pthread_t thread;
    int cpu;
    int started;
    uint64_t wakes;
    uint64_t skipped;
    uint64_t hist[SS_PROBE_BINS];
    int64_t worst_late_ns;
    uint64_t kept;                  /* stalls written to the ring so far */
    int64_t ring_deadline[SS_PROBE_RING];
    int64_t ring_late[SS_PROBE_RING];
} ss_probe_slot;

struct ss_probe {
    int64_t period_ns;
    int64_t stall_ns;
    int priority;
    int stop;
    int n;
    int realtime;                   /* every started thread got SCHED_FIFO */
    int pinned;
    ss_probe_slot *slots;
};

static int64_t ss_probe_now_(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (int64_t)t.tv_sec * 1000000000LL + (int64_t)t.tv_nsec;
}

static int ss_probe_bin_(int64_t late_ns)
{
    double us = (double)late_ns * 1e-3;
    int b;
    for (b = 0; b < SS_PROBE_BINS - 1; b++)
        if (us < ss_probe_bin_edges_us[b]) return b;
    return SS_PROBE_BINS - 1;
}

static void *ss_probe_main_(void *arg)
{
    ss_probe_slot *s = (ss_probe_slot *)arg;
    ss_probe *p = s->owner;
    const int64_t period = p->period_ns;
    int64_t deadline = ss_probe_now_();
    struct timespec ts;

    deadline -= deadline % period;                 /* every CPU's deadlines on one grid */
    while (!__atomic_load_n(&p->stop, __ATOMIC_ACQUIRE)) {
        int64_t now, late;
        deadline += period;
        ts.tv_sec = (time_t)(deadline / 1000000000LL);
        ts.tv_nsec = (long)(deadline % 1000000000LL);
        while (clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME, &ts, NULL) == EINTR) {
        }
        now = ss_probe_now_();
        late = now - deadline;
        if (late < 0) late = 0;
        __atomic_store_n(&s->wakes, s->wakes + 1, __ATOMIC_RELAXED);
        __atomic_store_n(&s->hist[ss_probe_bin_(late)], s->hist[ss_probe_bin_(late)] + 1,
                         __ATOMIC_RELAXED);
        if (late > s->worst_late_ns) __atomic_store_n(&s->worst_late_ns, late, __ATOMIC_RELAXED);
        if (late > p->stall_ns) {
            uint64_t k = s->kept % SS_PROBE_RING;
            s->ring_deadline[k] = deadline;
            s->ring_late[k] = late;
            __atomic_store_n(&s->kept, s->kept + 1, __ATOMIC_RELEASE);
        }
        if (late >= period) {
            /* one stall, however long: go on from the last deadline passed */
            int64_t skip = late / period;
            deadline += skip * period;
            __atomic_store_n(&s->skipped, s->skipped + (uint64_t)skip, __ATOMIC_RELAXED);
        }
    }
    return NULL;
}

static int ss_probe_spawn_(ss_probe *p, ss_probe_slot *s, int realtime, int pin)
{
    pthread_attr_t attr;
    int rc;
    if (pthread_attr_init(&attr) != 0) return -1;
    pthread_attr_setstacksize(&attr, 64 * 1024);
    if (pin) {
        cpu_set_t set;
        CPU_ZERO(&set);
        CPU_SET(s->cpu, &set);
        pthread_attr_setaffinity_np(&attr, sizeof(set), &set);
    }
    if (realtime) {
        struct sched_param sp;
        memset(&sp, 0, sizeof(sp));
        sp.sched_priority = p->priority;
        pthread_attr_setinheritsched(&attr, PTHREAD_EXPLICIT_SCHED);
        pthread_attr_setschedpolicy(&attr, SCHED_FIFO);
        pthread_attr_setschedparam(&attr, &sp);
    }
    rc = pthread_create(&s->thread, &attr, ss_probe_main_, s);
    pthread_attr_destroy(&attr);
    return rc == 0 ? 0 : -1;
}

ss_probe *ss_probe_start(int64_t period_ns, int64_t stall_ns, int priority)
{
    cpu_set_t allowed;
    ss_probe *p;
    int cpus[SS_PROBE_MAX_CPUS];
    int n = 0, c, i, started = 0, rt_ok = 1, pin_ok = 1;

    if (period_ns < 100000 || period_ns > 1000000000LL || stall_ns <= 0 || priority < 1 || priority > 99)
        return NULL;
    CPU_ZERO(&allowed);
    if (sched_getaffinity(0, sizeof(allowed), &allowed) != 0) {
        CPU_ZERO(&allowed);
        CPU_SET(0, &allowed);
        pin_ok = 0;
    }
    for (c = 0; c < CPU_SETSIZE && n < SS_PROBE_MAX_CPUS; c++)
        if (CPU_ISSET(c, &allowed)) cpus[n++] = c;
    if (n == 0) return NULL;

    p = (ss_probe *)calloc(1, sizeof(*p));
    if (!p) return NULL;
    p->slots = (ss_probe_slot *)calloc((size_t)n, sizeof(ss_probe_slot));
    if (!p->slots) {
        free(p);
        return NULL;
    }
    p->period_ns = period_ns;
    p->stall_ns = stall_ns;
    p->priority = priority;
    for (i = 0; i < n; i++) {
        ss_probe_slot *s = &p->slots[i];
        s->owner = p;
        s->cpu = cpus[i];
        /* real time and pinned if allowed; else pinned only; else neither */
        if (rt_ok && ss_probe_spawn_(p, s, 1, pin_ok) == 0) {
            s->started = 1;
        } else {
            rt_ok = 0;
            if (ss_probe_spawn_(p, s, 0, pin_ok) == 0) {
                s->started = 1;
            } else if (pin_ok && ss_probe_spawn_(p, s, 0, 0) == 0) {
                s->started = 1;
                pin_ok = 0;
            }
        }
        if (s->started) started++;
    }
    if (started == 0) {
        free(p->slots);
        free(p);
        return NULL;
    }
    /* A thread started real time before a later one was refused stays so;
     * report real time only when every probe thread has it. */
    p->realtime = rt_ok;
    p->pinned = pin_ok;
    p->n = n;
    return p;
}

void ss_probe_stop(ss_probe *p)
{
    int i;
    if (!p) return;
    __atomic_store_n(&p->stop, 1, __ATOMIC_RELEASE);
    for (i = 0; i < p->n; i++)
        if (p->slots[i].started) pthread_join(p->slots[i].thread, NULL);
    free(p->slots);
    free(p);
}

int ss_probe_read(const ss_probe *p, ss_probe_stats *out)
{
    int i, b, running = 0;
    if (!p || !out) return SS_PROBE_ERR_ARG;
    memset(out, 0, sizeof(*out));
    for (i = 0; i < p->n; i++) {
        const ss_probe_slot *s = &p->slots[i];
        int64_t w;
        if (!s->started) continue;
        running++;
        out->wakes += __atomic_load_n(&s->wakes, __ATOMIC_RELAXED);
        out->skipped += __atomic_load_n(&s->skipped, __ATOMIC_RELAXED);
        out->stalls += __atomic_load_n(&s->kept, __ATOMIC_ACQUIRE);
        for (b = 0; b < SS_PROBE_BINS; b++) out->hist[b] += __atomic_load_n(&s->hist[b], __ATOMIC_RELAXED);
        w = __atomic_load_n(&s->worst_late_ns, __ATOMIC_RELAXED);
        if (w > out->worst_late_ns) out->worst_late_ns = w;
    }
    out->cpus = running;
    out->realtime = p->realtime;
    out->priority = p->realtime ? p->priority : 0;
    out->pinned = p->pinned;
    return SS_PROBE_OK;
}

int ss_probe_stalls(const ss_probe *p, int64_t *deadline_ns, int64_t *late_ns, int32_t *cpu, int max)
{
    int i, got = 0;
    if (!p || !deadline_ns || !late_ns || !cpu || max < 0) return SS_PROBE_ERR_ARG;
    for (i = 0; i < p->n && got < max; i++) {
        const ss_probe_slot *s = &p->slots[i];
        uint64_t kept, first, k;
        if (!s->started) continue;
        kept = __atomic_load_n(&s->kept, __ATOMIC_ACQUIRE);
        first = kept > SS_PROBE_RING ? kept - SS_PROBE_RING : 0;
        for (k = first; k < kept && got < max; k++) {
            deadline_ns[got] = s->ring_deadline[k % SS_PROBE_RING];
            late_ns[got] = s->ring_late[k % SS_PROBE_RING];
            cpu[got] = s->cpu;
            got++;
        }
    }
    return got;
}

/*
 * stall_probe.h -- how promptly does this machine wake a real-time thread?
 *
 * One thread per CPU (pinned), each sleeping to absolute deadlines one
 * audio block apart, at a real-time priority above the audio server's when
 * the process may use one.  Each wake-up's lateness is binned; wake-ups
 * later than the stall threshold are kept (start time, lateness, CPU) in a
 * fixed ring, so that the host can tell an xrun caused by the machine (no
 * thread on a CPU could run) from one caused by slow audio code.  The probe
 * does no work of its own beyond reading the clock: it does not load the
 * machine it measures.
 *
 * Threads: ss_probe_start / ss_probe_stop / ss_probe_read / ss_probe_stalls
 * from one control thread; the probe threads touch only their own slots.
 *
 * The part between CDEF-BEGIN and CDEF-END is fed to cffi's cdef as is.
 */
#ifndef SS_STALL_PROBE_H
#define SS_STALL_PROBE_H

#include <stdint.h>

/* CDEF-BEGIN */
#define SS_PROBE_MAX_CPUS 64
#define SS_PROBE_BINS 9             /* lateness bins, edges in ss_probe_bin_edges_us */
#define SS_PROBE_RING 4096          /* stalls kept per CPU (the oldest are overwritten) */

#define SS_PROBE_OK 0
#define SS_PROBE_ERR_ARG -20        /* bad argument */
#define SS_PROBE_ERR_THREAD -21     /* no probe thread could be started */

typedef struct ss_probe_stats {
    uint64_t wakes;                 /* wake-ups, all CPUs */
    uint64_t stalls;                /* wake-ups later than the stall threshold */
    uint64_t skipped;               /* deadlines passed inside stalls longer than a period */
    uint64_t hist[SS_PROBE_BINS];   /* wake-ups by lateness (bin edges below) */
    int64_t worst_late_ns;          /* latest wake-up */
    int32_t cpus;                   /* probe threads running */
    int32_t realtime;               /* 1 when they run SCHED_FIFO, 0 when they could not */
    int32_t priority;               /* their SCHED_FIFO priority (0 when not real time) */
    int32_t pinned;                 /* 1 when each is pinned to its CPU */
} ss_probe_stats;

typedef struct ss_probe ss_probe;

/* Upper edges of the lateness bins in microseconds (the last bin is open). */
extern const double ss_probe_bin_edges_us[SS_PROBE_BINS - 1];

/* Start one probe thread per online CPU (at most SS_PROBE_MAX_CPUS).
 * period_ns: time between deadlines (one audio block); stall_ns: lateness
 * counted as a stall; priority: SCHED_FIFO priority to ask for (1..99; the
 * threads fall back to normal scheduling when refused).  NULL on bad
 * arguments or when no thread starts. */
ss_probe *ss_probe_start(int64_t period_ns, int64_t stall_ns, int priority);
/* Stop and join the threads, free the probe. */
void ss_probe_stop(ss_probe *p);
/* Totals so far. */
int ss_probe_read(const ss_probe *p, ss_probe_stats *out);
/* Copy up to max kept stalls, oldest first per CPU: the deadline each
 * missed (CLOCK_MONOTONIC ns), its lateness (ns) and the CPU.  Returns the
 * number copied. */
int ss_probe_stalls(const ss_probe *p, int64_t *deadline_ns, int64_t *late_ns, int32_t *cpu, int max);
/* CDEF-END */

#endif /* SS_STALL_PROBE_H */

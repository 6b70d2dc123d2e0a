/*
 * drive.c -- timing driver for `sheafsynth bench` (host/bench.py).
 *
 * Calls a kernel's render function (ss_render_fn, csrc/ss_abi.h) for a run
 * of blocks and returns the elapsed time in ns, so that no Python call
 * overhead enters a kernel measurement.  The clock is the calling thread's
 * CPU time (CLOCK_THREAD_CPUTIME_ID) unless ssb_set_clock(0) chose
 * CLOCK_MONOTONIC: on a shared machine CPU time leaves out the time other
 * programs held the core.  Events go to the first
 * block only.  With keep != 0 block k is written to out + k * frames (out
 * must hold nblocks * frames floats), else every block overwrites out.
 * Not for the audio thread: benchmark use only.
 */
#include <stdint.h>
#include <time.h>

#include "ss_abi.h"

static int ssb_cpu_clock = 1;

/* 1: thread CPU time (default), 0: CLOCK_MONOTONIC.  Returns the previous choice. */
int ssb_set_clock(int cpu) {
    int old = ssb_cpu_clock;
    ssb_cpu_clock = cpu ? 1 : 0;
    return old;
}

int64_t ssb_now_ns(void) {
    struct timespec ts;
    clock_gettime(ssb_cpu_clock ? CLOCK_THREAD_CPUTIME_ID : CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000000LL + (int64_t)ts.tv_nsec;
}

int64_t ssb_drive(uintptr_t render, void *state, const ss_event *events, int n_events,
                  float *out, int frames, int nblocks, int keep) {
    ss_render_fn fn = (ss_render_fn)render;
    int64_t t0, t1;
    int k;
    if (!fn || !state || !out || frames <= 0 || nblocks <= 0) return -1;
    t0 = ssb_now_ns();
    for (k = 0; k < nblocks; ++k) {
        int rc = fn(state, k == 0 ? events : (const ss_event *)0, k == 0 ? n_events : 0,
                    keep ? out + (int64_t)k * frames : out, frames);
        if (rc < 0) return rc;
    }
    t1 = ssb_now_ns();
    return t1 - t0;
}

/* Per-block times (ns) of a run of blocks: times[k] for block k. */
int ssb_drive_each(uintptr_t render, void *state, const ss_event *events, int n_events,
                   float *out, int frames, int nblocks, int64_t *times) {
    ss_render_fn fn = (ss_render_fn)render;
    int k;
    if (!fn || !state || !out || !times || frames <= 0 || nblocks <= 0) return -1;
    for (k = 0; k < nblocks; ++k) {
        int64_t t0 = ssb_now_ns();
        int rc = fn(state, k == 0 ? events : (const ss_event *)0, k == 0 ? n_events : 0, out, frames);
        times[k] = ssb_now_ns() - t0;
        if (rc < 0) return rc;
    }
    return 0;
}

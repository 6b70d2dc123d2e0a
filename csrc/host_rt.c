/*
 * host_rt.c -- the live audio runtime declared in host_rt.h.
 *
 * Compiled once as its own cffi module by the Python host.  Kernels are
 * separate modules; the runtime reaches them only through ss_render_fn and
 * the ss_counters at the start of their state (ss_abi.h).
 *
 * Switching kernels: the control thread publishes (render, state) with a
 * release store of pend_seq.  At the start of the next block the audio
 * thread moves the current kernel to the fading slot, hands it one
 * SS_EV_RELEASE_ALL, and from then on renders both and sums them.  The
 * fading kernel is dropped when its voices_active reaches 0, or, after a
 * timeout (or when yet another switch is waiting), after a short linear
 * ramp to silence.  No gap, no click.
 *
 * Event timing: every event is stamped with CLOCK_MONOTONIC when pushed.
 * An event stamped at s, drained by the callback that starts at T_k, is
 * placed at offset (s - T_{k-1}) * rate inside the block, clamped to
 * [0, frames): a constant latency of one block with the timing inside the
 * block kept.  Events stamped at or after T_k wait for the next block.
 */
#if defined(__linux__) && !defined(_GNU_SOURCE)
#define _GNU_SOURCE                /* getrusage(RUSAGE_THREAD) */
#endif
#ifndef _POSIX_C_SOURCE
#define _POSIX_C_SOURCE 200809L
#endif

#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <sys/resource.h>
#include <time.h>

#if defined(__SSE__) || defined(__x86_64__)
#include <xmmintrin.h>
#define SS_HOST_HAVE_MXCSR 1
#endif

#include "host_rt.h"
#include "spsc.h"

typedef struct ss_host_event {
    int64_t stamp_ns;
    ss_event ev;
} ss_host_event;

typedef struct ss_slot {
    ss_render_fn render;
    void *state;
    uint64_t gen;          /* generation number; 0 = empty */
    float gain;            /* fade gain, 1 until a ramp starts */
    float gain_step;       /* per-sample decrement while ramping, else 0 */
    uint64_t age;          /* frames rendered since it began fading */
    int release_pending;   /* SS_EV_RELEASE_ALL not yet delivered */
} ss_slot;

struct ss_host {
    ss_spsc ev_ring;               /* ss_host_event, producer: MIDI thread */
    ss_spsc rec_ring;              /* float samples, consumer: recorder */
    void *ev_storage;
    float *rec_storage;

    /* pending switch: control thread writes, audio thread takes */
    uintptr_t pend_render;
    uintptr_t pend_state;
    uint64_t pend_seq;             /* atomic */
    uint64_t taken_seq;            /* atomic */

    /* configuration (atomic loads in the callback) */
    double rate;                   /* Hz, set only while stopped */
    float ceiling;
    double fade_timeout_s;
    double fade_ramp_s;
    int recording;
    int peak_reset_req;
    int max_block;
    int channels;

    /* producer-side counters (atomic) */
    uint64_t prod_pushed;
    uint64_t prod_dropped;

    /* audio thread only */
    ss_slot cur;
    ss_slot fade;
    int64_t prev_start_ns;
    int have_prev;
    ss_event *evbuf;               /* SS_HOST_BLOCK_EVENTS */
    float *mix;                    /* max_block */
    float *aux;                    /* max_block */
    ss_host_counters work;         /* audio thread's running counters */

    /* xrun log: audio thread appends, control thread reads (count published last) */
    int64_t xrun_ns[SS_HOST_XRUN_LOG];
    uint64_t xrun_logged;          /* atomic */
    /* slow-callback log (longer than half a period): start and duration, same rules */
    int64_t slow_start_ns[SS_HOST_SLOW_LOG];
    int64_t slow_dur_ns[SS_HOST_SLOW_LOG];
    int64_t slow_cpu_ns[SS_HOST_SLOW_LOG];
    uint64_t slow_logged;          /* atomic */

    /* published counters, seqlock */
    uint64_t seq;
    ss_host_counters pub;
};

/* ------------------------------------------------------------------ */

int64_t ss_host_now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000000LL + (int64_t)ts.tv_nsec;
}

/* CPU time of the calling thread (ns); a non-blocking system call. */
static int64_t ss_host_thread_cpu_ns_(void)
{
    struct timespec ts;
    if (clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts) != 0) return -1;
    return (int64_t)ts.tv_sec * 1000000000LL + (int64_t)ts.tv_nsec;
}

/* Voluntary and involuntary context switches of the calling thread so far
 * (-1 where the system cannot tell per thread); a non-blocking system call.
 * Its CPU times are left unused on purpose: for a running thread Linux
 * updates them only at scheduler ticks (a 0.7 ms spin reads as 0 or 3.7 ms),
 * while CLOCK_THREAD_CPUTIME_ID is exact. */
static void ss_host_thread_switches_(long *voluntary, long *involuntary)
{
#if defined(RUSAGE_THREAD)
    struct rusage ru;
    if (getrusage(RUSAGE_THREAD, &ru) == 0) {
        *voluntary = ru.ru_nvcsw;
        *involuntary = ru.ru_nivcsw;
        return;
    }
#endif
    *voluntary = -1;
    *involuntary = -1;
}

static int ss_host_bin_(int64_t dur, double period_ns)
{
    double bin = (double)dur / period_ns * (double)SS_HOST_HIST_BINS / (double)SS_HOST_HIST_SPAN;
    int b = bin >= (double)(SS_HOST_HIST_BINS - 1) ? SS_HOST_HIST_BINS - 1 : (int)bin;
    return b < 0 ? 0 : b;
}

ss_host *ss_host_create(double rate, int max_block, int channels,
                        uint32_t event_capacity, uint32_t record_capacity_frames)
{
    ss_host *h;
    uint32_t ev_cap, rec_cap;
    if (!(rate > 0.0) || rate > 1e7) return NULL;
    if (max_block <= 0 || max_block > (1 << 20)) return NULL;
    if (channels < 1 || channels > SS_HOST_MAX_CHANNELS) return NULL;
    if (event_capacity < 1 || record_capacity_frames < 1) return NULL;
    ev_cap = ss_spsc_pow2(event_capacity);
    if (ev_cap == 0 || (uint64_t)record_capacity_frames * (uint64_t)channels > (UINT64_C(1) << 31))
        return NULL;
    rec_cap = ss_spsc_pow2(record_capacity_frames * (uint32_t)channels);
    if (rec_cap == 0) return NULL;

    h = (ss_host *)calloc(1, sizeof(ss_host));
    if (!h) return NULL;
    h->ev_storage = calloc(ev_cap, sizeof(ss_host_event));
    h->rec_storage = (float *)calloc(rec_cap, sizeof(float));
    h->evbuf = (ss_event *)calloc(SS_HOST_BLOCK_EVENTS, sizeof(ss_event));
    h->mix = (float *)calloc((size_t)max_block, sizeof(float));
    h->aux = (float *)calloc((size_t)max_block, sizeof(float));
    if (!h->ev_storage || !h->rec_storage || !h->evbuf || !h->mix || !h->aux) {
        ss_host_destroy(h);
        return NULL;
    }
    ss_spsc_init(&h->ev_ring, h->ev_storage, ev_cap, sizeof(ss_host_event));
    ss_spsc_init(&h->rec_ring, h->rec_storage, rec_cap, sizeof(float));
    h->rate = rate;
    h->ceiling = 0.9660509f;       /* -0.3 dBFS */
    h->fade_timeout_s = 3.0;
    h->fade_ramp_s = 0.010;
    h->max_block = max_block;
    h->channels = channels;
    return h;
}

void ss_host_destroy(ss_host *h)
{
    if (!h) return;
    free(h->ev_storage);
    free(h->rec_storage);
    free(h->evbuf);
    free(h->mix);
    free(h->aux);
    free(h);
}

int ss_host_set_rate(ss_host *h, double rate)
{
    if (!h || !(rate > 0.0) || rate > 1e7) return SS_HOST_ERR_ARG;
    h->rate = rate;
    h->have_prev = 0;
    return SS_HOST_OK;
}

int ss_host_set_ceiling(ss_host *h, float ceiling)
{
    if (!h || !(ceiling > 0.0f) || ceiling > 4.0f) return SS_HOST_ERR_ARG;
    __atomic_store(&h->ceiling, &ceiling, __ATOMIC_RELAXED);
    return SS_HOST_OK;
}

int ss_host_set_fade(ss_host *h, double timeout_s, double ramp_s)
{
    if (!h || !(timeout_s >= 0.0) || timeout_s > 3600.0 || !(ramp_s > 0.0) || ramp_s > 10.0)
        return SS_HOST_ERR_ARG;
    __atomic_store(&h->fade_timeout_s, &timeout_s, __ATOMIC_RELAXED);
    __atomic_store(&h->fade_ramp_s, &ramp_s, __ATOMIC_RELAXED);
    return SS_HOST_OK;
}

void ss_host_set_recording(ss_host *h, int on)
{
    if (h) __atomic_store_n(&h->recording, on ? 1 : 0, __ATOMIC_RELEASE);
}

void ss_host_reset_peak(ss_host *h)
{
    if (h) __atomic_store_n(&h->peak_reset_req, 1, __ATOMIC_RELEASE);
}

int64_t ss_host_set_kernel(ss_host *h, uintptr_t render, uintptr_t state)
{
    uint64_t seq;
    if (!h || (render != 0 && state == 0)) return SS_HOST_ERR_ARG;
    seq = __atomic_load_n(&h->pend_seq, __ATOMIC_RELAXED);
    if (seq != __atomic_load_n(&h->taken_seq, __ATOMIC_ACQUIRE)) return SS_HOST_ERR_BUSY;
    h->pend_render = render;
    h->pend_state = render ? state : 0;
    __atomic_store_n(&h->pend_seq, seq + 1, __ATOMIC_RELEASE);
    return (int64_t)(seq + 1);
}

int64_t ss_host_push_at(ss_host *h, int64_t stamp_ns, int type, int a, int b, float value)
{
    ss_host_event e;
    if (!h) return SS_HOST_ERR_ARG;
    if (stamp_ns <= 0) stamp_ns = 1;
    e.stamp_ns = stamp_ns;
    e.ev.offset = 0;
    e.ev.type = type;
    e.ev.a = a;
    e.ev.b = b;
    e.ev.value = value;
    if (!ss_spsc_write(&h->ev_ring, &e, 1)) {
        __atomic_fetch_add(&h->prod_dropped, 1, __ATOMIC_RELAXED);
        return SS_HOST_ERR_FULL;
    }
    __atomic_fetch_add(&h->prod_pushed, 1, __ATOMIC_RELAXED);
    return stamp_ns;
}

int64_t ss_host_push(ss_host *h, int type, int a, int b, float value)
{
    return ss_host_push_at(h, ss_host_now_ns(), type, a, b, value);
}

uint64_t ss_host_read_record(ss_host *h, float *out, uint64_t max_frames)
{
    uint64_t avail, n, ch;
    if (!h || !out) return 0;
    ch = (uint64_t)h->channels;
    avail = ss_spsc_readable(&h->rec_ring) / ch;
    n = max_frames < avail ? max_frames : avail;
    if (n == 0) return 0;
    ss_spsc_read(&h->rec_ring, out, n * ch);
    return n;
}

int ss_host_snapshot(ss_host *h, ss_host_counters *out)
{
    int tries;
    if (!h || !out) return SS_HOST_ERR_ARG;
    for (tries = 0; tries < 10000; tries++) {
        uint64_t s1 = __atomic_load_n(&h->seq, __ATOMIC_ACQUIRE);
        uint64_t s2;
        if (s1 & 1) continue;
        memcpy(out, &h->pub, sizeof(*out));
        __atomic_thread_fence(__ATOMIC_ACQUIRE);
        s2 = __atomic_load_n(&h->seq, __ATOMIC_RELAXED);
        if (s1 == s2) {
            out->events_pushed = __atomic_load_n(&h->prod_pushed, __ATOMIC_RELAXED);
            out->events_dropped = __atomic_load_n(&h->prod_dropped, __ATOMIC_RELAXED);
            return SS_HOST_OK;
        }
    }
    return SS_HOST_ERR_RETRY;
}

/* ------------------------------------------------------------------ */
/* audio thread */

static uint64_t ss_host_retired_(const ss_host *h)
{
    uint64_t oldest = h->fade.render ? h->fade.gen : h->cur.gen;
    return oldest > 0 ? oldest - 1 : 0;
}

static void ss_host_take_switch_(ss_host *h, ss_host_counters *w)
{
    uint64_t seq = __atomic_load_n(&h->pend_seq, __ATOMIC_ACQUIRE);
    if (seq == h->cur.gen) return;                 /* nothing pending */
    if (h->fade.render) {
        /* Yet another switch while one kernel is still fading: ramp the
         * fading one out quickly and take the switch when it is gone. */
        if (h->fade.gain_step == 0.0f) {
            double ramp_s;
            __atomic_load(&h->fade_ramp_s, &ramp_s, __ATOMIC_RELAXED);
            h->fade.gain_step = (float)(1.0 / fmax(1.0, ramp_s * h->rate));
        }
        return;
    }
    if (h->cur.render) {
        h->fade = h->cur;
        h->fade.gain = 1.0f;
        h->fade.gain_step = 0.0f;
        h->fade.age = 0;
        h->fade.release_pending = 1;
    }
    memset(&h->cur, 0, sizeof(h->cur));
    h->cur.render = (ss_render_fn)h->pend_render;
    h->cur.state = (void *)h->pend_state;
    h->cur.gen = seq;
    h->cur.gain = 1.0f;
    __atomic_store_n(&h->taken_seq, seq, __ATOMIC_RELEASE);
    w->switches++;
    w->generation = seq;
}

static void ss_host_insertion_sort_(ss_event *ev, int n)
{
    int i, j;
    for (i = 1; i < n; i++) {
        ss_event x = ev[i];
        for (j = i; j > 0 && ev[j - 1].offset > x.offset; j--) ev[j] = ev[j - 1];
        ev[j] = x;
    }
}

/* Drain the events that belong to this block into h->evbuf; returns count. */
static int ss_host_drain_(ss_host *h, ss_host_counters *w, unsigned long frames,
                          int64_t now_ns, double rate)
{
    ss_host_event he;
    int n = 0;
    int64_t period_ns = (int64_t)((double)frames * 1e9 / rate);
    int64_t prev = h->have_prev ? h->prev_start_ns : now_ns - period_ns;
    while (n < SS_HOST_BLOCK_EVENTS && ss_spsc_peek(&h->ev_ring, &he)) {
        int64_t off;
        if (he.stamp_ns >= now_ns && he.stamp_ns < now_ns + period_ns)
            break;                                 /* arrived during this callback */
        if (he.stamp_ns < prev || he.stamp_ns >= now_ns) {
            off = 0;                               /* late, or a stamp from nowhere */
            w->events_late++;
        } else {
            off = (int64_t)((double)(he.stamp_ns - prev) * rate * 1e-9);
        }
        if (off < 0) off = 0;
        if (off >= (int64_t)frames) off = (int64_t)frames - 1;
        h->evbuf[n] = he.ev;
        h->evbuf[n].offset = (int32_t)off;
        n++;
        ss_spsc_drop(&h->ev_ring, 1);
    }
    ss_host_insertion_sort_(h->evbuf, n);
    return n;
}

static int ss_host_render_slot_(ss_slot *s, const ss_event *ev, int n, float *buf, int m,
                                ss_host_counters *w)
{
    int rc = s->render(s->state, ev, n, buf, m);
    if (rc < 0) {
        memset(buf, 0, (size_t)m * sizeof(float));
        w->kernel_errors++;
    }
    return rc;
}

int ss_host_process(ss_host *h, float *out, unsigned long frames, int64_t now_ns,
                    unsigned long status_flags)
{
    ss_host_counters *w;
    int64_t t0, cpu0;
    long vol0, invol0;
    unsigned long pos;
    int n_ev, ei = 0, ch, channels;
    float ceiling, peak = 0.0f;
    double rate;
#ifdef SS_HOST_HAVE_MXCSR
    unsigned int csr_saved;
#endif

    if (!h || !out) return paAbort;
    t0 = ss_host_now_ns();
    cpu0 = ss_host_thread_cpu_ns_();
    ss_host_thread_switches_(&vol0, &invol0);
#ifdef SS_HOST_HAVE_MXCSR
    /* flush-to-zero, denormals-are-zero for this call; the caller's mode comes
       back on return (a process() run by hand on the main thread must not
       leave Python's floats flushed) */
    csr_saved = _mm_getcsr();
    _mm_setcsr(csr_saved | 0x8040);
#endif
    w = &h->work;
    channels = h->channels;
    rate = h->rate;
    __atomic_load(&h->ceiling, &ceiling, __ATOMIC_RELAXED);

    w->callbacks++;
    if (status_flags & paOutputUnderflow) w->underflows++;
    if (status_flags & paOutputOverflow) w->overflows++;
    if ((status_flags & (paOutputUnderflow | paOutputOverflow)) && h->xrun_logged < SS_HOST_XRUN_LOG) {
        h->xrun_ns[h->xrun_logged] = t0;
        __atomic_store_n(&h->xrun_logged, h->xrun_logged + 1, __ATOMIC_RELEASE);
    }
    if (status_flags & paPrimingOutput) w->priming++;
    if (__atomic_exchange_n(&h->peak_reset_req, 0, __ATOMIC_ACQ_REL)) w->peak_hold = 0.0f;
    if (frames == 0) goto publish;

    ss_host_take_switch_(h, w);
    n_ev = ss_host_drain_(h, w, frames, now_ns, rate);
    if (!h->cur.render) {
        w->events_unrouted += (uint64_t)n_ev;
        n_ev = 0;
    } else {
        w->events_delivered += (uint64_t)n_ev;
    }

    for (pos = 0; pos < frames;) {
        int m = (int)((frames - pos) < (unsigned long)h->max_block ? (frames - pos)
                                                                   : (unsigned long)h->max_block);
        float *mix = h->mix;
        int i, k = 0;

        /* events of this chunk, offsets rebased to the chunk */
        while (ei + k < n_ev && h->evbuf[ei + k].offset < (int32_t)(pos + (unsigned long)m)) {
            h->evbuf[ei + k].offset -= (int32_t)pos;
            k++;
        }
        if (h->cur.render)
            ss_host_render_slot_(&h->cur, h->evbuf + ei, k, mix, m, w);
        else
            memset(mix, 0, (size_t)m * sizeof(float));
        ei += k;

        if (h->fade.render) {
            ss_slot *f = &h->fade;
            ss_event rel;
            double timeout_s;
            int nrel = 0;
            if (f->release_pending) {
                memset(&rel, 0, sizeof(rel));
                rel.type = SS_EV_RELEASE_ALL;
                nrel = 1;
                f->release_pending = 0;
            }
            ss_host_render_slot_(f, &rel, nrel, h->aux, m, w);
            if (f->gain_step > 0.0f) {
                float g = f->gain;
                for (i = 0; i < m; i++) {
                    g -= f->gain_step;
                    if (g < 0.0f) g = 0.0f;
                    mix[i] += g * h->aux[i];
                }
                f->gain = g;
            } else {
                for (i = 0; i < m; i++) mix[i] += h->aux[i];
            }
            f->age += (uint64_t)m;
            __atomic_load(&h->fade_timeout_s, &timeout_s, __ATOMIC_RELAXED);
            if (f->gain <= 0.0f || ((const ss_counters *)f->state)->voices_active == 0) {
                memset(f, 0, sizeof(*f));
            } else if (f->gain_step == 0.0f && (double)f->age >= timeout_s * rate) {
                double ramp_s;
                __atomic_load(&h->fade_ramp_s, &ramp_s, __ATOMIC_RELAXED);
                f->gain_step = (float)(1.0 / fmax(1.0, ramp_s * rate));
                w->fade_timeouts++;
            }
        }

        /* guard, safety clip, interleave */
        for (i = 0; i < m; i++) {
            float x = mix[i];
            float *o = out + (pos + (unsigned long)i) * (unsigned long)channels;
            if (!isfinite(x)) {
                x = 0.0f;
                w->nonfinite++;
            }
            if (x > ceiling) {
                x = ceiling;
                w->clipped++;
            } else if (x < -ceiling) {
                x = -ceiling;
                w->clipped++;
            }
            if (fabsf(x) > peak) peak = fabsf(x);
            for (ch = 0; ch < channels; ch++) o[ch] = x;
        }
        pos += (unsigned long)m;
    }

    if (__atomic_load_n(&h->recording, __ATOMIC_ACQUIRE)) {
        uint64_t room = ss_spsc_writable(&h->rec_ring) / (uint64_t)channels;
        uint64_t nrec = frames < room ? frames : room;
        if (nrec) ss_spsc_write(&h->rec_ring, out, nrec * (uint64_t)channels);
        w->record_frames += nrec;
        w->record_dropped += frames - nrec;
    }

    w->frames += frames;
    w->peak = peak;
    if (peak > w->peak_hold) w->peak_hold = peak;
    w->fading_active = h->fade.render ? 1u : 0u;
    w->retired = ss_host_retired_(h);
    w->generation = h->cur.gen;
    h->prev_start_ns = now_ns;
    h->have_prev = 1;

publish:
    {
        int64_t dur = ss_host_now_ns() - t0;
        int64_t cpu1 = ss_host_thread_cpu_ns_();
        int64_t cpu = (cpu0 >= 0 && cpu1 >= cpu0) ? cpu1 - cpu0 : -1;
        long vol1, invol1;
        double period_ns = frames ? (double)frames * 1e9 / rate : 1.0;
        ss_host_thread_switches_(&vol1, &invol1);
        if (frames) {
            w->hist[ss_host_bin_(dur, period_ns)]++;
            w->cpu_hist[ss_host_bin_(cpu >= 0 ? cpu : dur, period_ns)]++;
            if (vol0 >= 0 && vol1 > vol0) w->cb_blocked++;
            if (invol0 >= 0 && invol1 > invol0) w->cb_preempted++;
        }
        if (cpu > 0 && (uint64_t)cpu > w->cb_cpu_worst_ns) w->cb_cpu_worst_ns = (uint64_t)cpu;
        if (frames && 2.0 * (double)dur > period_ns && h->slow_logged < SS_HOST_SLOW_LOG) {
            h->slow_start_ns[h->slow_logged] = t0;
            h->slow_dur_ns[h->slow_logged] = dur;
            h->slow_cpu_ns[h->slow_logged] = cpu;
            __atomic_store_n(&h->slow_logged, h->slow_logged + 1, __ATOMIC_RELEASE);
        }
        w->cb_last_ns = (uint64_t)dur;
        if ((uint64_t)dur > w->cb_worst_ns) w->cb_worst_ns = (uint64_t)dur;
        w->last_start_ns = (uint64_t)now_ns;
        w->last_frames = (uint32_t)frames;
    }
    {
        uint64_t s = h->seq;
        __atomic_store_n(&h->seq, s + 1, __ATOMIC_RELAXED);
        __atomic_thread_fence(__ATOMIC_RELEASE);
        memcpy(&h->pub, w, sizeof(*w));
        __atomic_store_n(&h->seq, s + 2, __ATOMIC_RELEASE);
    }
#ifdef SS_HOST_HAVE_MXCSR
    _mm_setcsr(csr_saved);
#endif
    return paContinue;
}

int ss_host_xrun_times(const ss_host *h, int64_t *out, int max)
{
    uint64_t n, i;
    if (!h || !out || max < 0) return SS_HOST_ERR_ARG;
    n = __atomic_load_n(&h->xrun_logged, __ATOMIC_ACQUIRE);
    if (n > (uint64_t)max) n = (uint64_t)max;
    for (i = 0; i < n; i++) out[i] = h->xrun_ns[i];
    return (int)n;
}

int ss_host_slow_callbacks(const ss_host *h, int64_t *start_ns, int64_t *dur_ns, int64_t *cpu_ns,
                           int max)
{
    uint64_t n, i;
    if (!h || !start_ns || !dur_ns || max < 0) return SS_HOST_ERR_ARG;
    n = __atomic_load_n(&h->slow_logged, __ATOMIC_ACQUIRE);
    if (n > (uint64_t)max) n = (uint64_t)max;
    for (i = 0; i < n; i++) {
        start_ns[i] = h->slow_start_ns[i];
        dur_ns[i] = h->slow_dur_ns[i];
        if (cpu_ns) cpu_ns[i] = h->slow_cpu_ns[i];
    }
    return (int)n;
}

int ss_host_callback(const void *input, void *output, unsigned long frames,
                     const PaStreamCallbackTimeInfo *time_info,
                     PaStreamCallbackFlags status_flags, void *userdata)
{
    (void)input;
    (void)time_info;
    if (!userdata || !output) return paAbort;
    return ss_host_process((ss_host *)userdata, (float *)output, frames, ss_host_now_ns(),
                           status_flags);
}

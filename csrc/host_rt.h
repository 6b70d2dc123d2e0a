/*
 * host_rt.h -- the live audio runtime: kernel slots with seamless switch,
 * timestamped event ring, PortAudio-shaped callback, counters, record ring.
 *
 * Threads:
 *   audio thread   ss_host_callback / ss_host_process only.
 *   event producer ONE thread (the MIDI thread) calls ss_host_push*.
 *   record reader  ONE thread calls ss_host_read_record.
 *   control        any one thread calls the rest (create, set_kernel,
 *                  setters, snapshot); the Python host serialises these.
 *
 * The part between CDEF-BEGIN and CDEF-END is plain declarations that the
 * Python host feeds to cffi's cdef as they are; keep it free of other
 * preprocessor lines than integer #defines.
 */
#ifndef SS_HOST_RT_H
#define SS_HOST_RT_H

#include <stdint.h>
#include "ss_abi.h"

/* PortAudio's callback flags and return codes (values as in PortAudio v19's
 * public header; its callback types are declared in the CDEF part below, so
 * that no portaudio.h is needed). */
#define paInputUnderflow  0x00000001UL
#define paInputOverflow   0x00000002UL
#define paOutputUnderflow 0x00000004UL
#define paOutputOverflow  0x00000008UL
#define paPrimingOutput   0x00000010UL
#define paContinue 0
#define paComplete 1
#define paAbort    2

/* CDEF-BEGIN */
/* PortAudio's callback types; layout as in PortAudio v19's public header. */
typedef double PaTime;
typedef unsigned long PaStreamCallbackFlags;
typedef struct PaStreamCallbackTimeInfo {
    PaTime inputBufferAdcTime;
    PaTime currentTime;
    PaTime outputBufferDacTime;
} PaStreamCallbackTimeInfo;

#define SS_HOST_HIST_BINS 512       /* callback-time histogram bins */
#define SS_HOST_HIST_SPAN 2         /* histogram spans 0..2 block periods */
#define SS_HOST_MAX_CHANNELS 8
#define SS_HOST_BLOCK_EVENTS 512    /* events handed to a kernel per block */
#define SS_HOST_XRUN_LOG 1024       /* xrun times kept (the first ones) */
#define SS_HOST_SLOW_LOG 1024       /* slow callbacks (over half a period) kept (the first ones) */

#define SS_HOST_OK 0
#define SS_HOST_ERR_BUSY -10        /* a kernel switch is still pending */
#define SS_HOST_ERR_FULL -11        /* the event ring is full; event dropped */
#define SS_HOST_ERR_ARG -12         /* bad argument */
#define SS_HOST_ERR_RETRY -13       /* snapshot raced the audio thread; try again */

typedef struct ss_host_counters {
    uint64_t callbacks;          /* callbacks run */
    uint64_t frames;             /* frames written to the device */
    uint64_t underflows;         /* callbacks flagged paOutputUnderflow (xrun) */
    uint64_t overflows;          /* callbacks flagged paOutputOverflow (xrun) */
    uint64_t priming;            /* callbacks flagged paPrimingOutput */
    uint64_t nonfinite;          /* output samples that were NaN/Inf, written as 0 */
    uint64_t clipped;            /* output samples clipped at the ceiling */
    uint64_t kernel_errors;      /* render calls that returned < 0 (block zeroed) */
    uint64_t events_pushed;      /* events accepted into the ring */
    uint64_t events_dropped;     /* events refused: ring full */
    uint64_t events_delivered;   /* events handed to a kernel */
    uint64_t events_late;        /* events stamped before the previous block began */
    uint64_t events_unrouted;    /* events drained while no kernel was loaded */
    uint64_t record_frames;      /* frames written to the record ring */
    uint64_t record_dropped;     /* frames lost: record ring full */
    uint64_t switches;           /* kernel switches taken */
    uint64_t fade_timeouts;      /* fading kernels cut by timeout (with a ramp) */
    uint64_t generation;         /* generation of the current kernel (0 = none) */
    uint64_t retired;            /* every generation <= this is no longer used */
    uint64_t last_start_ns;      /* CLOCK_MONOTONIC at the last callback start, ns */
    uint64_t cb_last_ns;         /* duration of the last callback, ns */
    uint64_t cb_worst_ns;        /* worst callback duration, ns */
    uint64_t hist[SS_HOST_HIST_BINS]; /* callback time / block period, bins of SPAN/BINS */
    uint64_t cpu_hist[SS_HOST_HIST_BINS]; /* the same for the time the audio thread spent on
                                    its CPU in the callback (CLOCK_THREAD_CPUTIME_ID) */
    uint64_t cb_cpu_worst_ns;    /* worst on-CPU time of a callback, ns */
    uint64_t cb_blocked;         /* callbacks in which the audio thread blocked (gave up its
                                    CPU: a voluntary context switch); must stay 0 */
    uint64_t cb_preempted;       /* callbacks in which the system switched the audio thread
                                    out for another thread (an involuntary switch) */
    uint32_t fading_active;      /* 1 while a previous kernel is fading out */
    uint32_t last_frames;        /* frames in the last callback */
    float peak;                  /* peak |out| of the last callback */
    float peak_hold;             /* peak |out| since the last ss_host_reset_peak */
} ss_host_counters;

typedef struct ss_host ss_host;

/* Control thread.  max_block: largest frames per kernel render call (larger
 * device blocks are split); channels 1..SS_HOST_MAX_CHANNELS; capacities in
 * events / frames, rounded up to powers of two.  NULL on bad arguments or
 * out of memory. */
ss_host *ss_host_create(double rate, int max_block, int channels,
                        uint32_t event_capacity, uint32_t record_capacity_frames);
void ss_host_destroy(ss_host *h);

/* Control thread, only while no stream runs. Hz. */
int ss_host_set_rate(ss_host *h, double rate);
/* Control thread, any time.  Linear ceiling (0 < c <= 4). */
int ss_host_set_ceiling(ss_host *h, float ceiling);
/* Control thread, any time.  timeout_s: how long a fading kernel may ring
 * before it is ramped out; ramp_s: length of that ramp. */
int ss_host_set_fade(ss_host *h, double timeout_s, double ramp_s);
/* Record ring on (1) or off (0). */
void ss_host_set_recording(ss_host *h, int on);

/* Control thread.  Hand a new kernel to the audio thread: render is an
 * ss_render_fn, state its state (ss_counters first), both as addresses;
 * render = 0 means "no kernel" (the old one fades out).  Returns the new
 * generation (> 0), or SS_HOST_ERR_BUSY while the previous switch has not
 * been taken.  The caller keeps the kernel alive until
 * counters.retired >= generation. */
int64_t ss_host_set_kernel(ss_host *h, uintptr_t render, uintptr_t state);

/* Event producer (one thread).  Stamp with CLOCK_MONOTONIC now and queue.
 * Returns the stamp in ns (> 0), or SS_HOST_ERR_FULL. */
int64_t ss_host_push(ss_host *h, int type, int a, int b, float value);
/* Same with an explicit CLOCK_MONOTONIC stamp in ns. */
int64_t ss_host_push_at(ss_host *h, int64_t stamp_ns, int type, int a, int b, float value);
/* CLOCK_MONOTONIC in ns. */
int64_t ss_host_now_ns(void);

/* Record reader (one thread).  Read up to max_frames interleaved frames
 * into out; returns frames read. */
uint64_t ss_host_read_record(ss_host *h, float *out, uint64_t max_frames);

/* Control thread.  Consistent copy of the counters; SS_HOST_OK or
 * SS_HOST_ERR_RETRY. */
int ss_host_snapshot(ss_host *h, ss_host_counters *out);
/* Control thread.  CLOCK_MONOTONIC start times (ns) of the callbacks that
 * were flagged with an xrun, the first SS_HOST_XRUN_LOG of them; copies up
 * to max and returns the number copied. */
int ss_host_xrun_times(const ss_host *h, int64_t *out, int max);
/* Control thread.  Start times and durations (CLOCK_MONOTONIC ns) of the
 * callbacks that took longer than half a block period, the first
 * SS_HOST_SLOW_LOG of them, with the CPU time the audio thread spent in each
 * (CLOCK_THREAD_CPUTIME_ID ns: where the kernel accounts steal time, as on a
 * PARAVIRT_TIME_ACCOUNTING guest, time the thread was off its CPU does not
 * count).  cpu_ns may be NULL.  Copies up to max, returns the number copied. */
int ss_host_slow_callbacks(const ss_host *h, int64_t *start_ns, int64_t *dur_ns, int64_t *cpu_ns,
                           int max);
/* Ask the audio thread to restart peak_hold at its next callback. */
void ss_host_reset_peak(ss_host *h);

/* Audio thread.  Render `frames` interleaved frames as if the block began at
 * CLOCK_MONOTONIC time now_ns (tests pass synthetic times).  Real-time safe. */
int ss_host_process(ss_host *h, float *out, unsigned long frames, int64_t now_ns,
                    unsigned long status_flags);

/* Audio thread: the PortAudio stream callback; userdata is the ss_host.
 * Real-time safe: no allocation, no locks, no I/O; always paContinue. */
int ss_host_callback(const void *input, void *output, unsigned long frames,
                     const PaStreamCallbackTimeInfo *time_info,
                     PaStreamCallbackFlags status_flags, void *userdata);
/* CDEF-END */

#endif /* SS_HOST_RT_H */

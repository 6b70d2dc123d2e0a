/*
 * ss_abi.h -- the binary contract between a generated kernel and its clients.
 *
 * Every compiled preset ("kernel module") exports one render function with
 * the signature ss_render_fn and a state object whose first member is an
 * ss_counters struct.  The live host runtime (csrc/host_rt.c) and the Python
 * engine both talk to kernels only through this header, so a kernel built
 * from any preset can be driven by any client.
 *
 * The part between CDEF-BEGIN and CDEF-END is plain declarations that the
 * Python side (engine/backends/c/abi.py) reads as its cffi cdef and from
 * which it takes the event and status codes: this file is their one source.
 *
 * Real-time rules: nothing declared here allocates, locks, logs or prints.
 */
#ifndef SS_ABI_H
#define SS_ABI_H

#include <stdint.h>
#include <stddef.h>

/* CDEF-BEGIN */
/* Event types.  Offsets are in samples from the start of the block. */
#define SS_EV_NOTE_ON        1  /* a = MIDI note 0..127, b = velocity 1..127 */
#define SS_EV_NOTE_OFF       2  /* a = MIDI note */
#define SS_EV_PARAM          3  /* a = parameter index, value = target (parameter units) */
#define SS_EV_BEND           4  /* value = pitch bend in semitones (signed) */
#define SS_EV_SUSTAIN        5  /* b = 1 pedal down, 0 pedal up */
#define SS_EV_ALL_NOTES_OFF  6  /* release every held voice (sustain still applies) */
#define SS_EV_ALL_SOUND_OFF  7  /* silence and free every voice at once */
#define SS_EV_RELEASE_ALL    8  /* release every voice, ignoring sustain (preset switch) */

typedef struct ss_event {
    int32_t offset;   /* sample offset inside the block, 0 <= offset < frames */
    int32_t type;     /* SS_EV_* */
    int32_t a;
    int32_t b;
    float value;
} ss_event;

/* Counters a kernel keeps; the first member of every kernel state. */
typedef struct ss_counters {
    uint64_t blocks;          /* blocks rendered */
    uint64_t frames;          /* frames rendered */
    uint32_t voices_active;   /* voices sounding after the last block */
    uint32_t voices_stolen;   /* voices taken from a sounding note */
    uint32_t guard_resets;    /* voices reset by the non-finite / runaway guard */
    uint32_t events_ignored;  /* events with bad type, index or offset */
    float peak;               /* peak |out| of the last block, after the limiter */
    float limiter_gain;       /* current limiter gain (1 = not limiting) */
} ss_counters;

/*
 * Render one block of `frames` mono samples into `out` (overwritten).
 * `events` are sorted by offset; events with offset outside [0, frames)
 * are clamped.  Returns 0, or a negative SS_ERR_* code.
 * Real-time safe: no allocation, no locks, no I/O.
 */
typedef int (*ss_render_fn)(void *state, const ss_event *events, int n_events,
                            float *out, int frames);

#define SS_OK              0
#define SS_ERR_FRAMES     -1  /* frames <= 0 or > max_block */
#define SS_ERR_STATE      -2  /* state pointer is NULL or not prepared */

/* Entry points every kernel module exports (csrc/ss_kernel_pool.h).  All but
 * sheafsynth_render are for the main thread; sheafsynth_render is real-time
 * safe and restores the caller's floating-point mode (FTZ/DAZ) on return. */
size_t sheafsynth_state_size(void);
int sheafsynth_init(void *state, uint32_t seed);
int sheafsynth_render(void *state, const ss_event *events, int n_events, float *out, int frames);
int sheafsynth_set_limiter(void *state, int on);
int sheafsynth_set_param_now(void *state, int index, float value);
int sheafsynth_set_ramp(void *state, int index, int samples);
float sheafsynth_get_param(void *state, int index);
int sheafsynth_voices(void *state, int32_t *status, int32_t *note, int n);
/* CDEF-END */

#endif /* SS_ABI_H */

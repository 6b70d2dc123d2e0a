"""Fixtures for host tests: a tiny C test kernel (the JACK server fixtures are in tests/conftest.py)."""

import os

import pytest

from sheafsynth.engine.backends.c.build import compile_module

# A test kernel implementing ss_render_fn with an ss_counters-first state.
# It plays a sine (a drone, or gated by notes), echoes every event it gets
# into arrays, and stamps CLOCK_MONOTONIC at the start of every render.
# The state struct, declared once for both the cdef and the C source.
TK_STATE_DECL = """
#define TK_ECHO 4096
#define TK_BLOCKS 8192
typedef struct tk_state {
    ss_counters counters;
    double freq;            /* Hz */
    double rate;            /* Hz */
    double phase;           /* cycles */
    float amp;              /* linear */
    float env;              /* current envelope */
    float release_mul;      /* per-sample envelope factor after release */
    int drone;              /* 1: sounds from the start without notes */
    int gate;
    int ignore_release;     /* 1: never stops ringing */
    int emit_nan;           /* 1: output NaN */
    int fail;               /* 1: return an error code */
    int n_echo;
    int32_t echo_block[TK_ECHO];
    int32_t echo_offset[TK_ECHO];
    int32_t echo_type[TK_ECHO];
    int32_t echo_a[TK_ECHO];
    float echo_value[TK_ECHO];
    int64_t render_ns[TK_BLOCKS];
    int32_t render_frames[TK_BLOCKS];
} tk_state;
"""

TEST_KERNEL_CDEF = """
typedef struct ss_event { int32_t offset; int32_t type; int32_t a; int32_t b; float value; } ss_event;
typedef struct ss_counters {
    uint64_t blocks; uint64_t frames; uint32_t voices_active; uint32_t voices_stolen;
    uint32_t guard_resets; uint32_t events_ignored; float peak; float limiter_gain;
} ss_counters;
""" + TK_STATE_DECL + """int tk_render(void *state, const ss_event *events, int n_events, float *out, int frames);
void tk_init(tk_state *s, double rate, double freq, float amp, int drone);
"""

TEST_KERNEL_SOURCE = r"""
#include <math.h>
#include <string.h>
#include <time.h>
#include "ss_abi.h"
""" + TK_STATE_DECL + r"""
void tk_init(tk_state *s, double rate, double freq, float amp, int drone)
{
    memset(s, 0, sizeof(*s));
    s->rate = rate;
    s->freq = freq;
    s->amp = amp;
    s->drone = drone;
    s->gate = drone;
    s->env = drone ? 1.0f : 0.0f;
    s->release_mul = 0.999f;
    s->counters.limiter_gain = 1.0f;
    s->counters.voices_active = drone ? 1u : 0u;
}

static void tk_apply(tk_state *s, const ss_event *e)
{
    int k = s->n_echo;
    if (k < TK_ECHO) {
        s->echo_block[k] = (int32_t)s->counters.blocks;
        s->echo_offset[k] = e->offset;
        s->echo_type[k] = e->type;
        s->echo_a[k] = e->a;
        s->echo_value[k] = e->value;
        s->n_echo = k + 1;
    }
    if (e->type == SS_EV_NOTE_ON) {
        s->gate = 1;
        s->env = 1.0f;
    } else if (e->type == SS_EV_NOTE_OFF || e->type == SS_EV_RELEASE_ALL
               || e->type == SS_EV_ALL_NOTES_OFF) {
        if (!s->ignore_release) s->gate = 0;
    } else if (e->type == SS_EV_ALL_SOUND_OFF) {
        s->gate = 0;
        s->env = 0.0f;
    }
}

int tk_render(void *state, const ss_event *events, int n_events, float *out, int frames)
{
    tk_state *s = (tk_state *)state;
    struct timespec ts;
    double inc;
    float peak = 0.0f;
    int i, e = 0;
    if (!s) return SS_ERR_STATE;
    if (frames <= 0) return SS_ERR_FRAMES;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    s->render_ns[s->counters.blocks % TK_BLOCKS] = (int64_t)ts.tv_sec * 1000000000LL + ts.tv_nsec;
    s->render_frames[s->counters.blocks % TK_BLOCKS] = frames;
    if (s->fail) return SS_ERR_STATE;
    inc = s->freq / s->rate;
    for (i = 0; i < frames; i++) {
        float y;
        while (e < n_events && events[e].offset <= i) tk_apply(s, &events[e++]);
        if (!s->gate) s->env *= s->release_mul;
        if (s->env < 1e-4f) s->env = 0.0f;
        y = s->amp * s->env * (float)sin(2.0 * 3.14159265358979323846 * s->phase);
        s->phase += inc;
        if (s->phase >= 1.0) s->phase -= 1.0;
        out[i] = s->emit_nan ? NAN : y;
        if (fabsf(y) > peak) peak = fabsf(y);
    }
    while (e < n_events) tk_apply(s, &events[e++]);
    s->counters.blocks++;
    s->counters.frames += (uint64_t)frames;
    s->counters.voices_active = (s->gate || s->env > 0.0f) ? 1u : 0u;
    s->counters.peak = peak;
    return SS_OK;
}
"""


@pytest.fixture(scope="session", autouse=True)
def _kernel_cache(tmp_path_factory):
    """Compile into a private cache directory for the test session."""
    old = os.environ.get("SHEAFSYNTH_CACHE_DIR")
    os.environ["SHEAFSYNTH_CACHE_DIR"] = str(tmp_path_factory.mktemp("kernels"))
    yield
    if old is None:
        os.environ.pop("SHEAFSYNTH_CACHE_DIR", None)
    else:
        os.environ["SHEAFSYNTH_CACHE_DIR"] = old


@pytest.fixture(scope="session")
def test_kernel(_kernel_cache):
    """The compiled test kernel module (strict flags)."""
    return compile_module(TEST_KERNEL_CDEF, TEST_KERNEL_SOURCE, tag="testk", strict=True)


@pytest.fixture
def make_kernel(test_kernel):
    """make_kernel(rate, freq, amp=0.5, drone=True) -> (render, state)."""
    ffi, lib = test_kernel.ffi, test_kernel.lib

    def make(rate, freq, amp=0.5, drone=True, **fields):
        state = ffi.new("tk_state *")
        lib.tk_init(state, float(rate), float(freq), float(amp), 1 if drone else 0)
        for name, value in fields.items():
            setattr(state, name, value)
        return ffi.addressof(lib, "tk_render"), state

    return make


# jack_server and jack_device live in tests/conftest.py (shared with tests/hardening).

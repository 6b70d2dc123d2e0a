/*
 * ss_lv2.c -- the LV2 plugin wrapper around generated sheafsynth kernels.
 *
 * One bundle's shared object links this file with one generated kernel per
 * supported sample rate.  Each kernel object was compiled with its exported
 * entry points renamed to ssk<RATE>_* (engine/backends/lv2/bundle.py), and
 * "ss_lv2_config.h" (generated next to it: numbers, validated URIs and
 * nothing else from the preset) lists the rates, the parameters' ranges and
 * state keys, the bend range and the playable notes.
 *
 * Ports: 0 = atom sequence of midi:MidiEvent in, 1 = mono audio out,
 * 2 .. 2 + SSL_NPARAM - 1 = one control input per preset parameter.
 *
 * instantiate accepts only the rates in SSL_KERNELS (otherwise NULL) and
 * needs urid:map and nothing else.  run() is real-time safe: no allocation,
 * no locks, no I/O; a run of any length is split into kernel blocks of at
 * most SSL_MAXB frames, and MIDI events reach the kernel at their own frame
 * (sample-accurate).  A changed control port becomes a ramped parameter
 * event at the start of the run (the kernel's certified ramp applies).
 * The preset's controller bindings (CC, velocity, channel pressure) move
 * their parameters at the message's frame; whichever moved last, a control
 * port or a controller, sets the value.
 * The output limiter is always on.  State (LV2 state) saves and restores the
 * parameter values, one atom:Float per parameter.
 */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <lv2/atom/atom.h>
#include <lv2/atom/util.h>
#include <lv2/core/lv2.h>
#include <lv2/midi/midi.h>
#include <lv2/state/state.h>
#include <lv2/urid/urid.h>

#include "ss_abi.h"
#include "ss_lv2_config.h"

#define SSL_PER_MSG (2 + SSL_NBIND)   /* most kernel events one MIDI message can make */
/* room for every knob's event, then at least 512 MIDI events, per kernel block */
#define SSL_EVENT_CAP (512 + SSL_NPARAM + SSL_PER_MSG)
#define SSL_PORT_MIDI 0
#define SSL_PORT_OUT 1
#define SSL_PORT_PARAM0 2

/* The kernels' renamed entry points, declared once per rate. */
#define SSL_DECLARE(R)                                                               \
    size_t ssk##R##_state_size(void);                                                \
    int ssk##R##_init(void *state, uint32_t seed);                                   \
    int ssk##R##_render(void *state, const ss_event *ev, int n, float *out, int frames); \
    int ssk##R##_set_limiter(void *state, int on);                                   \
    int ssk##R##_set_param_now(void *state, int index, float value);
SSL_KERNELS(SSL_DECLARE)

typedef struct ssl_kernel {
    double rate;
    size_t (*state_size)(void);
    int (*init)(void *, uint32_t);
    int (*render)(void *, const ss_event *, int, float *, int);
    int (*set_limiter)(void *, int);
    int (*set_param_now)(void *, int, float);
} ssl_kernel;

#define SSL_ENTRY(R) {(double)R, ssk##R##_state_size, ssk##R##_init, ssk##R##_render, \
                      ssk##R##_set_limiter, ssk##R##_set_param_now},
static const ssl_kernel ssl_kernels[] = {SSL_KERNELS(SSL_ENTRY)};
#define SSL_NKERNELS ((int)(sizeof(ssl_kernels) / sizeof(ssl_kernels[0])))

typedef struct ssl_plugin {
    const ssl_kernel *k;
    void *state;
    const LV2_Atom_Sequence *midi_in;
    float *out;
    const float *param_port[SSL_NPARAM + 1];
    float last_port[SSL_NPARAM + 1];   /* port values seen at the last run */
    float target[SSL_NPARAM + 1];      /* the value each parameter moves to */
    int fresh;                         /* no run yet */
    int restored;                      /* state restored before the first run */
    LV2_URID urid_midi_event;
    LV2_URID urid_float;
    LV2_URID urid_key[SSL_NPARAM + 1];
    ss_event events[SSL_EVENT_CAP];
} ssl_plugin;

static float ssl_clamp(int i, float v) {
    if (!isfinite(v)) return ssl_param_def[i];
    if (v < ssl_param_lo[i]) return ssl_param_lo[i];
    if (v > ssl_param_hi[i]) return ssl_param_hi[i];
    return v;
}

static LV2_Handle ssl_instantiate(const LV2_Descriptor *d, double rate, const char *path,
                                  const LV2_Feature *const *features) {
    const LV2_URID_Map *map = NULL;
    const ssl_kernel *k = NULL;
    ssl_plugin *p;
    int i;
    (void)d;
    (void)path;
    for (i = 0; features && features[i]; ++i)
        if (!strcmp(features[i]->URI, LV2_URID__map)) map = (const LV2_URID_Map *)features[i]->data;
    if (!map) return NULL;
    for (i = 0; i < SSL_NKERNELS; ++i)
        if (fabs(ssl_kernels[i].rate - rate) < 0.5) k = &ssl_kernels[i];
    if (!k) return NULL;                 /* a rate this bundle holds no kernel for */
    p = (ssl_plugin *)calloc(1, sizeof(ssl_plugin));
    if (!p) return NULL;
    p->k = k;
    p->state = calloc(1, k->state_size());
    if (!p->state || k->init(p->state, 0u) < 0 || k->set_limiter(p->state, 1) < 0) {
        free(p->state);
        free(p);
        return NULL;
    }
    for (i = 0; i < SSL_NPARAM; ++i) {
        p->target[i] = ssl_param_def[i];
        p->last_port[i] = ssl_param_def[i];
        p->urid_key[i] = map->map(map->handle, ssl_param_key[i]);
    }
    p->fresh = 1;
    p->urid_midi_event = map->map(map->handle, LV2_MIDI__MidiEvent);
    p->urid_float = map->map(map->handle, LV2_ATOM__Float);
    return (LV2_Handle)p;
}

static void ssl_connect(LV2_Handle h, uint32_t port, void *data) {
    ssl_plugin *p = (ssl_plugin *)h;
    if (port == SSL_PORT_MIDI) p->midi_in = (const LV2_Atom_Sequence *)data;
    else if (port == SSL_PORT_OUT) p->out = (float *)data;
    else if (port >= SSL_PORT_PARAM0 && port < SSL_PORT_PARAM0 + SSL_NPARAM)
        p->param_port[port - SSL_PORT_PARAM0] = (const float *)data;
}

static void ssl_activate(LV2_Handle h) { (void)h; }

/* The value of binding b at controller position x in [0, 1] (host/controls.py's curves). */
static float ssl_curve(const ssl_binding *b, double x) {
    double v = b->curve == 1 ? b->lo * pow(b->hi / b->lo, x) : b->lo + (b->hi - b->lo) * x;
    return (float)v;
}

/* Parameter events of every binding of `source` (and `cc`) at position x; returns how many. */
static int ssl_bound(ssl_plugin *p, int source, int cc, double x, int32_t offset, ss_event *e) {
    int k, n = 0;
    for (k = 0; k < SSL_NBIND; ++k) {
        const ssl_binding *b = &ssl_bindings[k];
        if (b->source != source || (source == 0 && b->cc != cc)) continue;
        e[n].offset = offset;
        e[n].type = SS_EV_PARAM;
        e[n].a = b->index;
        e[n].b = 0;
        e[n].value = ssl_curve(b, x);
        p->target[b->index] = ssl_clamp(b->index, e[n].value);
        ++n;
    }
    return n;
}

/* One MIDI message -> at most SSL_PER_MSG kernel events from e[0]; returns how many were written.
 * The mapping is host/controls.py's (omni; the bend range is fixed: RPN 0 is not followed). */
static int ssl_midi(ssl_plugin *p, const uint8_t *m, uint32_t size, int32_t offset, ss_event *e) {
    uint8_t st;
    if (size < 1) return 0;
    st = (uint8_t)(m[0] & 0xF0u);
    e->offset = offset;
    e->a = 0;
    e->b = 0;
    e->value = 0.0f;
    if ((st == 0x90u || st == 0x80u) && size >= 3) {
        int note = m[1] & 0x7F, vel = m[2] & 0x7F;
        e->a = note;
        if (st == 0x90u && vel > 0) {
            int k;
            if (note < SSL_NOTE_LO || note > SSL_NOTE_HI) return 0;   /* outside the playable range */
            k = ssl_bound(p, 1, -1, (double)vel / 127.0, offset, e);   /* velocity bindings first */
            e[k].offset = offset;
            e[k].type = SS_EV_NOTE_ON;
            e[k].a = note;
            e[k].b = vel;
            e[k].value = 0.0f;
            return k + 1;
        } else {
            e->type = SS_EV_NOTE_OFF;
        }
        return 1;
    }
    if (st == 0xE0u && size >= 3) {
        /* 14-bit, centre 8192: full down is -range, full up +range (host/controls.py) */
        int v = ((m[2] & 0x7F) << 7 | (m[1] & 0x7F)) - 8192;
        double x = (double)v / (v > 0 ? 8191.0 : 8192.0);
        e->type = SS_EV_BEND;
        e->value = (float)(x * SSL_BEND_RANGE);
        return 1;
    }
    if (st == 0xD0u && size >= 2) return ssl_bound(p, 2, -1, (double)(m[1] & 0x7F) / 127.0, offset, e);
    if (st == 0xB0u && size >= 3) {
        int cc = m[1] & 0x7F, val = m[2] & 0x7F;
        if (cc == 64) {
            e->type = SS_EV_SUSTAIN;
            e->b = val >= 64 ? 1 : 0;
            return 1;
        }
        if (cc == 120) {
            e->type = SS_EV_ALL_SOUND_OFF;
            return 1;
        }
        if (cc == 121) {            /* reset controllers: bend to centre, pedal up */
            e->type = SS_EV_BEND;
            e[1] = e[0];
            e[1].type = SS_EV_SUSTAIN;
            return 2;
        }
        if (cc == 123 || (cc >= 124 && cc <= 127)) {
            e->type = SS_EV_ALL_NOTES_OFF;
            return 1;
        }
        return ssl_bound(p, 0, cc, (double)val / 127.0, offset, e);
    }
    return 0;
}

static void ssl_run(LV2_Handle h, uint32_t n_samples) {
    ssl_plugin *p = (ssl_plugin *)h;
    const LV2_Atom_Event *it = NULL;
    uint32_t pos = 0;
    int n = 0, i;
    if (!p->out || n_samples == 0) return;     /* a port change waits for a run with frames */
    /* knobs: a changed port becomes a ramped parameter event at frame 0 */
    for (i = 0; i < SSL_NPARAM; ++i) {
        float v;
        if (!p->param_port[i]) continue;
        v = *p->param_port[i];
        if (p->fresh) {
            p->last_port[i] = v;
            if (!p->restored) {
                p->target[i] = ssl_clamp(i, v);
                p->k->set_param_now(p->state, i, p->target[i]);
            }
        } else if (v != p->last_port[i]) {
            p->last_port[i] = v;
            p->target[i] = ssl_clamp(i, v);
            p->events[n].offset = 0;
            p->events[n].type = SS_EV_PARAM;
            p->events[n].a = i;
            p->events[n].b = 0;
            p->events[n].value = p->target[i];
            ++n;
        }
    }
    p->fresh = 0;
    if (p->midi_in) {
        it = lv2_atom_sequence_begin(&p->midi_in->body);
        if (lv2_atom_sequence_is_end(&p->midi_in->body, p->midi_in->atom.size, it)) it = NULL;
    }
    while (pos < n_samples) {
        uint32_t len = n_samples - pos;
        if (len > SSL_MAXB) len = SSL_MAXB;
        while (it) {
            int64_t t = it->time.frames;
            if (t < (int64_t)pos) t = (int64_t)pos;     /* out of order: at once */
            if (t >= (int64_t)(pos + len)) break;
            if (n > SSL_EVENT_CAP - SSL_PER_MSG) {
                if (t > (int64_t)pos) len = (uint32_t)(t - (int64_t)pos);   /* render up to it first */
                else it = NULL;                         /* more than the buffer at one frame: drop */
                break;
            }
            if (it->body.type == p->urid_midi_event)
                n += ssl_midi(p, (const uint8_t *)(it + 1), it->body.size, (int32_t)(t - (int64_t)pos),
                              &p->events[n]);
            it = lv2_atom_sequence_next(it);
            if (lv2_atom_sequence_is_end(&p->midi_in->body, p->midi_in->atom.size, it)) it = NULL;
        }
        p->k->render(p->state, p->events, n, p->out + pos, (int)len);
        n = 0;
        pos += len;
    }
}

static void ssl_deactivate(LV2_Handle h) { (void)h; }

static void ssl_cleanup(LV2_Handle h) {
    ssl_plugin *p = (ssl_plugin *)h;
    free(p->state);
    free(p);
}

/* ---- LV2 state: one atom:Float per parameter, keyed by its own URI ---- */

static LV2_State_Status ssl_save(LV2_Handle h, LV2_State_Store_Function store, LV2_State_Handle sh,
                                 uint32_t flags, const LV2_Feature *const *features) {
    ssl_plugin *p = (ssl_plugin *)h;
    int i;
    (void)flags;
    (void)features;
    for (i = 0; i < SSL_NPARAM; ++i) {
        LV2_State_Status st = store(sh, p->urid_key[i], &p->target[i], sizeof(float), p->urid_float,
                                    LV2_STATE_IS_POD | LV2_STATE_IS_PORTABLE);
        if (st != LV2_STATE_SUCCESS) return st;
    }
    return LV2_STATE_SUCCESS;
}

static LV2_State_Status ssl_restore(LV2_Handle h, LV2_State_Retrieve_Function retrieve, LV2_State_Handle sh,
                                    uint32_t flags, const LV2_Feature *const *features) {
    ssl_plugin *p = (ssl_plugin *)h;
    int i;
    (void)flags;
    (void)features;
    for (i = 0; i < SSL_NPARAM; ++i) {
        size_t size = 0;
        uint32_t type = 0, vflags = 0;
        const void *v = retrieve(sh, p->urid_key[i], &size, &type, &vflags);
        float x;
        if (!v || type != p->urid_float || size != sizeof(float)) continue;   /* keep the current value */
        memcpy(&x, v, sizeof(float));
        p->target[i] = ssl_clamp(i, x);
        p->k->set_param_now(p->state, i, p->target[i]);
    }
    p->restored = 1;
    return LV2_STATE_SUCCESS;
}

static const LV2_State_Interface ssl_state_iface = {ssl_save, ssl_restore};

static const void *ssl_extension_data(const char *uri) {
    if (!strcmp(uri, LV2_STATE__interface)) return &ssl_state_iface;
    return NULL;
}

static const LV2_Descriptor ssl_descriptor = {
    SSL_URI, ssl_instantiate, ssl_connect, ssl_activate, ssl_run, ssl_deactivate, ssl_cleanup,
    ssl_extension_data,
};

LV2_SYMBOL_EXPORT const LV2_Descriptor *lv2_descriptor(uint32_t index) {
    return index == 0 ? &ssl_descriptor : NULL;
}

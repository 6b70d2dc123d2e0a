/*
 * ss_kernel_pool.h -- the voice pool and the exported render entry point.
 *
 * Included at the end of every generated kernel, after the generated code
 * has defined (all static, all prefixed):
 *   SSK_POLY, SSK_NPARAM, SSK_NCOEF, SSK_MAXB, SSK_RATE, SSK_FADE,
 *   SSK_EXC_IMPULSE, SSK_EXC_LEN (0 = one period), SSK_EXC_BRIGHT, SSK_EXC_BRIGHT_EXP
 *   (the brightness pole is 0.9 (1 - vel/127) at 48 kHz, raised to 48000/rate), SSK_EXC_GAIN,
 *   SSK_GUARD, SSK_SIL_RELEASED, SSK_SIL_HELD, SSK_HELD_QUIET, SSK_MAX_BEND,
 *   SSK_LIM_CEIL, SSK_LIM_REL_S,
 *   ssk_param_lo[], ssk_param_hi[], ssk_param_def[], ssk_param_ramp[] (samples),
 *   ssk_voice (starting with SS_VOICE_COMMON), ssk_state (starting with SS_STATE_COMMON),
 *   ssk_voice_reset, ssk_tune, ssk_release_gains, ssk_coef_static, ssk_coef_traj,
 *   ssk_voice_render (returns the segment's peak |out|, or -1 when a sample
 *   was non-finite or beyond SSK_GUARD: the guard runs inside the loop),
 *   ssk_voice_prefetch (a cache hint for the voice rendered next).
 *
 * The life cycle and every number match engine/voicing.py and
 * engine/reference.py (the oracle the kernel is tested against).
 * Real-time rules: no allocation, no locks, no I/O, bounded work per block.
 */
#ifndef SS_KERNEL_POOL_H
#define SS_KERNEL_POOL_H

static void ssk_release(ssk_state *S, ssk_voice *v) {
    v->status = SS_RELEASED;
    ssk_release_gains(S, v);
}

static void ssk_clear(ssk_voice *v) {
    v->status = SS_FREE;
    v->pend_note = -1;
}

static void ssk_start(ssk_state *S, ssk_voice *v, int note, int vel) {
    S->started += 1u;
    v->status = SS_HELD;
    v->note = note;
    v->vel = vel;
    v->order = S->started;
    v->pend_note = -1;
    v->pend_release = 0;
    v->fade_left = -1;
    v->rng = ss_seed_voice(S->seed, S->started);
    v->peak = 0.0f;
    v->quiet = 0;
    v->pos = 0u;
    ssk_voice_reset(v);
    ssk_tune(S, v, 0);
    v->exc_amp = (float)(SSK_EXC_GAIN * (double)vel / 127.0);
    v->exc_y = 0.0f;
    if (SSK_EXC_IMPULSE) {
        v->exc_left = 1;
        v->exc_pole = 0.0f;
    } else {
        int len = SSK_EXC_LEN;
        if (len <= 0) {
            len = (int)floor(SSK_RATE / ss_note_hz((double)note + (double)S->bend) + 0.5);
            if (len < 1) len = 1;
        }
        v->exc_left = len;
        if (SSK_EXC_BRIGHT) {
            double q = 0.9 * (1.0 - (double)vel / 127.0);     /* the pole at 48 kHz */
            if (SSK_EXC_BRIGHT_EXP != 1.0 && q > 0.0) q = pow(q, SSK_EXC_BRIGHT_EXP);
            v->exc_pole = (float)q;
        } else {
            v->exc_pole = 0.0f;
        }
    }
}

static void ssk_event(ssk_state *S, const ss_event *e) {
    int i, typ = e->type, a = e->a, b = e->b;
    ssk_voice *vs = S->voices;
    if (typ == SS_EV_NOTE_ON && b == 0) typ = SS_EV_NOTE_OFF;
    switch (typ) {
    case SS_EV_NOTE_ON: {
        ssk_voice *victim = NULL;
        int want;
        if (a < 0 || a > 127 || b < 1 || b > 127) { S->counters.events_ignored++; return; }
        for (i = 0; i < SSK_POLY; ++i)
            if ((vs[i].status == SS_HELD || vs[i].status == SS_SUSTAINED) && vs[i].note == a)
                ssk_release(S, &vs[i]);
        for (i = 0; i < SSK_POLY; ++i)
            if (vs[i].status == SS_FREE) { ssk_start(S, &vs[i], a, b); return; }
        for (want = 0; want < 3 && victim == NULL; ++want) {
            int st = want == 0 ? SS_RELEASED : (want == 1 ? SS_SUSTAINED : SS_HELD);
            for (i = 0; i < SSK_POLY; ++i)
                if (vs[i].status == st && (victim == NULL || vs[i].order < victim->order))
                    victim = &vs[i];
        }
        if (victim == NULL) {
            for (i = 0; i < SSK_POLY; ++i)
                if (victim == NULL || vs[i].order < victim->order) victim = &vs[i];
        } else {
            S->counters.voices_stolen++;
            victim->status = SS_FADING;
            victim->fade_left = SSK_FADE;
        }
        victim->pend_note = a;
        victim->pend_vel = b;
        victim->pend_release = 0;
        return;
    }
    case SS_EV_NOTE_OFF:
        if (a < 0 || a > 127) { S->counters.events_ignored++; return; }
        for (i = 0; i < SSK_POLY; ++i) {
            if (vs[i].status == SS_HELD && vs[i].note == a) {
                if (S->sustain) vs[i].status = SS_SUSTAINED;
                else ssk_release(S, &vs[i]);
            }
            if (vs[i].status == SS_FADING && vs[i].pend_note == a) vs[i].pend_release = 1;
        }
        return;
    case SS_EV_PARAM:
        if (a < 0 || a >= SSK_NPARAM || !isfinite(e->value)) { S->counters.events_ignored++; return; }
        {
            float x = e->value;
            if (x < ssk_param_lo[a]) x = ssk_param_lo[a];
            if (x > ssk_param_hi[a]) x = ssk_param_hi[a];
            S->p_tgt[a] = x;
            /* a linear ramp over a fixed time: small steps are smoothed as much
               as large ones, and the slope never exceeds range / ramp time */
            S->p_left[a] = S->p_ramp[a];
            S->p_step[a] = (float)(((double)x - (double)S->p_cur[a]) / (double)S->p_ramp[a]);
        }
        return;
    case SS_EV_BEND:
        if (!isfinite(e->value)) { S->counters.events_ignored++; return; }
        {
            float x = e->value;
            if (x < -SSK_MAX_BEND) x = -SSK_MAX_BEND;
            if (x > SSK_MAX_BEND) x = SSK_MAX_BEND;
            S->bend = x;
            S->retune |= 2;   /* pitch moved: choose lengths afresh */
        }
        return;
    case SS_EV_SUSTAIN:
        S->sustain = b != 0;
        if (!S->sustain)
            for (i = 0; i < SSK_POLY; ++i)
                if (vs[i].status == SS_SUSTAINED) ssk_release(S, &vs[i]);
        return;
    case SS_EV_ALL_NOTES_OFF:
    case SS_EV_RELEASE_ALL:
        if (typ == SS_EV_RELEASE_ALL) S->sustain = 0;
        for (i = 0; i < SSK_POLY; ++i) {
            if (vs[i].status == SS_HELD) {
                if (S->sustain) vs[i].status = SS_SUSTAINED;
                else ssk_release(S, &vs[i]);
            } else if (vs[i].status == SS_SUSTAINED && !S->sustain) {
                ssk_release(S, &vs[i]);
            }
            if (vs[i].status == SS_FADING && vs[i].pend_note >= 0) vs[i].pend_release = 1;
        }
        return;
    case SS_EV_ALL_SOUND_OFF:
        for (i = 0; i < SSK_POLY; ++i) {
            if (vs[i].status != SS_FREE) {
                if (vs[i].status != SS_FADING) vs[i].fade_left = SSK_FADE;
                vs[i].status = SS_FADING;
                vs[i].pend_note = -1;
            }
        }
        return;
    default:
        S->counters.events_ignored++;
        return;
    }
}

static void ssk_segment(ssk_state *S, int a, int b) {
    int i, n, p, moving = 0;
    for (p = 0; p < SSK_NPARAM; ++p)
        if (S->p_left[p] > 0) moving = 1;
    if (moving) {
        for (n = a; n < b; ++n) {
            for (p = 0; p < SSK_NPARAM; ++p) {
                if (S->p_left[p] > 1) {
                    S->p_cur[p] = S->p_cur[p] + S->p_step[p];
                    S->p_left[p] -= 1;
                } else if (S->p_left[p] == 1) {
                    S->p_cur[p] = S->p_tgt[p];
                    S->p_left[p] = 0;
                }
                S->ptraj[p][n] = S->p_cur[p];
            }
        }
        ssk_coef_traj(S, a, b);
        S->retune = 1;
    } else {
        ssk_coef_static(S);
    }
    for (i = 0; i < SSK_POLY; ++i) {
        ssk_voice *v = &S->voices[i];
        float peak = 0.0f;
        int bad = 0;
        if (v->status == SS_FREE) continue;
        /* with many voices the next ones are not in cache: ask for them early */
        if (i + 2 < SSK_POLY) SS_PREFETCH(&S->voices[i + 2], 0);
        if (i + 1 < SSK_POLY && S->voices[i + 1].status != SS_FREE) ssk_voice_prefetch(&S->voices[i + 1], b - a);
        peak = ssk_voice_render(S, v, S->scratch, a, b, moving);
        bad = !(peak >= 0.0f);
        if (bad) {
            S->counters.guard_resets++;
            ssk_clear(v);
            continue;
        }
        if (peak > v->peak) v->peak = peak;
        for (n = a; n < b; ++n) S->mix[n] += S->scratch[n];
    }
}

static void ssk_housekeeping(ssk_state *S, int frames) {
    int i;
    uint32_t active = 0;
    for (i = 0; i < SSK_POLY; ++i) {
        ssk_voice *v = &S->voices[i];
        if (v->status == SS_FADING && v->fade_left == 0) {
            int pn = v->pend_note, pv = v->pend_vel, pr = v->pend_release;
            ssk_clear(v);
            if (pn >= 0) {
                ssk_start(S, v, pn, pv);
                if (pr) {
                    if (S->sustain) v->status = SS_SUSTAINED;
                    else ssk_release(S, v);
                }
            }
        } else if (v->status == SS_RELEASED && v->peak < (float)SSK_SIL_RELEASED) {
            ssk_clear(v);
        } else if (v->status == SS_HELD || v->status == SS_SUSTAINED) {
            if (v->peak < (float)SSK_SIL_HELD) {
                v->quiet += frames;
                if ((double)v->quiet >= SSK_HELD_QUIET * SSK_RATE) ssk_clear(v);
            } else {
                v->quiet = 0;
            }
        }
        if (v->status != SS_FREE) active++;
        v->peak = 0.0f;         /* the next block's peak (one pass over the pool fewer) */
    }
    S->counters.voices_active = active;
}

/* ---- exported API (the only non-static symbols of a kernel module) ---- */

size_t sheafsynth_state_size(void) { return sizeof(ssk_state); }

int sheafsynth_init(void *state, uint32_t seed) {
    ssk_state *S = (ssk_state *)state;
    int p, i;
    if (!S) return SS_ERR_STATE;
    memset(S, 0, sizeof(*S));
    S->seed = seed;
    S->rate = SSK_RATE;
    S->inv_fade = (float)(1.0 / (double)SSK_FADE);
    for (p = 0; p < SSK_NPARAM; ++p) {
        S->p_cur[p] = S->p_tgt[p] = ssk_param_def[p];
        S->p_ramp[p] = ssk_param_ramp[p];
        S->p_left[p] = 0;
        S->p_step[p] = 0.0f;
    }
    for (i = 0; i < SSK_POLY; ++i) ssk_clear(&S->voices[i]);
    ss_limiter_init(&S->lim, SSK_RATE, SSK_LIM_REL_S, (float)SSK_LIM_CEIL);
    S->counters.limiter_gain = 1.0f;
    S->prepared = 1;
    return SS_OK;
}

int sheafsynth_set_limiter(void *state, int on) {
    ssk_state *S = (ssk_state *)state;
    if (!S || !S->prepared) return SS_ERR_STATE;
    S->lim.on = on ? 1 : 0;
    return SS_OK;
}

int sheafsynth_set_param_now(void *state, int index, float value) {
    ssk_state *S = (ssk_state *)state;
    if (!S || !S->prepared) return SS_ERR_STATE;
    if (index < 0 || index >= SSK_NPARAM || !isfinite(value)) return SS_ERR_STATE;
    if (value < ssk_param_lo[index]) value = ssk_param_lo[index];
    if (value > ssk_param_hi[index]) value = ssk_param_hi[index];
    S->p_cur[index] = S->p_tgt[index] = value;
    S->p_left[index] = 0;
    S->retune = 1;
    return SS_OK;
}

int sheafsynth_set_ramp(void *state, int index, int samples) {
    ssk_state *S = (ssk_state *)state;
    if (!S || !S->prepared) return SS_ERR_STATE;
    if (index < 0 || index >= SSK_NPARAM || samples < 1) return SS_ERR_STATE;
    S->p_ramp[index] = samples;
    return SS_OK;
}

float sheafsynth_get_param(void *state, int index) {
    ssk_state *S = (ssk_state *)state;
    if (!S || index < 0 || index >= SSK_NPARAM) return 0.0f;
    return S->p_cur[index];
}

int sheafsynth_voices(void *state, int32_t *status, int32_t *note, int n) {
    ssk_state *S = (ssk_state *)state;
    int i;
    if (!S || !S->prepared) return SS_ERR_STATE;
    for (i = 0; i < n && i < SSK_POLY; ++i) {
        status[i] = S->voices[i].status;
        note[i] = S->voices[i].note;
    }
    return i;
}

int sheafsynth_render(void *state, const ss_event *events, int n_events, float *out, int frames) {
    ssk_state *S = (ssk_state *)state;
    ss_fpstate fp;
    int i, j = 0, n;
    if (!S || !S->prepared) return SS_ERR_STATE;
    if (frames <= 0 || frames > SSK_MAXB) return SS_ERR_FRAMES;
    fp = ss_ftz_enter();
    if (S->retune) {
        int keep = !(S->retune & 2);   /* knobs only: keep delay lengths while possible */
        for (i = 0; i < SSK_POLY; ++i)
            if (S->voices[i].status != SS_FREE) ssk_tune(S, &S->voices[i], keep);
        S->retune = 0;
    }
    for (n = 0; n < frames; ++n) S->mix[n] = 0.0f;
    /* every voice's peak is 0 here: ssk_start and ssk_housekeeping reset it */
    i = 0;
    while (i < frames) {
        int next;
        while (j < n_events) {
            int off = events[j].offset;
            if (off < 0) off = 0;
            if (off > frames - 1) off = frames - 1;
            if (off > i) break;
            ssk_event(S, &events[j]);
            ++j;
        }
        next = frames;
        if (j < n_events) {
            int off = events[j].offset;
            if (off < 0) off = 0;
            if (off > frames - 1) off = frames - 1;
            next = off;
        }
        ssk_segment(S, i, next);
        i = next;
    }
    ssk_housekeeping(S, frames);
    S->counters.peak = ss_limiter_run(&S->lim, S->mix, frames);
    S->counters.limiter_gain = S->lim.gain;
    for (n = 0; n < frames; ++n) out[n] = S->mix[n];
    S->counters.blocks++;
    S->counters.frames += (uint64_t)frames;
    ss_ftz_leave(fp);
    return SS_OK;
}

#endif /* SS_KERNEL_POOL_H */

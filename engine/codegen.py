"""Step program -> C source of one kernel module.

The generated file defines the voice and state structs, the per-block
coefficient evaluation, the pitch tuning, and two specialised sample loops
per voice (coefficients constant within the segment, or ramping); then it
includes ``csrc/ss_kernel_pool.h``, the hand-written voice pool and the
exported entry points.

Safety rules (DESIGN §4): every identifier is generated from indices, never
from preset text; no preset text appears even in comments; every number is
checked finite before it is printed; every symbol but the exported API is
``static`` and prefixed ``ssk_``.
"""

from __future__ import annotations

import math

import numpy as np

from .affine import Affine
from .errors import BuildError
from .lower import (GUARD_LIMIT, HELD_QUIET_S, LIMITER_RELEASE_S, MAX_BEND_SEMITONES, RAMP_FADE_S,
                    SILENCE_HELD, SILENCE_RELEASED, StepProgram)
from .voicing import fade_samples

CDEF = """
typedef struct ss_event { int32_t offset; int32_t type; int32_t a; int32_t b; float value; } ss_event;
typedef struct ss_counters {
    uint64_t blocks; uint64_t frames; uint32_t voices_active; uint32_t voices_stolen;
    uint32_t guard_resets; uint32_t events_ignored; float peak; float limiter_gain;
} ss_counters;
size_t sheafsynth_state_size(void);
int sheafsynth_init(void *state, uint32_t seed);
int sheafsynth_render(void *state, const ss_event *events, int n_events, float *out, int frames);
int sheafsynth_set_limiter(void *state, int on);
int sheafsynth_set_param_now(void *state, int index, float value);
int sheafsynth_set_ramp(void *state, int index, int samples);
float sheafsynth_get_param(void *state, int index);
int sheafsynth_voices(void *state, int32_t *status, int32_t *note, int n);
"""


def num(x: float) -> str:
    """A finite float as a C float literal (exact float32 round trip)."""
    x = float(x)
    if not math.isfinite(x):
        raise BuildError(f"refusing to print a non-finite number ({x!r}) into C source")
    if abs(x) > 3.4028234663852886e38:
        raise BuildError(f"number {x!r} overflows a C float")
    f = float(np.float32(x))
    s = repr(f)
    if "e" not in s and "." not in s and "inf" not in s:
        s += ".0"
    return s + "f"


def dnum(x: float) -> str:
    """A finite float as a C double literal."""
    x = float(x)
    if not math.isfinite(x):
        raise BuildError(f"refusing to print a non-finite number ({x!r}) into C source")
    s = repr(x)
    if "e" not in s and "." not in s:
        s += ".0"
    return s


class _Coefs:
    """Interns parameter-dependent coefficients into numbered slots."""

    def __init__(self, prog: StepProgram):
        self.pidx = prog.param_index
        self.slots: dict[tuple, int] = {}
        self.exprs: list[Affine] = []

    def slot(self, e: Affine) -> int:
        key = (e.const, e.terms)
        if key not in self.slots:
            self.slots[key] = len(self.exprs)
            self.exprs.append(e)
        return self.slots[key]

    def c_value(self, e: Affine, src: str) -> str:
        """C double expression of a param-only Affine; ``src`` formats p index."""
        out = dnum(e.const)
        for s, c in e.terms:
            out += f" + {dnum(c)} * (double){src.format(self.pidx[s])}"
        return out


class _Ctx:
    def __init__(self, prog: StepProgram, coefs: _Coefs, moving: bool):
        self.prog, self.coefs, self.moving = prog, coefs, moving
        self.tune_sym = {}
        for b in prog.blocks:
            if b.tune_symbol:
                self.tune_sym[f"@tune{b.loop}"] = f"t{b.loop}"
                self.tune_sym[f"@tunec{b.loop}"] = f"tc{b.loop}"

    def coef(self, e: Affine) -> str | None:
        """C float expression for an entry; None when it is exactly zero."""
        if e.is_zero:
            return None
        pterms = tuple((s, c) for s, c in e.terms if not s.startswith("@"))
        vterms = [(s, c) for s, c in e.terms if s.startswith("@")]
        parts = []
        if pterms:
            k = self.coefs.slot(Affine(e.const, pterms))
            parts.append(f"S->ctraj[{k}][n]" if self.moving else f"c{k}")
        elif e.const != 0.0 or not vterms:
            parts.append(num(e.const))
        for s, c in vterms:
            if s not in self.tune_sym:
                raise BuildError("internal: unknown voice symbol in step program")
            parts.append(self.tune_sym[s] if c == 1.0 else f"{num(c)} * {self.tune_sym[s]}")
        return "(" + " + ".join(parts) + ")" if len(parts) > 1 else parts[0]


def _dot(pairs: list[tuple[str | None, str]]) -> str:
    terms = []
    for c, x in pairs:
        if c is None:
            continue
        if c == "1.0f":
            terms.append(x)
        elif c == "-1.0f":
            terms.append(f"-{x}")
        else:
            terms.append(f"{c} * {x}")
    if not terms:
        return "0.0f"
    out = terms[0]
    for t in terms[1:]:
        out += f" - {t[1:]}" if t.startswith("-") else f" + {t}"
    return out


def _sig(i: int) -> str:
    return f"x{i}"


def _voice_loop(prog: StepProgram, ctx: _Ctx, name: str) -> str:
    """One specialised sample loop for a voice over [a, b)."""
    L: list[str] = []
    w = L.append
    w(f"static void {name}(ssk_state *S, ssk_voice *v, float *out, int a, int b) {{")
    w("    int n;")
    w("    uint32_t pos = v->pos;")
    w("    int32_t fade = v->fade_left;")
    w("    uint32_t rng = v->rng;")
    w("    int32_t exl = v->exc_left;")
    w("    float exy = v->exc_y;")
    w("    const float exa = v->exc_amp, exq = v->exc_pole;")
    w("    (void)exq;")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    float *r{b.index} = v->ring{b.index};")
            w(f"    const uint32_t l{b.index} = (uint32_t)v->len{b.index};")
            w(f"    const float g{b.index} = v->relg{b.index};")
        else:
            for j in range(b.n_state):
                w(f"    float s{b.index}_{j} = v->st{b.index}[{j}];")
    for b in prog.blocks:
        if b.tune_symbol:
            w(f"    const float t{b.loop} = v->tune{b.loop};")
            w(f"    const float tc{b.loop} = v->tunec{b.loop};")
            w(f"    (void)t{b.loop};")
            w(f"    (void)tc{b.loop};")
    body: list[str] = []
    o = body.append

    def gather(blk) -> None:
        for p, port in enumerate(blk.inputs):
            o(f"        const float u{blk.index}_{p} = "
              f"{_dot([(ctx.coef(t.gain), _sig(t.signal)) for t in port])};")

    o("        float x0 = 0.0f;")
    o("        if (exl > 0) {")
    if prog.excitation.get("kind", "noise") == "impulse":
        o("            x0 = exa;")
    else:
        o("            rng = ss_xorshift32(rng);")
        o("            exy = (1.0f - exq) * ss_noise_value(rng) + exq * exy;")
        o("            x0 = exa * exy;")
    o("            exl--;")
    o("        }")
    for b in prog.blocks:
        if b.is_delay:
            mask = prog.ring_size[b.index] - 1
            o(f"        const float {_sig(b.out_signal)} = r{b.index}[(pos - l{b.index}) & {mask}u];")
        elif not b.feedthrough:
            for r in range(b.n_out):
                pairs = [(ctx.coef(b.C[r, j]), f"s{b.index}_{j}") for j in range(b.n_state)]
                o(f"        const float {_sig(b.out_signal + r)} = {_dot(pairs)};")
    for bi in prog.order:
        b = prog.blocks[bi]
        gather(b)
        for r in range(b.n_out):
            pairs = [(ctx.coef(b.D[r, p]), f"u{bi}_{p}") for p in range(b.n_in)]
            pairs += [(ctx.coef(b.C[r, j]), f"s{bi}_{j}") for j in range(b.n_state)]
            o(f"        const float {_sig(b.out_signal + r)} = {_dot(pairs)};")
    for b in prog.blocks:
        if not b.feedthrough:
            gather(b)
    for b in prog.blocks:
        if b.is_delay:
            mask = prog.ring_size[b.index] - 1
            o(f"        r{b.index}[pos & {mask}u] = u{b.index}_0 * g{b.index};")
        elif b.n_state:
            o("        {")
            for i in range(b.n_state):
                pairs = [(ctx.coef(b.A[i, j]), f"s{b.index}_{j}") for j in range(b.n_state)]
                pairs += [(ctx.coef(b.B[i, p]), f"u{b.index}_{p}") for p in range(b.n_in)]
                o(f"            const float q{i} = {_dot(pairs)};")
            for i in range(b.n_state):
                o(f"            s{b.index}_{i} = q{i};")
            o("        }")
    o("        pos++;")
    o(f"        float y = {_dot([(ctx.coef(t.gain), _sig(t.signal)) for t in prog.out_terms])};")
    o("        if (fade >= 0) {")
    o("            y *= (float)fade * S->inv_fade;")
    o("            if (fade > 0) fade--;")
    o("        }")
    o("        out[n] = y;")
    # coefficient locals for the static loop (after body so slots are known)
    if not ctx.moving:
        for k in range(len(ctx.coefs.exprs)):
            w(f"    const float c{k} = S->cval[{k}];")
    w("    for (n = a; n < b; ++n) {")
    L.extend(body)
    w("    }")
    w("    v->pos = pos;")
    w("    v->fade_left = fade;")
    w("    v->rng = rng;")
    w("    v->exc_left = exl;")
    w("    v->exc_y = exy;")
    for b in prog.blocks:
        if not b.is_delay:
            for j in range(b.n_state):
                w(f"    v->st{b.index}[{j}] = s{b.index}_{j};")
    w("    (void)S;")
    w("}")
    return "\n".join(L)


def _tune_fn(prog: StepProgram, coefs: _Coefs) -> str:
    L: list[str] = []
    w = L.append
    w("static void ssk_tune(ssk_state *S, ssk_voice *v, int keep) {")
    w("    const double pitch = (double)v->note + (double)S->bend;")
    w("    (void)pitch;")
    w("    (void)keep;")
    for lp in prog.loops:
        d = prog.blocks[lp.delay]
        ring = prog.ring_size[lp.delay]
        w("    {")
        w(f"        const double f = ss_note_hz(pitch) * {dnum(d.pitch_ratio)} * "
          f"pow(2.0, {dnum(d.pitch_cents)} / 1200.0);")
        w("        const double period = SSK_RATE / f;")
        w("        const double w = 2.0 * 3.14159265358979323846 * f / SSK_RATE;")
        w("        double rest = 0.0, need;")
        w("        int32_t nl;")
        for st in lp.steps:
            if st.block == lp.tuner:
                continue
            b = prog.blocks[st.block]
            if b.is_delay:
                w(f"        rest += {dnum(b.delay_length)};")
                continue
            k = b.n_state

            def cval(e: Affine) -> str:
                return "(" + coefs.c_value(e, "S->p_cur[{}]") + ")"

            w("        {")
            if k:
                w(f"            double A[{k * k}], B[{k}], C[{k}];")
                for i in range(k):
                    for j in range(k):
                        w(f"            A[{i * k + j}] = {cval(b.A[i, j])};")
                    w(f"            B[{i}] = {cval(b.B[i, st.in_port])};")
                    w(f"            C[{i}] = {cval(b.C[st.out_port, i])};")
                w(f"            rest += -ss_block_phase({k}, A, B, C, {cval(b.D[st.out_port, st.in_port])}, w) / w;")
            else:
                w(f"            rest += -ss_block_phase(0, 0, 0, 0, {cval(b.D[st.out_port, st.in_port])}, w) / w;")
            w("        }")
        for g in lp.gains:
            w(f"        if (({coefs.c_value(g, 'S->p_cur[{}]')}) < 0.0) rest -= 3.14159265358979323846 / w;")
        w("        need = period - rest;")
        w("        while (need < 1.5) need += period;")
        if lp.tuner is not None:
            w(f"        if (keep && need - (double)v->len{lp.delay} >= 0.02 && need - (double)v->len{lp.delay} <= 1.98)")
            w(f"            nl = v->len{lp.delay};")
            w("        else")
            w("            nl = (int32_t)floor(need - 0.5);")
        else:
            w(f"        if (keep && fabs(need - (double)v->len{lp.delay}) < 1.0)")
            w(f"            nl = v->len{lp.delay};")
            w("        else")
            w("            nl = (int32_t)floor(need + 0.5);")
        w("        if (nl < 1) nl = 1;")
        w(f"        if (nl > {ring - 2}) nl = {ring - 2};")
        w(f"        v->len{lp.delay} = nl;")
        if lp.tuner is not None:
            w("        {")
            w("            double tau = need - (double)nl;")
            w("            if (tau < 0.02) tau = 0.02;")
            w("            if (tau > 1.98) tau = 1.98;")
            w(f"            v->tune{lp.index} = (float)ss_allpass_coef(tau, w);")
            w(f"            v->tunec{lp.index} = (float)sqrt(1.0 - (double)v->tune{lp.index} * (double)v->tune{lp.index});")
            w("        }")
        w("    }")
    w("    if (v->status == SS_RELEASED) ssk_release_gains(S, v);")
    w("}")
    return "\n".join(L)


def generate(prog: StepProgram) -> str:
    """The complete C source of the kernel module for ``prog``."""
    np_ = len(prog.params)
    coefs = _Coefs(prog)
    loops = [_voice_loop(prog, _Ctx(prog, coefs, False), "ssk_vr_static"),
             _voice_loop(prog, _Ctx(prog, coefs, True), "ssk_vr_moving")]
    ncoef = len(coefs.exprs)
    exc = prog.excitation
    exc_len = exc.get("length", "period")
    L: list[str] = []
    w = L.append
    w("/* Generated by sheafsynth engine.codegen -- do not edit. */")
    w('#include "ss_kernel_rt.h"')
    w("")
    w(f"#define SSK_POLY {int(prog.polyphony)}")
    w(f"#define SSK_NPARAM {np_}")
    w(f"#define SSK_NCOEF {ncoef}")
    w(f"#define SSK_MAXB {int(prog.max_block)}")
    w(f"#define SSK_RATE {dnum(prog.rate)}")
    w(f"#define SSK_FADE {fade_samples(prog.rate, RAMP_FADE_S)}")
    w(f"#define SSK_EXC_IMPULSE {1 if exc.get('kind', 'noise') == 'impulse' else 0}")
    w(f"#define SSK_EXC_LEN {0 if exc_len == 'period' else int(exc_len)}")
    w(f"#define SSK_EXC_BRIGHT {1 if exc.get('velocity_brightness', False) else 0}")
    w(f"#define SSK_EXC_GAIN {dnum(float(exc.get('gain', 1.0)))}")
    w(f"#define SSK_GUARD {dnum(GUARD_LIMIT)}")
    w(f"#define SSK_SIL_RELEASED {dnum(SILENCE_RELEASED)}")
    w(f"#define SSK_SIL_HELD {dnum(SILENCE_HELD)}")
    w(f"#define SSK_HELD_QUIET {dnum(HELD_QUIET_S)}")
    w(f"#define SSK_MAX_BEND {num(MAX_BEND_SEMITONES)}")
    w(f"#define SSK_LIM_CEIL {dnum(prog.limiter_ceiling)}")
    w(f"#define SSK_LIM_REL_S {dnum(LIMITER_RELEASE_S)}")
    w(f"#define SSK_RELEASE_DECAY {dnum(prog.release_decay)}")
    w("")

    def arr(name: str, vals) -> None:
        vals = list(vals) or [0.0]
        w(f"static const float {name}[{len(vals)}] = {{{', '.join(num(x) for x in vals)}}};")

    arr("ssk_param_lo", [p.lo for p in prog.params])
    arr("ssk_param_hi", [p.hi for p in prog.params])
    arr("ssk_param_def", [p.value for p in prog.params])
    ramps = [str(n) for n in prog.ramp_samples()] or ["1"]
    w(f"static const int32_t ssk_param_ramp[{len(ramps)}] = {{{', '.join(ramps)}}};")
    w("")
    w("typedef struct ssk_voice {")
    w("    SS_VOICE_COMMON")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    int32_t len{b.index};")
            w(f"    float relg{b.index};")
        elif b.n_state:
            w(f"    float st{b.index}[{b.n_state}];")
    for b in prog.blocks:
        if b.tune_symbol:
            w(f"    float tune{b.loop};")
            w(f"    float tunec{b.loop};")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    float ring{b.index}[{prog.ring_size[b.index]}];")
    w("} ssk_voice;")
    w("")
    w("typedef struct ssk_state {")
    w("    SS_STATE_COMMON")
    w(f"    float p_cur[{max(1, np_)}], p_tgt[{max(1, np_)}], p_step[{max(1, np_)}];")
    w(f"    int32_t p_ramp[{max(1, np_)}], p_left[{max(1, np_)}];")
    w(f"    float cval[{max(1, ncoef)}];")
    w(f"    float ptraj[{max(1, np_)}][SSK_MAXB];")
    w(f"    float ctraj[{max(1, ncoef)}][SSK_MAXB];")
    w("    float mix[SSK_MAXB];")
    w("    float scratch[SSK_MAXB];")
    w("    ssk_voice voices[SSK_POLY];")
    w("} ssk_state;")
    w("")
    # coefficient evaluation
    w("static void ssk_coef_static(ssk_state *S) {")
    for k, e in enumerate(coefs.exprs):
        w(f"    S->cval[{k}] = (float)({coefs.c_value(e, 'S->p_cur[{}]')});")
    w("    (void)S;")
    w("}")
    w("")
    w("static void ssk_coef_traj(ssk_state *S, int a, int b) {")
    w("    int n;")
    w("    for (n = a; n < b; ++n) {")
    for k, e in enumerate(coefs.exprs):
        w(f"        S->ctraj[{k}][n] = (float)({coefs.c_value(e, 'S->ptraj[{}][n]')});")
    w("    }")
    w("    (void)S;")
    w("}")
    w("")
    w("static void ssk_voice_reset(ssk_voice *v) {")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    memset(v->ring{b.index}, 0, sizeof(v->ring{b.index}));")
            w(f"    v->len{b.index} = {int(b.delay_length) if not b.pitch else 1};")
            w(f"    v->relg{b.index} = 1.0f;")
        elif b.n_state:
            w(f"    memset(v->st{b.index}, 0, sizeof(v->st{b.index}));")
    for b in prog.blocks:
        if b.tune_symbol:
            w(f"    v->tune{b.loop} = 0.0f;")
            w(f"    v->tunec{b.loop} = 1.0f;")
    w("    (void)v;")
    w("}")
    w("")
    w("static void ssk_release_gains(ssk_state *S, ssk_voice *v) {")
    w("    const double period = SSK_RATE / ss_note_hz((double)v->note + (double)S->bend);")
    w("    (void)period;")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    v->relg{b.index} = (float)pow(SSK_RELEASE_DECAY, (double)v->len{b.index} / period);")
    w("}")
    w("")
    w(_tune_fn(prog, coefs))
    w("")
    L.extend(loops)
    w("")
    w("static void ssk_voice_render(ssk_state *S, ssk_voice *v, float *out, int a, int b, int moving) {")
    w("    if (moving) ssk_vr_moving(S, v, out, a, b);")
    w("    else ssk_vr_static(S, v, out, a, b);")
    w("}")
    w("")
    w('#include "ss_kernel_pool.h"')
    w("")
    return "\n".join(L)

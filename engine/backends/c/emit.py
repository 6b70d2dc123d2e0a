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

from sheafsynth.engine.preset.affine import Affine
from sheafsynth.engine.backends.c import emit_field as FG
from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir.lower import (GUARD_LIMIT, HELD_QUIET_S, LIMITER_RELEASE_S, MAX_BEND_SEMITONES, RAMP_FADE_S,
                    SILENCE_HELD, SILENCE_RELEASED, StepProgram)
from sheafsynth.engine.ir.voicing import fade_samples

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


def _ring_mask(prog: StepProgram, b) -> str:
    """Index mask of delay block ``b``'s ring: per voice for pitch delays (ssk_voice_reset)."""
    return f"m{b.index}" if b.pitch else f"{prog.ring_size[b.index] - 1}u"


def loop_slack(prog: StepProgram, b) -> float:
    """Upper bound of (pitch delay length) / period for the tuning loop through ``b``.

    engine.ir.tuning: length = period - rest, and rest loses at most half a
    period per filter on the loop (a phase delay -arg H / w with |arg H| <= pi)
    and per wire gain that can be negative; fixed delays only add to rest.
    """
    lp = prog.loops[b.loop] if b.loop is not None else None
    if lp is None:
        return 1.0
    k = sum(1 for st in lp.steps if st.block != lp.tuner and not prog.blocks[st.block].is_delay)
    rng = {p.name: (p.lo, p.hi) for p in prog.params}
    for g in lp.gains:
        lo = g.const
        for sym, c in g.terms:
            if sym not in rng:
                lo = -1.0
                break
            lo += min(c * rng[sym][0], c * rng[sym][1])
        if lo < 0.0:
            k += 1
    return 1.0 + 0.5 * k


def _voice_loop(prog: StepProgram, ctx: _Ctx, name: str) -> str:
    """One specialised sample loop for a voice over [a, b)."""
    L: list[str] = []
    w = L.append
    w(f"static float {name}(ssk_state *S, ssk_voice *v, float *out, int a, int b) {{")
    w("    int n;")
    w("    float gpk = 0.0f, gsum = 0.0f;")
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
            if b.pitch:
                w(f"    const uint32_t m{b.index} = v->mask{b.index};")
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
    for b in prog.blocks:
        if b.is_field:
            L.extend(FG.loop_locals(b))
    body: list[str] = []
    o = body.append
    # body line -> the same line without the excitation's terms, for the loop
    # after the excitation has ended (x0 is 0 there; only a zero's sign differs)
    quiet: dict[int, str] = {}

    def sum_line(head: str, terms) -> None:
        o(f"{head}{_dot([(ctx.coef(t.gain), _sig(t.signal)) for t in terms])};")
        if any(t.signal == 0 for t in terms):
            quiet[len(body) - 1] = f"{head}{_dot([(ctx.coef(t.gain), _sig(t.signal)) for t in terms if t.signal != 0])};"

    def gather(blk) -> None:
        for p, port in enumerate(blk.inputs):
            sum_line(f"        const float u{blk.index}_{p} = ", port)
            o(f"        (void)u{blk.index}_{p};")   # an input no state or output reads

    # The excitation gets a loop of its own (the samples while exc_left > 0),
    # so the sustained loop carries no branch; x0 has the same value as in
    # a single loop with the test inside.
    if prog.excitation.get("kind", "noise") == "impulse":
        exc_on = ["        const float x0 = exa;"]
    else:
        exc_on = ["        rng = ss_xorshift32(rng);",
                  "        exy = (1.0f - exq) * ss_noise_value(rng) + exq * exy;",
                  "        const float x0 = exa * exy;"]
    exc_off = ["        const float x0 = 0.0f;"]
    for b in prog.blocks:
        if b.is_delay:
            o(f"        const float {_sig(b.out_signal)} = r{b.index}[(pos - l{b.index}) & {_ring_mask(prog, b)}];")
        elif b.is_field:
            body.extend(FG.output_lines(ctx, b, num))
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
    if prog.n_signals > 1:   # a cell output no wire reads is legal
        o("        " + " ".join(f"(void){_sig(k)};" for k in range(1, prog.n_signals)))
    for b in prog.blocks:
        if not b.feedthrough:
            gather(b)
    for b in prog.blocks:
        if b.is_delay:
            o(f"        r{b.index}[pos & {_ring_mask(prog, b)}] = u{b.index}_0 * g{b.index};")
        elif b.is_field:
            body.extend(FG.update_lines(ctx, b, num))
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
    sum_line("        const float y = ", prog.out_terms)
    o("        out[n] = y;")
    # the guard, folded in: peak |y| (a NaN never wins the max) and a running
    # sum that turns non-finite exactly when some y is (|y| <= SSK_GUARD otherwise)
    o("        {")
    o("            const float ay = fabsf(y);")
    o("            gpk = ay > gpk ? ay : gpk;")
    o("            gsum += y;")
    o("        }")
    # coefficient locals for the static loop (after body so slots are known)
    if not ctx.moving:
        for k in range(len(ctx.coefs.exprs)):
            w(f"    const float c{k} = S->cval[{k}];")
    w("    {")
    w("        const int stop = exl <= 0 ? a : (exl < b - a ? a + exl : b);")
    w("        exl -= stop - a;")
    body_quiet = [quiet.get(i, ln) for i, ln in enumerate(body)]
    for lo, hi, exc_lines, lines in (("a", "stop", exc_on, body), ("stop", "b", exc_off, body_quiet)):
        w(f"        for (n = {lo}; n < {hi}; ++n) {{")
        L.extend("    " + ln for ln in exc_lines + ["        (void)x0;"] + lines)
        w("        }")
    w("    }")
    # a fading voice (steal, all sound off): the fade applies after the loop,
    # and the guard looks at the faded samples
    w("    if (fade >= 0) {")
    w("        gpk = 0.0f;")
    w("        gsum = 0.0f;")
    w("        for (n = a; n < b; ++n) {")
    w("            float ay;")
    w("            out[n] *= (float)fade * S->inv_fade;")
    w("            if (fade > 0) fade--;")
    w("            ay = fabsf(out[n]);")
    w("            gpk = ay > gpk ? ay : gpk;")
    w("            gsum += out[n];")
    w("        }")
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
    for b in prog.blocks:
        if b.is_field:
            L.extend(FG.save_lines(b))
    w("    (void)S;")
    w("    return (gpk <= (float)SSK_GUARD && isfinite(gsum)) ? gpk : -1.0f;")
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
        w("        (void)w;")
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
        w(f"        if (nl > (int32_t)v->mask{lp.delay} - 1) nl = (int32_t)v->mask{lp.delay} - 1;  /* never: see ssk_voice_reset */")
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
    for b in prog.blocks:
        if b.is_field:
            L.extend(FG.tune_lines(b, dnum, coefs))
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
    w("/* Generated by sheafsynth engine.backends.c.emit -- do not edit. */")
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
    for b in prog.blocks:
        if b.is_field:
            L.extend(FG.tables(b, num, dnum))
    w("typedef struct ssk_voice {")
    w("    SS_VOICE_COMMON")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    int32_t len{b.index};")
            w(f"    float relg{b.index};")
            if b.pitch:
                w(f"    uint32_t mask{b.index};     /* ring size - 1 for the playing note */")
        elif b.is_field:
            L.extend(FG.voice_scalars(b))
        elif b.n_state:
            w(f"    float st{b.index}[{b.n_state}];")
    for b in prog.blocks:
        if b.tune_symbol:
            w(f"    float tune{b.loop};")
            w(f"    float tunec{b.loop};")
    for b in prog.blocks:
        if b.is_delay:
            w(f"    float ring{b.index}[{prog.ring_size[b.index]}];")
        elif b.is_field:
            L.extend(FG.voice_arrays(b))
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
    for b in prog.blocks:
        if b.is_field:
            L.extend(FG.state_members(b))
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
            if b.pitch:
                # Per note the ring covers the longest loop any bend (+-SSK_MAX_BEND)
                # and parameter value can ask for (loop_slack), so a short note's
                # voice touches a small ring: same output, less memory traffic.
                w("    {")
                w(f"        const double pmax = SSK_RATE / (ss_note_hz((double)v->note - (double)SSK_MAX_BEND) * "
                  f"{dnum(b.pitch_ratio)} * pow(2.0, {dnum(b.pitch_cents)} / 1200.0));")
                w(f"        double need = pmax * {dnum(loop_slack(prog, b))};")
                w("        uint32_t size = 4u;")
                w("        if (need < pmax + 1.5) need = pmax + 1.5;")
                w(f"        while (size < {prog.ring_size[b.index]}u && (double)size < need + 2.5) size <<= 1;")
                w(f"        v->mask{b.index} = size - 1u;")
                w(f"        memset(v->ring{b.index}, 0, size * sizeof(float));")
                w("    }")
            else:
                w(f"    memset(v->ring{b.index}, 0, sizeof(v->ring{b.index}));")
            w(f"    v->len{b.index} = {int(b.delay_length) if not b.pitch else 1};")
            w(f"    v->relg{b.index} = 1.0f;")
        elif b.n_state:
            w(f"    memset(v->st{b.index}, 0, sizeof(v->st{b.index}));")
        elif b.is_field:
            L.extend(FG.reset_lines(b))
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
        elif b.is_field:
            L.extend(FG.release_lines(b, dnum))
    w("}")
    w("")
    w(_tune_fn(prog, coefs))
    w("")
    L.extend(loops)
    w("")
    # The pool calls this for the next voice while it renders the current one,
    # so that voice's ring windows (read and write) are in cache when its loop
    # starts: with thousands of voices they are not (a hint only, no effect on output).
    w("static void ssk_voice_prefetch(const ssk_voice *v, int n) {")
    w("    uint32_t q;")
    w("    for (q = 0; q < (uint32_t)n + 16u; q += 16u) {")
    for blk in prog.blocks:
        if blk.is_delay:
            m = f"v->mask{blk.index}" if blk.pitch else f"{prog.ring_size[blk.index] - 1}u"
            w(f"        SS_PREFETCH(&v->ring{blk.index}[(v->pos + q) & {m}], 1);")
            w(f"        SS_PREFETCH(&v->ring{blk.index}[(v->pos - (uint32_t)v->len{blk.index} + q) & {m}], 0);")
    w("    }")
    w("    (void)v;")
    w("}")
    w("")
    w("/* Render [a, b) of one voice into out; returns max |out| over [a, b), or -1")
    w("   when a sample was non-finite or beyond SSK_GUARD (the pool's guard). */")
    w("static float ssk_voice_render(ssk_state *S, ssk_voice *v, float *out, int a, int b, int moving) {")
    w("    return moving ? ssk_vr_moving(S, v, out, a, b) : ssk_vr_static(S, v, out, a, b);")
    w("}")
    w("")
    w('#include "ss_kernel_pool.h"')
    w("")
    return "\n".join(L)

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

from sheafsynth.engine.backends.c.abi import CDEF
from sheafsynth.engine.backends.c.emitters import EMITTERS, emitter
from sheafsynth.engine.backends.c.text import PI, Coefs, LoopContext, dnum, dot, num, sig
from sheafsynth.engine.ir.program import (GUARD_LIMIT, HELD_QUIET_S, LIMITER_RELEASE_S, MAX_BEND_SEMITONES,
                                          RAMP_FADE_S, SILENCE_HELD, SILENCE_RELEASED, StepProgram)
from sheafsynth.engine.ir.voicing import fade_samples

__all__ = ["generate", "CDEF", "EMITTERS", "num", "dnum"]


def each_block(prog: StepProgram, hook: str, *args) -> list[str]:
    """The C lines of emitter hook ``hook`` for every block, in block order (``hook(*args, block)``)."""
    out: list[str] = []
    for b in prog.blocks:
        out.extend(getattr(emitter(b), hook)(*args, b))
    return out


def per_tuner(prog: StepProgram, *templates: str) -> list[str]:
    """Each template once per tuning allpass, ``{k}`` replaced by its loop index, grouped by block."""
    return [t.format(k=b.loop) for b in prog.blocks if b.tune_symbol for t in templates]


def _voice_loop(prog: StepProgram, ctx: LoopContext, name: str) -> str:
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
    L.extend(each_block(prog, "loop_locals", ctx))
    L.extend(per_tuner(prog, "    const float t{k} = v->tune{k};", "    const float tc{k} = v->tunec{k};",
                       "    (void)t{k};", "    (void)tc{k};"))
    body: list[str] = []
    o = body.append
    # body line -> the same line without the excitation's terms, for the loop
    # after the excitation has ended (x0 is 0 there; only a zero's sign differs)
    quiet: dict[int, str] = {}

    def sum_line(head: str, terms) -> None:
        o(f"{head}{dot([(ctx.coef(t.gain), sig(t.signal)) for t in terms])};")
        if any(t.signal == 0 for t in terms):
            quiet[len(body) - 1] = f"{head}{dot([(ctx.coef(t.gain), sig(t.signal)) for t in terms if t.signal != 0])};"

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
    body.extend(each_block(prog, "output_lines", ctx))  # step 2
    for bi in prog.order:                       # step 3
        b = prog.blocks[bi]
        gather(b)
        body.extend(emitter(b).through_lines(ctx, b))
    if prog.n_signals > 1:   # a cell output no wire reads is legal
        o("        " + " ".join(f"(void){sig(k)};" for k in range(1, prog.n_signals)))
    for b in prog.blocks:
        if not b.feedthrough:
            gather(b)
    body.extend(each_block(prog, "update_lines", ctx))  # step 5
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
    L.extend(each_block(prog, "save_lines", ctx))
    w("    (void)S;")
    w("    return (gpk <= (float)SSK_GUARD && isfinite(gsum)) ? gpk : -1.0f;")
    w("}")
    return "\n".join(L)


def _tune_fn(prog: StepProgram, coefs: Coefs) -> str:
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
        w(f"        const double w = 2.0 * {PI} * f / SSK_RATE;")
        w("        (void)w;")
        w("        double rest = 0.0, need;")
        w("        int32_t nl;")
        for st in lp.steps:
            if st.block != lp.tuner:
                b = prog.blocks[st.block]
                L.extend(emitter(b).loop_rest_lines(prog, b, st, coefs))
        for g in lp.gains:
            w(f"        if (({coefs.c_value(g, 'S->p_cur[{}]')}) < 0.0) rest -= {PI} / w;")
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
        L.extend(emitter(b).tune_lines(prog, b, coefs))
    w("    if (v->status == SS_RELEASED) ssk_release_gains(S, v);")
    w("}")
    return "\n".join(L)


def generate(prog: StepProgram) -> str:
    """The complete C source of the kernel module for ``prog``."""
    np_ = len(prog.params)
    coefs = Coefs(prog)
    loops = [_voice_loop(prog, LoopContext(prog, coefs, False), "ssk_vr_static"),
             _voice_loop(prog, LoopContext(prog, coefs, True), "ssk_vr_moving")]
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
    w(f"#define SSK_EXC_BRIGHT_EXP {dnum(float(exc.get('brightness_exponent', 1.0)))}")
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
    L.extend(each_block(prog, "tables", prog))
    w("typedef struct ssk_voice {")
    w("    SS_VOICE_COMMON")
    L.extend(each_block(prog, "voice_scalars", prog))
    L.extend(per_tuner(prog, "    float tune{k};", "    float tunec{k};"))
    L.extend(each_block(prog, "voice_arrays", prog))
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
    L.extend(each_block(prog, "state_members", prog))
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
    L.extend(each_block(prog, "reset_lines", prog))
    L.extend(per_tuner(prog, "    v->tune{k} = 0.0f;", "    v->tunec{k} = 1.0f;"))
    w("    (void)v;")
    w("}")
    w("")
    w("static void ssk_release_gains(ssk_state *S, ssk_voice *v) {")
    w("    const double period = SSK_RATE / ss_note_hz((double)v->note + (double)S->bend);")
    w("    (void)period;")
    L.extend(each_block(prog, "release_lines", prog))
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
    L.extend(each_block(prog, "prefetch_lines", prog))
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

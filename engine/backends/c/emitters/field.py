"""C text for field blocks (the "field" entry of engine.backends.c.emitters.EMITTERS).

Per field block ``b`` the generated kernel holds, in the voice struct,
``fb<b>[2][size]`` (u and v = u - u_prev: the velocity form of
engine.ir.fields), the pitch factor ``fk<b>`` and the release factor
``frel<b>``; in the state struct the scratch rows ``fw<b>`` (eta term) and
``fy<b>`` (bending pass), shared by the voices because voices render one
after another.  Per sample: pickups read u (step 2); step 5 fills the
ghost cells, computes v+ in place (it reads only u's neighbourhood and its
own v), adds the strikes to v+, then u += v+.  The update
formula and the coefficient arithmetic are those of engine.ir.fields (the
Python implementation is engine.backends.reference.field); the
stencil loops run over contiguous rows with ``restrict`` pointers so the
compiler can vectorise them; CSR loops read static tables.

Safety rules as in engine.backends.c.emit: identifiers come from block indices,
numbers pass through ``num`` / ``dnum`` (finite-checked), nothing from the
preset's text is printed.  Audio thread: the update is fixed-size loops over
the voice's own buffers and the state's scratch rows; no allocation.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from sheafsynth.engine.backends.c.emitters.base import BlockEmitter
from sheafsynth.engine.backends.c.text import PI, Coefs, LoopContext, dnum, num
from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir.fields import FieldProgram, Stencil
from sheafsynth.engine.ir.program import KIND_FIELD, Block, StepProgram
from sheafsynth.engine.model.field_sheaf import seam_scale
from sheafsynth.engine.preset.affine import Affine

__all__ = ["FieldEmitter", "seam_scale_table"]

Fmt = Callable[[float], str]


def seam_scale_table(fp: FieldProgram) -> tuple[list[float] | None, list[float] | None]:
    """Weight factors for points interpolated across a seam (as position_weights applies them)."""
    cx, sh = fp.model.complex, fp.model.sheaf
    if cx.kind == "path":
        if not cx.wrapped[0]:
            return None, None
        return [seam_scale(sh, cx.n_edges - 1)], None
    m, n = _shape2(fp)
    sc0: list[float] | None = None
    sc1: list[float] | None = None
    if cx.wrapped[0]:
        sc0 = [seam_scale(sh, int(np.flatnonzero((cx.seam == 0) & (cx.edges[:, 0] == (m - 1) * n + j))[0]))
               for j in range(n)]
    if cx.wrapped[1]:
        sc1 = [seam_scale(sh, int(np.flatnonzero((cx.seam == 1) & (cx.edges[:, 0] == i * n + n - 1))[0]))
               for i in range(m)]
    return sc0, sc1



def _shape2(fp: FieldProgram) -> tuple[int, int]:
    shape = fp.model.complex.shape
    if shape is None or len(shape) != 2:
        raise BuildError("internal: a grid field without a 2-d shape")
    return int(shape[0]), int(shape[1])


def _stencil(fp: FieldProgram) -> Stencil:
    if fp.stencil is None:
        raise BuildError("internal: a stencil-layout field without its stencil")
    return fp.stencil


def _fmt_list(vals, fmt) -> str:
    items = [fmt(x) for x in vals] or [fmt(0)]
    lines, cur = [], []
    for it in items:
        cur.append(it)
        if len(cur) == 12:
            lines.append(", ".join(cur))
            cur = []
    if cur:
        lines.append(", ".join(cur))
    return ",\n    ".join(lines)


def _int(x) -> str:
    return str(int(x))


# --------------------------------------------------------------------------
# static tables and point functions

def _tables(b: Block) -> list[str]:
    fp = b.fieldprog()
    i = b.index
    out: list[str] = []
    vfmt: Fmt = dnum if fp.ctype == "double" else num
    if fp.layout == "csr":
        for tag, m in (("l", fp.L), ("s", fp.S if fp.uses_stiff else None)):
            if m is None:
                continue
            m = m.tocsr()
            m.sort_indices()
            out.append(f"static const int32_t ssk_f{i}_{tag}rp[{m.shape[0] + 1}] = {{\n    "
                       f"{_fmt_list(m.indptr, _int)}}};")
            out.append(f"static const int32_t ssk_f{i}_{tag}ci[{max(1, m.nnz)}] = {{\n    "
                       f"{_fmt_list(m.indices, _int)}}};")
            out.append(f"static const {fp.ctype if vfmt is not num else 'float'} ssk_f{i}_{tag}v[{max(1, m.nnz)}] = {{\n    "
                       f"{_fmt_list(m.data, vfmt)}}};")
    if any(p.parametric for p in fp.inputs + fp.outputs):
        out.extend(_point_function(b))
    return out


def _point_function(b: Block) -> list[str]:
    fp = b.fieldprog()
    cx = fp.model.complex
    i = b.index
    V = cx.n_vertices
    out = [f"static const int32_t ssk_f{i}_vx[{V}] = {{\n    {_fmt_list(fp.vertex_base, _int)}}};"]
    sc0, sc1 = seam_scale_table(fp)
    if sc0 is not None:
        out.append(f"static const float ssk_f{i}_sc0[{len(sc0)}] = {{\n    {_fmt_list(sc0, num)}}};")
    if sc1 is not None:
        out.append(f"static const float ssk_f{i}_sc1[{len(sc1)}] = {{\n    {_fmt_list(sc1, num)}}};")

    def axis(var: str, p: str, n: int, periodic: bool) -> list[str]:
        if periodic:
            return [f"    x = {p} * {n}.0;",
                    f"    if (x >= {n}.0) x -= {n}.0;",
                    f"    {var}0 = (int)floor(x);",
                    f"    if ({var}0 > {n - 1}) {var}0 = {n - 1};",
                    f"    f{var} = x - (double){var}0;",
                    f"    {var}1 = {var}0 + 1;",
                    f"    x{var} = {var}1 == {n};",
                    f"    if (x{var}) {var}1 = 0;"]
        return [f"    x = {p} * {n - 1}.0;",
                f"    {var}0 = (int)floor(x);",
                f"    if ({var}0 > {n - 2}) {var}0 = {n - 2};",
                f"    f{var} = x - (double){var}0;",
                f"    {var}1 = {var}0 + 1;",
                f"    x{var} = 0;"]

    if cx.kind == "path":
        n = int(cx.n_vertices)
        out.append(f"static int ssk_fpt{i}(double p0, double p1, int32_t *ix, float *wt) {{")
        out.append("    int cnt = 0, a, a0, a1, xa;")
        out.append("    double x, fa;")
        out.append("    (void)p1;")
        out.append("    if (!(p0 >= 0.0)) p0 = 0.0;")
        out.append("    if (p0 > 1.0) p0 = 1.0;")
        out.extend(axis("a", "p0", n, cx.wrapped[0]))
        out.append("    for (a = 0; a < 2; ++a) {")
        out.append("        const int k = a ? a1 : a0;")
        out.append("        double g = a ? fa : 1.0 - fa;")
        out.append("        if (g == 0.0) continue;")
        if cx.wrapped[0]:
            out.append(f"        if (a && xa) g *= (double)ssk_f{i}_sc0[0];")
        else:
            out.append("        (void)xa;")
        out.append(f"        if (ssk_f{i}_vx[k] < 0) continue;")
        out.append(f"        ix[cnt] = ssk_f{i}_vx[k];")
        out.append("        wt[cnt] = (float)g;")
        out.append("        cnt++;")
        out.append("    }")
        out.append("    return cnt;")
        out.append("}")
        return out
    m, n = _shape2(fp)
    w0, w1 = cx.wrapped
    mob = cx.wrap == "mobius"
    out.append(f"static int ssk_fpt{i}(double p0, double p1, int32_t *ix, float *wt) {{")
    out.append("    int cnt = 0, a, c, a0, a1, c0, c1, xa, xc;")
    out.append("    double x, fa, fc;")
    out.append("    if (!(p0 >= 0.0)) p0 = 0.0;")
    out.append("    if (p0 > 1.0) p0 = 1.0;")
    out.append("    if (!(p1 >= 0.0)) p1 = 0.0;")
    out.append("    if (p1 > 1.0) p1 = 1.0;")
    out.extend(axis("a", "p0", m, w0))
    out.extend(axis("c", "p1", n, w1))
    out.append("    for (a = 0; a < 2; ++a) {")
    out.append("        for (c = 0; c < 2; ++c) {")
    out.append("            const int ia = a ? a1 : a0, jc = c ? c1 : c0;")
    out.append("            const int cr0 = a && xa, cr1 = c && xc;")
    out.append("            int row = ia;")
    out.append("            double g = (a ? fa : 1.0 - fa) * (c ? fc : 1.0 - fc);")
    out.append("            if (g == 0.0) continue;")
    if w1:
        out.append("            if (cr1) {")
        out.append(f"                g *= (double)ssk_f{i}_sc1[cr0 ? {m - 1} : ia];")
        if mob:
            out.append(f"                row = {m - 1} - ia;")
        out.append("            }")
    else:
        out.append("            (void)cr1;")
    if w0:
        out.append(f"            if (cr0) g *= (double)ssk_f{i}_sc0[jc];")
    else:
        out.append("            (void)cr0;")
    out.append(f"            if (ssk_f{i}_vx[row * {n} + jc] < 0) continue;")
    out.append(f"            ix[cnt] = ssk_f{i}_vx[row * {n} + jc];")
    out.append("            wt[cnt] = (float)g;")
    out.append("            cnt++;")
    out.append("        }")
    out.append("    }")
    out.append("    return cnt;")
    out.append("}")
    return out


# --------------------------------------------------------------------------
# the sample loop

def _coord(ctx: LoopContext, e: Affine) -> str:
    c = ctx.coef(e)
    return "0.0f" if c is None else c


def _point_args(ctx: LoopContext, pt) -> tuple[str, str]:
    cs = [f"(double){_coord(ctx, e)}" for e in pt.coords]
    return (cs[0], cs[1] if len(cs) > 1 else "0.0")


def _output_lines(ctx: LoopContext, b: Block) -> list[str]:
    """Step 2: the pickup reads from u."""
    fp = b.fieldprog()
    i = b.index
    out = []
    for r, pt in enumerate(fp.outputs):
        sig = f"x{b.out_signal + r}"
        if pt.parametric:
            out.append(f"        float {sig};")
            out.extend(_param_point(ctx, b, pt, f"{sig} = ", read=True))
        else:
            w = fp.weights(pt, ctx.env())
            terms = [f"{num(w[k])} * fu{i}[{int(fp.storage[k])}]" for k in np.flatnonzero(w)]
            out.append(f"        const float {sig} = {' + '.join(terms) if terms else '0.0f'};")
    return out


def _param_point(ctx: LoopContext, b: Block, pt, target: str, read: bool, src: str = "") -> list[str]:
    i = b.index
    fp = b.fieldprog()
    a0, a1 = _point_args(ctx, pt)
    d = [float(x) for x in pt.direction]
    out = ["        {",
           "            int32_t pix[4];",
           "            float pwt[4];",
           f"            const int pn = ssk_fpt{i}({a0}, {a1}, pix, pwt);",
           "            int pk;"]
    if read:
        out.append(f"            {fp.ctype} acc = 0.0;")
        comps = [f"{num(x)} * fu{i}[pix[pk] + {k}]" for k, x in enumerate(d) if x != 0.0]
        out.append(f"            for (pk = 0; pk < pn; ++pk) acc += pwt[pk] * ({' + '.join(comps)});")
        out.append(f"            {target}(float)acc;")
    else:
        out.append("            for (pk = 0; pk < pn; ++pk) {")
        for k, x in enumerate(d):
            if x != 0.0:
                out.append(f"                fv{i}[pix[pk] + {k}] += pwt[pk] * {num(x)} * {src};")
        out.append("            }")
    out.append("        }")
    return out


def _ghost_lines(st: Stencil, X: str, T: str = "float") -> list[str]:
    """Fill the ghost cells of buffer X from its active cells (module doc of engine.ir.fields)."""
    W, MI, NI = st.width, st.rows, st.cols
    out: list[str] = []

    def sc(s: float, expr: str) -> str:
        return expr if s == 1.0 else f"-{expr}"

    if st.rule1 != "clamp":
        if st.dims == 1:
            row = f"{X} + 1"
            out.append("            {")
            out.append(f"                {T} *gr = {row};")
            if st.rule1 == "mirror":
                out.append("                gr[-1] = gr[0];")
                out.append(f"                gr[{NI}] = gr[{NI - 1}];")
            else:
                out.append(f"                gr[-1] = {sc(st.scale1, f'gr[{NI - 1}]')};")
                out.append(f"                gr[{NI}] = {sc(st.scale1, 'gr[0]')};")
            out.append("            }")
        else:
            out.append(f"            for (fr = 0; fr < {MI}; ++fr) {{")
            out.append(f"                {T} *gr = {X} + (fr + 1) * {W} + 1;")
            if st.rule1 == "mirror":
                out.append("                gr[-1] = gr[0];")
                out.append(f"                gr[{NI}] = gr[{NI - 1}];")
            elif st.rule1 == "periodic":
                out.append(f"                gr[-1] = {sc(st.scale1, f'gr[{NI - 1}]')};")
                out.append(f"                gr[{NI}] = {sc(st.scale1, 'gr[0]')};")
            else:
                out.append(f"                const {T} *fl = {X} + ({MI} - fr) * {W} + 1;")
                out.append(f"                gr[-1] = {sc(st.scale1, f'fl[{NI - 1}]')};")
                out.append(f"                gr[{NI}] = {sc(st.scale1, 'fl[0]')};")
            out.append("            }")
    if st.dims == 2 and st.rule0 != "clamp":
        top, bot = f"{X} + 1", f"{X} + {(MI + 1) * W + 1}"
        first, last = f"{X} + {W + 1}", f"{X} + {MI * W + 1}"
        out.append("            {")
        out.append(f"                {T} *gt = {top}, *gb = {bot};")
        out.append(f"                const {T} *ga = {first}, *gz = {last};")
        out.append(f"                for (fc = 0; fc < {NI}; ++fc) {{")
        if st.rule0 == "mirror":
            out.append("                    gt[fc] = ga[fc];")
            out.append("                    gb[fc] = gz[fc];")
        else:
            out.append(f"                    gt[fc] = {sc(st.scale0, 'gz[fc]')};")
            out.append(f"                    gb[fc] = {sc(st.scale0, 'ga[fc]')};")
        out.append("                }")
        out.append("            }")
    return out


def _lap(st: Stencil, x: str) -> str:
    if st.dims == 1:
        return f"(2.0f * {x}[fc] - {x}[fc - 1] - {x}[fc + 1])"
    return f"(4.0f * {x}[fc] - {x}[fc - 1] - {x}[fc + 1] - {x}n[fc] - {x}s[fc])"


def _rows(st: Stencil, ptrs: list[tuple[str, str, bool]], body: list[str], c_from: int = 0,
          c_to: int | None = None, T: str = "float") -> list[str]:
    """Loop over active rows; ``ptrs`` = (name, buffer, writable)."""
    W, MI = st.width, st.rows
    c_to = st.cols if c_to is None else c_to
    out = []
    if st.dims == 2:
        out.append(f"            for (fr = 0; fr < {MI}; ++fr) {{")
        base = f"(fr + 1) * {W} + 1"
    else:
        out.append("            {")
        base = "1"
    text = " ".join(body)
    for name, buf, writable in ptrs:
        q = f"{T} *restrict" if writable else f"const {T} *restrict"
        out.append(f"                {q} {name} = {buf} + {base};")
        if st.dims == 2 and not writable and f"{name}n[" in text:
            out.append(f"                const {T} *restrict {name}n = {name} - {W};")
            out.append(f"                const {T} *restrict {name}s = {name} + {W};")
    out.append(f"                for (fc = {c_from}; fc < {c_to}; ++fc)")
    out.extend("                    " + line for line in body)
    out.append("            }")
    return out


def _update_lines(ctx: LoopContext, b: Block) -> list[str]:
    """Step 5: coefficients, v+ (velocity form, engine.ir.fields), strikes, u += v."""
    fp = b.fieldprog()
    i = b.index

    def co(e: Affine) -> str:
        return _coord(ctx, e)

    out = ["        {"]
    out.append(f"            const double lam = (double){co(fp.speed)}, sg = (double){co(fp.loss)};")
    out.append(f"            const double k2 = (double)fk{i}, rho = (double)frel{i};")
    diff = fp.dynamics == "diffusion"
    if diff:
        out.append("            const float cd0 = (float)(rho * (1.0 - sg) - 1.0);")
        out.append("            const float cd1 = (float)(rho * k2 * lam);")
    else:
        out.append("            const double den = 1.0 / (1.0 + sg);")
        out.append("            const float cv = (float)(rho * (1.0 - sg) * den);")
        out.append("            const float cl = (float)(rho * k2 * lam * lam * den);")
        out.append("            const float cr = (float)(rho - 1.0);")
        if fp.uses_eta:
            out.append(f"            const double et = (double){co(fp.hf_loss)};")
            out.append("            const float ce = (float)(rho * et * den);")
        if fp.uses_stiff:
            out.append(f"            const double bt = (double){co(fp.stiffness)};")
            out.append("            const float cf = (float)(rho * k2 * bt * bt * den);")
    out.append(f"            {fp.ctype} *restrict U = fu{i};")
    out.append(f"            {fp.ctype} *restrict V = fv{i};")
    strikes: list[str] = []
    for p, pt in enumerate(fp.inputs):
        src = f"u{i}_{p}"
        if pt.parametric:
            strikes.extend("    " + line for line in _param_point(ctx, b, pt, "", read=False, src=src))
        else:
            w = fp.weights(pt, ctx.env())
            for k in np.flatnonzero(w):
                strikes.append(f"            V[{int(fp.storage[k])}] += {num(w[k])} * {src};")
    if fp.layout == "stencil":
        out.extend(_stencil_update(fp, i, diff, strikes))
    else:
        out.extend(_csr_update(fp, i, diff, strikes))
    out.append("        }")
    return out


def _stencil_update(fp: FieldProgram, i: int, diff: bool, strikes: list[str]) -> list[str]:
    st = _stencil(fp)
    T = fp.ctype
    out = ["            int fr, fc;", "            (void)fr;"]
    if diff or not fp.uses_eta or fp.uses_stiff:      # the eta pass reads no ghosts of U
        out.extend(_ghost_lines(st, "U", T))
    if diff:
        out.extend(_rows(st, [("xv", "V", True), ("xu", "U", False)],
                         [f"xv[fc] = cd0 * xu[fc] - cd1 * {_lap(st, 'xu')};"], T=T))
    else:
        lapterm = f"cl * {_lap(st, 'xu')}"
        ptrs = [("xv", "V", True), ("xu", "U", False)]
        if fp.uses_eta:
            out.append(f"            {fp.ctype} *restrict FW = S->fw{i};")
            out.extend(_rows(st, [("xw", "FW", True), ("xu", "U", False), ("xq", "V", False)],
                             ["xw[fc] = cl * xu[fc] + ce * xq[fc];"], T=T))
            out.extend(_ghost_lines(st, "FW", T))
            ptrs.append(("xw", "FW", False))
            lapterm = _lap(st, "xw")
        body = f"xv[fc] = cv * xv[fc] - {lapterm}"
        if fp.uses_stiff:
            out.append(f"            {fp.ctype} *restrict FY = S->fy{i};")
            if st.stiff_zero_ends:
                out.extend(_rows(st, [("xy", "FY", True), ("xu", "U", False)],
                                 [f"xy[fc] = {_lap(st, 'xu')};"], 1, st.cols - 1, T))
            else:
                out.extend(_rows(st, [("xy", "FY", True), ("xu", "U", False)], [f"xy[fc] = {_lap(st, 'xu')};"], T=T))
                out.extend(_ghost_lines(st, "FY", T))
            ptrs.append(("xy", "FY", False))
            body += f" - cf * {_lap(st, 'xy')}"
        out.extend(_rows(st, ptrs, [body + " + cr * xu[fc];"], T=T))
    out.extend(strikes)
    out.extend(_rows(st, [("xu", "U", True), ("xv", "V", False)], ["xu[fc] += xv[fc];"], T=T))
    return out


def _csr_update(fp: FieldProgram, i: int, diff: bool, strikes: list[str]) -> list[str]:
    n = fp.n_dof
    out = ["            int fi, fk;"]
    src = "U"
    if not diff and fp.uses_eta:
        out.append(f"            {fp.ctype} *restrict FW = S->fw{i};")
        out.append(f"            for (fi = 0; fi < {n}; ++fi) FW[fi] = cl * U[fi] + ce * V[fi];")
        src = "FW"
    out.append(f"            for (fi = 0; fi < {n}; ++fi) {{")
    out.append(f"                {fp.ctype} lw = 0.0;")
    out.append(f"                for (fk = ssk_f{i}_lrp[fi]; fk < ssk_f{i}_lrp[fi + 1]; ++fk)")
    out.append(f"                    lw += ssk_f{i}_lv[fk] * {src}[ssk_f{i}_lci[fk]];")
    if diff:
        out.append("                V[fi] = cd0 * U[fi] - cd1 * lw;")
    else:
        expr = "cv * V[fi] - " + ("lw" if fp.uses_eta else "cl * lw")
        if fp.uses_stiff:
            out.append(f"                {fp.ctype} sw = 0.0;")
            out.append(f"                for (fk = ssk_f{i}_srp[fi]; fk < ssk_f{i}_srp[fi + 1]; ++fk)")
            out.append(f"                    sw += ssk_f{i}_sv[fk] * U[ssk_f{i}_sci[fk]];")
            expr += " - cf * sw"
        out.append(f"                V[fi] = {expr} + cr * U[fi];")
    out.append("            }")
    out.extend(strikes)
    out.append(f"            for (fi = 0; fi < {n}; ++fi) U[fi] += V[fi];")
    return out


class FieldEmitter(BlockEmitter):
    """Field blocks: buffers ``fb<b>[2][size]`` (u, v) per voice, k2 ``fk<b>``, release ``frel<b>``."""

    kind = KIND_FIELD

    def tables(self, prog: StepProgram, b: Block) -> list[str]:
        return _tables(b)

    def voice_scalars(self, prog: StepProgram, b: Block) -> list[str]:
        return [f"    float fk{b.index};", f"    float frel{b.index};"]

    def voice_arrays(self, prog: StepProgram, b: Block) -> list[str]:
        fp = b.fieldprog()
        return [f"    {fp.ctype} fb{b.index}[2][{fp.size}];     /* u, v = u - u_prev */"]

    def state_members(self, prog: StepProgram, b: Block) -> list[str]:
        fp = b.fieldprog()
        out = []
        if fp.uses_eta:
            out.append(f"    {fp.ctype} fw{b.index}[{fp.size}];")
        if fp.uses_stiff and fp.layout == "stencil":
            out.append(f"    {fp.ctype} fy{b.index}[{fp.size}];")
        return out

    def reset_lines(self, prog: StepProgram, b: Block) -> list[str]:
        i = b.index
        return [f"    memset(v->fb{i}, 0, sizeof(v->fb{i}));",
                f"    v->fk{i} = 1.0f;", f"    v->frel{i} = 1.0f;"]

    def release_lines(self, prog: StepProgram, b: Block) -> list[str]:
        fp = b.fieldprog()
        return [f"    v->frel{b.index} = (float)pow(SSK_RELEASE_DECAY, {dnum(fp.release_power)} / period);"]

    def tune_lines(self, prog: StepProgram, b: Block, coefs: Coefs) -> list[str]:
        """k2 for the played pitch (engine.ir.fields.k2_raw: damped root at the note's angle)."""
        fp = b.fieldprog()
        t = fp.model.tune
        if t is None:
            return []
        sg = coefs.c_value(fp.loss, "S->p_cur[{}]")
        et = coefs.c_value(fp.hf_loss, "S->p_cur[{}]") if fp.uses_eta else "0.0"
        p1 = dnum(fp.p1)
        return ["    {",
                f"        const double sg = (double)(float)({sg}), et = (double)(float)({et});",
                f"        const double f = ss_note_hz(pitch) * {dnum(t.ratio)} * pow(2.0, {dnum(t.cents)} / 1200.0);",
                f"        const double w = 2.0 * {PI} * f / SSK_RATE;",
                f"        const double r2 = (1.0 + sg) * (1.0 - sg - et * {p1});",
                f"        double q = r2 > 0.0 ? 2.0 - et * {p1} - 2.0 * cos(w) * sqrt(r2) : 2.0 - 2.0 * cos(w);",
                "        double k2;",
                "        if (q < 0.0) q = 0.0;",
                f"        k2 = q / {dnum(fp.q1)};",
                f"        if (k2 > {dnum(fp.k2_max)}) k2 = {dnum(fp.k2_max)};",
                f"        v->fk{b.index} = (float)k2;",
                "    }"]

    def loop_locals(self, ctx: LoopContext, b: Block) -> list[str]:
        i = b.index
        T = b.fieldprog().ctype
        return [f"    {T} *restrict fu{i} = v->fb{i}[0];",
                f"    {T} *restrict fv{i} = v->fb{i}[1];",
                f"    const float fk{i} = v->fk{i}, frel{i} = v->frel{i};"]

    def output_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        return _output_lines(ctx, b)

    def update_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        return _update_lines(ctx, b)

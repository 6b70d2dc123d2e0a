"""C text for linear blocks: a small parameter-affine state space s+ = A s + B u, y = C s + D u.

States live in the voice (``st<b>[n]``) and in loop locals ``s<b>_<j>``;
coefficients come from LoopContext.coef (slots, trajectories, tuning
symbols).  Audio thread: straight-line arithmetic only.
"""

from __future__ import annotations

from sheafsynth.engine.backends.c.emitters.base import BlockEmitter
from sheafsynth.engine.backends.c.text import Coefs, LoopContext, dot, sig
from sheafsynth.engine.ir.program import KIND_LINEAR, Block, LoopStep, StepProgram
from sheafsynth.engine.preset.affine import Affine

__all__ = ["LinearEmitter"]


class LinearEmitter(BlockEmitter):
    kind = KIND_LINEAR

    def voice_scalars(self, prog: StepProgram, b: Block) -> list[str]:
        return [f"    float st{b.index}[{b.n_state}];"] if b.n_state else []

    def reset_lines(self, prog: StepProgram, b: Block) -> list[str]:
        return [f"    memset(v->st{b.index}, 0, sizeof(v->st{b.index}));"] if b.n_state else []

    def loop_rest_lines(self, prog: StepProgram, b: Block, step: LoopStep, coefs: Coefs) -> list[str]:
        """rest += phase delay (samples) of the block from step.in_port to step.out_port at w."""
        A, B, C, D = b.linear()
        k = b.n_state

        def cval(e: Affine) -> str:
            return "(" + coefs.c_value(e, "S->p_cur[{}]") + ")"

        out = ["        {"]
        d = cval(D[step.out_port, step.in_port])
        if k:
            out.append(f"            double A[{k * k}], B[{k}], C[{k}];")
            for i in range(k):
                for j in range(k):
                    out.append(f"            A[{i * k + j}] = {cval(A[i, j])};")
                out.append(f"            B[{i}] = {cval(B[i, step.in_port])};")
                out.append(f"            C[{i}] = {cval(C[step.out_port, i])};")
            out.append(f"            rest += -ss_block_phase({k}, A, B, C, {d}, w) / w;")
        else:
            out.append(f"            rest += -ss_block_phase(0, 0, 0, 0, {d}, w) / w;")
        out.append("        }")
        return out

    def loop_locals(self, ctx: LoopContext, b: Block) -> list[str]:
        return [f"    float s{b.index}_{j} = v->st{b.index}[{j}];" for j in range(b.n_state)]

    def output_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        if b.feedthrough:
            return []
        C = b.linear()[2]
        out = []
        for r in range(b.n_out):
            pairs = [(ctx.coef(C[r, j]), f"s{b.index}_{j}") for j in range(b.n_state)]
            out.append(f"        const float {sig(b.out_signal + r)} = {dot(pairs)};")
        return out

    def through_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        _, _, C, D = b.linear()
        bi = b.index
        out = []
        for r in range(b.n_out):
            pairs = [(ctx.coef(D[r, p]), f"u{bi}_{p}") for p in range(b.n_in)]
            pairs += [(ctx.coef(C[r, j]), f"s{bi}_{j}") for j in range(b.n_state)]
            out.append(f"        const float {sig(b.out_signal + r)} = {dot(pairs)};")
        return out

    def update_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        if not b.n_state:
            return []
        A, B, _, _ = b.linear()
        out = ["        {"]
        for i in range(b.n_state):
            pairs = [(ctx.coef(A[i, j]), f"s{b.index}_{j}") for j in range(b.n_state)]
            pairs += [(ctx.coef(B[i, p]), f"u{b.index}_{p}") for p in range(b.n_in)]
            out.append(f"            const float q{i} = {dot(pairs)};")
        for i in range(b.n_state):
            out.append(f"            s{b.index}_{i} = q{i};")
        out.append("        }")
        return out

    def save_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        return [f"    v->st{b.index}[{j}] = s{b.index}_{j};" for j in range(b.n_state)]

"""C text for delay blocks: a power-of-two ring per voice, read ``len`` samples back.

A fixed delay's ring has the program's ring size; a pitch-tracking delay's
voice uses only the part of its ring the played note can need
(``mask<b>``, set in ssk_voice_reset from engine.ir.tuning.loop_slack) so
a short note touches less memory.  The release damping multiplies what
enters the ring by ``relg<b>`` = decay^(len / period).  Audio thread:
index arithmetic and one multiply per sample; no allocation.
"""

from __future__ import annotations

from sheafsynth.engine.backends.c.emitters.base import BlockEmitter
from sheafsynth.engine.backends.c.text import Coefs, LoopContext, dnum, sig
from sheafsynth.engine.ir.program import KIND_DELAY, Block, LoopStep, StepProgram
from sheafsynth.engine.ir.tuning import loop_slack

__all__ = ["DelayEmitter", "ring_mask"]


def ring_mask(prog: StepProgram, b: Block, voice: str = "") -> str:
    """C index mask of delay ``b``'s ring: per voice for pitch delays (``voice`` = "v->" outside the loop)."""
    return f"{voice}{'mask' if voice else 'm'}{b.index}" if b.pitch else f"{prog.ring_size[b.index] - 1}u"


class DelayEmitter(BlockEmitter):
    kind = KIND_DELAY

    def voice_scalars(self, prog: StepProgram, b: Block) -> list[str]:
        out = [f"    int32_t len{b.index};", f"    float relg{b.index};"]
        if b.pitch:
            out.append(f"    uint32_t mask{b.index};     /* ring size - 1 for the playing note */")
        return out

    def voice_arrays(self, prog: StepProgram, b: Block) -> list[str]:
        return [f"    float ring{b.index}[{prog.ring_size[b.index]}];"]

    def reset_lines(self, prog: StepProgram, b: Block) -> list[str]:
        i = b.index
        if b.pitch:
            # Per note the ring covers the longest loop any bend (+-SSK_MAX_BEND)
            # and parameter value can ask for (loop_slack), so a short note's
            # voice touches a small ring: same output, less memory traffic.
            out = ["    {",
                   f"        const double pmax = SSK_RATE / (ss_note_hz((double)v->note - (double)SSK_MAX_BEND) * "
                   f"{dnum(b.pitch_ratio)} * pow(2.0, {dnum(b.pitch_cents)} / 1200.0));",
                   f"        double need = pmax * {dnum(loop_slack(prog, b))};",
                   "        uint32_t size = 4u;",
                   "        if (need < pmax + 1.5) need = pmax + 1.5;",
                   f"        while (size < {prog.ring_size[i]}u && (double)size < need + 2.5) size <<= 1;",
                   f"        v->mask{i} = size - 1u;",
                   f"        memset(v->ring{i}, 0, size * sizeof(float));",
                   "    }"]
        else:
            out = [f"    memset(v->ring{i}, 0, sizeof(v->ring{i}));"]
        out.append(f"    v->len{i} = {b.fixed_length() if not b.pitch else 1};")
        out.append(f"    v->relg{i} = 1.0f;")
        return out

    def release_lines(self, prog: StepProgram, b: Block) -> list[str]:
        return [f"    v->relg{b.index} = (float)pow(SSK_RELEASE_DECAY, (double)v->len{b.index} / period);"]

    def loop_rest_lines(self, prog: StepProgram, b: Block, step: LoopStep, coefs: Coefs) -> list[str]:
        return [f"        rest += {dnum(b.fixed_length())};"]

    def loop_locals(self, ctx: LoopContext, b: Block) -> list[str]:
        i = b.index
        out = [f"    float *r{i} = v->ring{i};"]
        if b.pitch:
            out.append(f"    const uint32_t m{i} = v->mask{i};")
        out.append(f"    const uint32_t l{i} = (uint32_t)v->len{i};")
        out.append(f"    const float g{i} = v->relg{i};")
        return out

    def output_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        i = b.index
        return [f"        const float {sig(b.out_signal)} = r{i}[(pos - l{i}) & {ring_mask(ctx.prog, b)}];"]

    def update_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        i = b.index
        return [f"        r{i}[pos & {ring_mask(ctx.prog, b)}] = u{i}_0 * g{i};"]

    def prefetch_lines(self, prog: StepProgram, b: Block) -> list[str]:
        i = b.index
        m = ring_mask(prog, b, "v->")
        return [f"        SS_PREFETCH(&v->ring{i}[(v->pos + q) & {m}], 1);",
                f"        SS_PREFETCH(&v->ring{i}[(v->pos - (uint32_t)v->len{i} + q) & {m}], 0);"]

"""The tiny base every block emitter implements.

One emitter per block kind (engine.ir.program.BLOCK_KINDS); the kernel
generator (engine.backends.c.emit) looks each block's emitter up in
``EMITTERS[block.kind]`` and asks it for C lines at fixed places of the
generated file.  Every hook has the signature ``hook(..., b: Block) ->
list[str]``: complete, indented C lines, empty when the kind has nothing
to say there (the default).  Hooks that run inside a sample loop take the
:class:`LoopContext`; the rest take the step program.

Places, in file order: static ``tables``; the voice struct's small members
(``voice_scalars``) and, after the tuning members, its buffers
(``voice_arrays``); the shared scratch of the state struct
(``state_members``); ``reset_lines`` (ssk_voice_reset); ``release_lines``
(ssk_release_gains, ``period`` in samples in scope); ``loop_rest_lines``
(a block on a tuning loop: add its phase delay in samples to ``rest``);
``tune_lines`` (ssk_tune, ``pitch`` in semitones in scope); in the sample
loop: ``loop_locals``, ``output_lines`` (step 2), ``through_lines``
(step 3, feedthrough blocks), ``update_lines`` (step 5), ``save_lines``;
``prefetch_lines`` (ssk_voice_prefetch).

Real-time rules for what the hooks print: the sample-loop, tune, release
and reset code runs on the audio thread inside ``sheafsynth_render``: no
allocation, locks, I/O or unbounded loops; buffers are fixed-size members.
Safety: identifiers from indices only, numbers through text.num / dnum.
"""

from __future__ import annotations

from sheafsynth.engine.backends.c.text import Coefs, LoopContext
from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir.program import Block, LoopStep, StepProgram

__all__ = ["BlockEmitter"]


class BlockEmitter:
    """C text for one block kind (module doc: the hooks and where they land)."""

    kind: str = ""

    def tables(self, prog: StepProgram, b: Block) -> list[str]:
        return []

    def voice_scalars(self, prog: StepProgram, b: Block) -> list[str]:
        return []

    def voice_arrays(self, prog: StepProgram, b: Block) -> list[str]:
        return []

    def state_members(self, prog: StepProgram, b: Block) -> list[str]:
        return []

    def reset_lines(self, prog: StepProgram, b: Block) -> list[str]:
        return []

    def release_lines(self, prog: StepProgram, b: Block) -> list[str]:
        return []

    def loop_rest_lines(self, prog: StepProgram, b: Block, step: LoopStep, coefs: Coefs) -> list[str]:
        raise BuildError(f"internal: a {self.kind} block cannot sit on a tuning loop")

    def tune_lines(self, prog: StepProgram, b: Block, coefs: Coefs) -> list[str]:
        return []

    def loop_locals(self, ctx: LoopContext, b: Block) -> list[str]:
        return []

    def output_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        return []

    def through_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        raise BuildError(f"internal: a {self.kind} block has no feedthrough")

    def update_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        return []

    def save_lines(self, ctx: LoopContext, b: Block) -> list[str]:
        return []

    def prefetch_lines(self, prog: StepProgram, b: Block) -> list[str]:
        return []

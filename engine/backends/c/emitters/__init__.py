"""The table of block emitters: ``EMITTERS[block.kind]`` -> the C text for that kind.

One emitter per kind of engine.ir.program.BLOCK_KINDS, each behind the
tiny base :class:`BlockEmitter` (engine.backends.c.emitters.base documents
the hooks).  Adding a block kind adds one module here and one table line.
"""

from __future__ import annotations

from sheafsynth.engine.backends.c.emitters.base import BlockEmitter
from sheafsynth.engine.backends.c.emitters.delay import DelayEmitter
from sheafsynth.engine.backends.c.emitters.field import FieldEmitter
from sheafsynth.engine.backends.c.emitters.linear import LinearEmitter
from sheafsynth.engine.ir.program import BLOCK_KINDS, Block

__all__ = ["EMITTERS", "BlockEmitter", "emitter"]

EMITTERS: dict[str, BlockEmitter] = {e.kind: e for e in (LinearEmitter(), DelayEmitter(), FieldEmitter())}

if set(EMITTERS) != set(BLOCK_KINDS):   # a kind without an emitter is a programming error
    raise ImportError(f"block emitters {sorted(EMITTERS)} do not match the IR's kinds {sorted(BLOCK_KINDS)}")


def emitter(b: Block) -> BlockEmitter:
    """The emitter of block ``b``'s kind."""
    return EMITTERS[b.kind]

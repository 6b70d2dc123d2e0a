"""Cell kinds: the spec table from preset JSON to a cell model.

Each kind is one entry in ``CELL_KINDS`` mapping the JSON ``kind`` string to
a builder ``build(spec, path, parameters) -> CellModel``.  A new cell kind is
a new module here plus one line in the table (see DEVELOPERS.md); the JSON
Schema lists the same kinds and a test checks the two agree.

Builders take the Timebase the network is built for (engine.model.timebase)
and return per-sample matrices for that rate.

Every linear kind lowers to a small parameter-affine state-space block
``s+ = A s + B u``, ``y = C s + D u``; a delay line is kept as a ring buffer
(a chain of identity restriction maps is a shift, never a dense matrix).
"""

from __future__ import annotations

from typing import Callable, Mapping

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel, DelaySpec
from sheafsynth.engine.model.cells import delay
from sheafsynth.engine.model.cells import field
from sheafsynth.engine.model.cells import filters
from sheafsynth.engine.model.cells import statespace
from sheafsynth.engine.model.timebase import Timebase

__all__ = ["CELL_KINDS", "CellBuilder", "CellModel", "DelaySpec", "build_cell"]

CellBuilder = Callable[[dict, str, Mapping, Timebase], CellModel]

CELL_KINDS: dict[str, CellBuilder] = {
    "delay": delay.build,
    "statespace": statespace.build_statespace,
    "gain": statespace.build_gain,
    "onepole": filters.build_onepole,
    "biquad": filters.build_biquad,
    "allpass": filters.build_allpass,
    "field": field.build,
}


def build_cell(spec: dict, path: str, parameters: Mapping, tb: Timebase) -> CellModel:
    """The cell model of one ``cells[i]`` entry at ``tb.rate``, built by its kind's builder.

    PresetError on an unknown kind.  Every builder turns the entry's
    physical or design-rate quantities into per-sample ones for the
    timebase (engine.model.timebase).
    """
    kind = spec.get("kind")
    builder = CELL_KINDS.get(kind) if isinstance(kind, str) else None
    if builder is None:
        known = ", ".join(sorted(CELL_KINDS))
        raise PresetError(f'unknown cell kind "{kind}" (known: {known})', path + ".kind")
    return builder(spec, path, parameters, tb)

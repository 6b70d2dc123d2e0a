"""``delay``: a delay line of fixed length or tracking the played pitch.

``"length"`` is ``"pitch"``, a whole number of samples at the preset's
design rate, or ``{"ms": t}``; a fixed length is rounded to whole samples
at the rate the network is built for (engine.model.timebase).
"""

from __future__ import annotations

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel, DelaySpec
from sheafsynth.engine.model.timebase import Timebase

__all__ = ["build"]


def build(spec: dict, path: str, parameters, tb: Timebase) -> CellModel:
    length = spec["length"]
    if length == "pitch":
        d = DelaySpec(pitch=True)
    elif isinstance(length, (int, dict)) and not isinstance(length, bool):
        if isinstance(length, int) and length < 1:
            raise PresetError("a delay must be at least 1 sample long", path + ".length")
        d = DelaySpec(length=tb.samples(length, path + ".length"))
    else:
        raise PresetError('length must be a whole number of samples, {"ms": t} or "pitch"', path + ".length")
    return CellModel(spec["id"], "delay", 1, 1, delay=d)

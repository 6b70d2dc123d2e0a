"""``delay``: a delay line of fixed length or tracking the played pitch."""

from __future__ import annotations

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel, DelaySpec

__all__ = ["build"]


def build(spec: dict, path: str, parameters) -> CellModel:
    length = spec["length"]
    if length == "pitch":
        d = DelaySpec(pitch=True)
    elif isinstance(length, int) and not isinstance(length, bool):
        if length < 1:
            raise PresetError("a delay must be at least 1 sample long", path + ".length")
        d = DelaySpec(length=length)
    else:
        raise PresetError('length must be a whole number of samples or "pitch"', path + ".length")
    return CellModel(spec["id"], "delay", 1, 1, delay=d)

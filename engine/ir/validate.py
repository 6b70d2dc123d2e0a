"""Deep validation of a preset: the checks that need the network and its lowering.

The preset layer checks what a document can say about itself (schema,
ranges, controls).  Whether the cells and wires make a network (unique ids,
known endpoints, matrix shapes, stalk dimensions, no delay-free loop) is
found by building its sheaf (``model.sheaf.sheaf_of``); whether the network
can run (tuning loops, fields, stability of the field schemes) by lowering it
(``ir.lower.lower``).  Both raise PresetError naming the JSON path at fault.

Everything that takes a preset from a user goes through :func:`load_checked`
or :func:`check_preset`, so a bad preset is refused with one line when it
is loaded.  Not for the audio thread.
"""

from __future__ import annotations

import weakref
from typing import Any

from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset.load import load_preset
from sheafsynth.engine.preset.spec import Preset

__all__ = ["check_preset", "load_checked"]

_CHECKED: "weakref.WeakValueDictionary[int, Preset]" = weakref.WeakValueDictionary()


def check_preset(preset: Preset) -> Preset:
    """Build the network sheaf of ``preset`` and lower it at its design rate; returns ``preset``.

    Raises PresetError (JSON path first) on the first problem.  A preset
    object that passed once is not checked again.
    """
    if _CHECKED.get(id(preset)) is preset:
        return preset
    sheaf_of(preset)    # cells and wires make a network
    lower(preset, preset.design_rate)       # the network lowers (tuning loops, fields)
    _CHECKED[id(preset)] = preset
    return preset


def load_checked(source: Any) -> Preset:
    """:func:`~sheafsynth.engine.preset.load.load_preset` followed by :func:`check_preset`.

    ``source`` is a path, a JSON string, a dict or a Preset.
    """
    return check_preset(load_preset(source))

"""The preset layer: JSON documents in and out (DESIGN §3).

Modules: :mod:`.spec` (the parsed dataclasses), :mod:`.checks` (size limits
and the JSON Schema), :mod:`.load` (read, migrate, parse), :mod:`.save`
(atomic writes), :mod:`.affine` (numbers affine in parameters).  This layer
imports nothing above it; the network checks live in
``sheafsynth.engine.ir.validate``.
"""

from sheafsynth.engine.preset.load import factory_presets, load_preset, parse_preset
from sheafsynth.engine.preset.save import (STALE_TEMP_S, atomic_write_bytes, atomic_write_text, dump_preset, save_preset,
                                           sweep_stale_temps)
from sheafsynth.engine.preset.checks import SCHEMA_PATH
from sheafsynth.engine.preset.spec import ControlSpec, ParamSpec, Preset

__all__ = ["Preset", "ParamSpec", "ControlSpec", "load_preset", "parse_preset", "factory_presets",
           "save_preset", "dump_preset", "atomic_write_text", "atomic_write_bytes", "sweep_stale_temps",
           "STALE_TEMP_S",
           "SCHEMA_PATH"]

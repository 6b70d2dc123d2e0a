"""The parsed preset: parameters, controller bindings and the document itself.

These dataclasses are what :func:`sheafsynth.engine.preset.load.parse_preset`
returns.  They hold the JSON document (``Preset.raw``) and the facts every
layer reads from it; the network built from the document is the model
layer's business (``sheafsynth.engine.model.sheaf.sheaf_of``).
"""

from __future__ import annotations

import copy
import dataclasses
import math
from dataclasses import dataclass
from typing import Mapping

from sheafsynth.engine.errors import PresetError

__all__ = ["FORMAT", "VERSION", "DESIGN_RATE_V1", "DEFAULT_NOTES", "DEFAULT_POLYPHONY", "DEFAULT_RAMP_MS",
           "ParamSpec", "ControlSpec", "Preset"]

FORMAT = "sheafsynth-preset"
VERSION = 2
DESIGN_RATE_V1 = 48000.0     # Hz: the rate every version 1 file was designed at
DEFAULT_NOTES = (24, 108)       # MIDI note numbers: lowest and highest playable
DEFAULT_POLYPHONY = 16          # voices
DEFAULT_RAMP_MS = 5.0           # ms a parameter takes to reach a new target


@dataclass(frozen=True)
class ParamSpec:
    """One user parameter: a knob with a range (units as the preset says).

    ``ramp_ms`` is the time (ms) the kernel takes to move to a new target.
    """

    name: str
    value: float
    lo: float
    hi: float
    unit: str = ""
    about: str = ""
    ramp_ms: float = DEFAULT_RAMP_MS


@dataclass(frozen=True)
class ControlSpec:
    """A controller binding: MIDI CC, velocity, pressure or pitch bend.

    ``lo``/``hi`` are the parameter values at the controller's ends;
    ``range_semitones`` is the pitch bend range (semitones each way).
    """

    source: str            # "cc", "velocity", "pressure", "pitchbend"
    cc: int | None = None
    parameter: str | None = None
    curve: str = "linear"
    lo: float | None = None
    hi: float | None = None
    range_semitones: float = 2.0


@dataclass
class Preset:
    """A parsed preset; ``raw`` is the JSON document as loaded (after migration).

    ``release_decay`` is the amplitude factor per period a released voice
    uses.  ``design_rate`` (Hz) is the rate the document's per-sample values
    were written for (engine.model.timebase carries them to other rates).
    """

    raw: dict
    name: str
    about: str
    polyphony: int
    notes: tuple[int, int]
    parameters: dict[str, ParamSpec]
    controls: list[ControlSpec]
    excitation: dict
    release_decay: float
    source: str = "<memory>"
    design_rate: float = DESIGN_RATE_V1

    def with_values(self, values: Mapping[str, float]) -> "Preset":
        """A copy whose parameter defaults are ``values`` (range-checked).

        Only the values change: the copy's structure is this preset's, so it
        needs no new structural checks.
        """
        raw = copy.deepcopy(self.raw)
        params = dict(self.parameters)
        for name, v in values.items():
            if name not in self.parameters:
                raise PresetError(f'unknown parameter "{name}"', "parameters")
            spec = self.parameters[name]
            if not (math.isfinite(v) and spec.lo <= v <= spec.hi):
                raise PresetError(f"value {v:g} is outside [{spec.lo:g}, {spec.hi:g}]",
                                  f"parameters.{name}.value")
            raw["parameters"][name]["value"] = float(v)
            params[name] = dataclasses.replace(spec, value=float(v))
        return dataclasses.replace(self, raw=raw, parameters=params, controls=list(self.controls),
                                   excitation=dict(self.excitation))

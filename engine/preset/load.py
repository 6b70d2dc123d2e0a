"""Read, migrate and parse presets (DESIGN §3, format version 1).

A preset is plain JSON.  :func:`load_preset` runs the gates this layer can
run by itself, each raising a PresetError whose message starts with the JSON
path at fault:

1. parsing (bad JSON names line and column),
2. size limits and the shipped JSON Schema (:mod:`.checks`),
3. migration of older versions (never silent reinterpretation),
4. checks on parameters and controls the schema cannot express (ranges,
   reserved and doubly bound CCs).

Checks that need the network (unique cell ids, known endpoints, matrix
shapes, stalk dimensions, delay-free loops, tuning) belong to the layers
above: ``sheafsynth.engine.ir.validate.load_checked`` runs all of them.
"""

from __future__ import annotations

import copy
import json
import os
from pathlib import Path
from typing import Any, Mapping

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.preset.checks import MAX_DEPTH, check_values, schema_error
from sheafsynth.engine.preset.spec import (DEFAULT_NOTES, DEFAULT_POLYPHONY, DEFAULT_RAMP_MS, DESIGN_RATE_V1,
                                           FORMAT, VERSION, ControlSpec, ParamSpec, Preset)

__all__ = ["RESERVED_CC", "read_json", "parse_json_text", "migrate", "migrate_v1_to_v2", "parse_preset", "load_preset",
           "factory_presets"]

#: MIDI CCs with a fixed meaning (MIDI 1.0 channel mode and RPN messages); no control may bind them.
RESERVED_CC = {120: "all sound off", 121: "reset controllers", 123: "all notes off",
               64: "sustain", 100: "RPN LSB", 101: "RPN MSB", 6: "data entry", 38: "data entry LSB"}


def read_json(source: str | os.PathLike) -> dict:
    """Read a JSON file; errors name the file, and line/column for bad JSON."""
    p = Path(source)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PresetError("no such preset file", str(p)) from None
    except (OSError, UnicodeDecodeError) as e:
        raise PresetError(f"cannot read: {e}", str(p)) from None
    return parse_json_text(text, str(p))


def parse_json_text(text: str, where: str = "<text>") -> dict:
    """Parse JSON text that must hold one object; NaN and Infinity are refused."""
    try:
        doc = json.loads(text, parse_constant=_reject_constant)
    except json.JSONDecodeError as e:
        raise PresetError(f"not valid JSON: {e.msg} at line {e.lineno} column {e.colno}", where) from None
    except ValueError as e:
        raise PresetError(str(e), where) from None
    except RecursionError:
        raise PresetError(f"JSON nested too deeply (a preset needs at most {MAX_DEPTH} levels)", where) from None
    if not isinstance(doc, dict):
        raise PresetError("a preset must be a JSON object", where)
    return doc


def _reject_constant(name: str):
    raise ValueError(f"non-finite number {name} is not allowed in a preset")


def migrate(doc: dict) -> dict:
    """Bring an older document to the current version; never reinterpret.

    Each step is a pure function of the document.  Version 1 -> 2: version
    1 wrote every time, loss and filter coefficient per sample at 48 kHz;
    version 2 says so explicitly (``"design_rate": 48000``), so the file
    means what it always meant at 48 kHz and is carried to other rates by
    the physical meaning of each value (engine.model.timebase).
    """
    if doc.get("format") != FORMAT:
        raise PresetError(f'expected "{FORMAT}", got {doc.get("format")!r}', "format")
    v = doc.get("version")
    if isinstance(v, bool) or not isinstance(v, int):
        raise PresetError("version must be an integer", "version")
    if v > VERSION:
        raise PresetError(f"version {v} was written by a newer sheafsynth (this one reads up to {VERSION})",
                          "version")
    if v < 1:
        raise PresetError(f"version {v} is not a sheafsynth preset version (first is 1)", "version")
    if v == 1:
        doc = migrate_v1_to_v2(doc)
    return doc


def migrate_v1_to_v2(doc: dict) -> dict:
    """A version 1 document as version 2: the same keys, the design rate made explicit."""
    if "design_rate" in doc:
        raise PresetError('"design_rate" belongs to version 2; a version 1 file was designed at 48000 Hz',
                          "design_rate")
    out = {}
    for key, value in doc.items():
        out[key] = 2 if key == "version" else value
        if key == "version":
            out["design_rate"] = int(DESIGN_RATE_V1)
    return out


def load_preset(source: Any) -> Preset:
    """Load a preset from a path, a JSON string, a dict or a Preset (returned as is).

    Runs this layer's checks only; ``ir.validate.load_checked`` adds the
    network checks.
    """
    if isinstance(source, Preset):
        return source
    if isinstance(source, dict):
        check_values(source)
        doc, where = copy.deepcopy(source), "<memory>"
    elif isinstance(source, str) and source.lstrip().startswith("{"):
        doc, where = parse_json_text(source), "<text>"
    else:
        doc, where = read_json(source), str(source)
    return parse_preset(doc, where)


def parse_preset(doc: dict, where: str = "<memory>") -> Preset:
    """A Preset from a JSON document (taken, not copied): limits, migration, schema, parameters, controls."""
    check_values(doc)
    doc = migrate(doc)
    err = schema_error(doc)
    if err is not None:
        raise err
    params: dict[str, ParamSpec] = {}
    for name, p in doc.get("parameters", {}).items():
        path = f"parameters.{name}"
        lo, hi, v = float(p["min"]), float(p["max"]), float(p["value"])
        if not lo < hi:
            raise PresetError(f"min {lo:g} must be below max {hi:g}", path)
        if not lo <= v <= hi:
            raise PresetError(f"value {v:g} is outside [{lo:g}, {hi:g}]", path + ".value")
        params[name] = ParamSpec(name, v, lo, hi, p.get("unit", ""), p.get("about", ""),
                                 float(p.get("ramp_ms", DEFAULT_RAMP_MS)))
    notes = tuple(doc.get("notes", DEFAULT_NOTES))
    if notes[0] > notes[1]:
        raise PresetError(f"lowest note {notes[0]} is above highest note {notes[1]}", "notes")
    controls = [_parse_control(c, f"controls[{i}]", params) for i, c in enumerate(doc.get("controls", []))]
    seen: dict[int, int] = {}
    for i, c in enumerate(controls):
        if c.source == "cc" and c.cc is not None:
            if c.cc in seen:
                raise PresetError(f"CC {c.cc} is already bound by controls[{seen[c.cc]}]", f"controls[{i}].cc")
            seen[c.cc] = i
    exc = dict(doc.get("excitation", {"kind": "noise", "length": "period", "velocity_brightness": True}))
    return Preset(
        raw=doc, name=doc["name"], about=doc.get("about", ""),
        polyphony=int(doc.get("polyphony", DEFAULT_POLYPHONY)), notes=(int(notes[0]), int(notes[1])),
        parameters=params, controls=controls, excitation=exc,
        release_decay=float(doc.get("release", {}).get("decay", 0.9)), source=where,
        design_rate=float(doc.get("design_rate", DESIGN_RATE_V1)),
    )


def _parse_control(c: dict, path: str, params: Mapping[str, ParamSpec]) -> ControlSpec:
    source = c.get("source", "cc" if "cc" in c else None)
    if source is None:
        raise PresetError('a control needs "cc" or "source"', path)
    if source == "cc" and "cc" not in c:
        raise PresetError('a "cc" control needs a "cc" number', path)
    if source == "pitchbend":
        if "parameter" in c:
            raise PresetError("pitch bend moves the pitch, not a parameter", path + ".parameter")
        return ControlSpec("pitchbend", range_semitones=float(c.get("range_semitones", 2.0)))
    if "range_semitones" in c:
        raise PresetError("range_semitones belongs to a pitchbend control", path + ".range_semitones")
    name = c.get("parameter")
    if not isinstance(name, str):
        raise PresetError('a control needs "parameter"', path)
    if name not in params:
        raise PresetError(f'unknown parameter "{name}"', path + ".parameter")
    if source == "cc" and c["cc"] in RESERVED_CC:
        raise PresetError(f'CC {c["cc"]} is reserved for {RESERVED_CC[c["cc"]]}', path + ".cc")
    spec = params[name]
    lo = float(c.get("min", spec.lo))
    hi = float(c.get("max", spec.hi))
    for key, v in (("min", lo), ("max", hi)):
        if not spec.lo <= v <= spec.hi:
            raise PresetError(f"{v:g} is outside the parameter's range [{spec.lo:g}, {spec.hi:g}]", f"{path}.{key}")
    curve = c.get("curve", "linear")
    if curve == "exp" and (lo <= 0 or hi <= 0):
        raise PresetError("an exp curve needs a range above zero", path + ".curve")
    return ControlSpec(source, c.get("cc"), name, curve, lo, hi)


def factory_presets() -> list[Path]:
    """The factory preset files, sorted by name."""
    return sorted(FACTORY_DIR.glob("*.json"))

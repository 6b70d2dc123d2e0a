"""Load, validate, migrate and save presets (DESIGN §3, format version 1).

A preset is plain JSON.  Loading runs three gates, each of which raises a
PresetError whose message starts with the JSON path at fault:

1. parsing (bad JSON names line and column),
2. the shipped JSON Schema (``engine/preset/schema/preset-v1.json``),
3. semantic checks the schema cannot express (parameter ranges, unique ids,
   known endpoints, matrix shapes, stalk dimensions, delay-free loops),
   done by building the network sheaf.

Saving is atomic: a temporary file in the same folder, fsync, rename.
"""

from __future__ import annotations

import copy
import json
import math
import os
import re
import tempfile
import time
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any, Mapping

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.locations import FACTORY_DIR

FORMAT = "sheafsynth-preset"
VERSION = 1
SCHEMA_PATH = Path(__file__).resolve().parent / "schema" / "preset-v1.json"
DEFAULT_NOTES = (24, 108)
DEFAULT_POLYPHONY = 16
DEFAULT_RAMP_MS = 5.0


@dataclass(frozen=True)
class ParamSpec:
    """One user parameter: a knob with a range (units as the preset says)."""

    name: str
    value: float
    lo: float
    hi: float
    unit: str = ""
    about: str = ""
    ramp_ms: float = DEFAULT_RAMP_MS

    def clamp(self, x: float) -> float:
        return min(self.hi, max(self.lo, x))


@dataclass(frozen=True)
class ControlSpec:
    """A controller binding: MIDI CC, velocity, pressure or pitch bend."""

    source: str            # "cc", "velocity", "pressure", "pitchbend"
    cc: int | None = None
    parameter: str | None = None
    curve: str = "linear"
    lo: float | None = None
    hi: float | None = None
    range_semitones: float = 2.0


@dataclass
class Preset:
    """A validated preset; ``raw`` is the JSON document as loaded."""

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
    _sheaf: Any = field(default=None, repr=False)

    @property
    def sheaf(self):
        """The network sheaf built from this preset (see engine.model.sheaf)."""
        if self._sheaf is None:
            from sheafsynth.engine.model.sheaf import build_sheaf

            self._sheaf = build_sheaf(self)
        return self._sheaf

    def with_values(self, values: Mapping[str, float]) -> "Preset":
        """A copy whose parameter defaults are ``values`` (range-checked)."""
        raw = copy.deepcopy(self.raw)
        for name, v in values.items():
            if name not in self.parameters:
                raise PresetError(f'unknown parameter "{name}"', "parameters")
            spec = self.parameters[name]
            if not (math.isfinite(v) and spec.lo <= v <= spec.hi):
                raise PresetError(f"value {v:g} is outside [{spec.lo:g}, {spec.hi:g}]",
                                  f"parameters.{name}.value")
            raw["parameters"][name]["value"] = float(v)
        return parse_preset(raw, self.source)


# --------------------------------------------------------------------------
# paths

def json_path(parts) -> str:
    """``["cells", 2, "C", 0, 0]`` -> ``cells[2].C[0][0]``."""
    out = ""
    for p in parts:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            out += ("." if out else "") + str(p)
    return out or "(top level)"


@lru_cache(maxsize=1)
def _validator():
    import jsonschema

    with open(SCHEMA_PATH, encoding="utf-8") as f:
        schema = json.load(f)
    return jsonschema.Draft202012Validator(schema)


def _schema_error(doc: dict) -> PresetError | None:
    import jsonschema

    errors = list(_validator().iter_errors(doc))
    if not errors:
        return None
    best = jsonschema.exceptions.best_match(errors)
    # Prefer the deepest error: it names the exact entry at fault.
    deepest = max(errors, key=lambda e: len(e.absolute_path))
    if len(deepest.absolute_path) > len(best.absolute_path):
        best = deepest
    while best.context:
        best = max(best.context, key=lambda e: len(e.absolute_path))
    msg = best.message
    if best.validator == "additionalProperties":
        msg = msg.replace("Additional properties are not allowed", "unknown key")
    if len(msg) > 240:
        msg = msg[:240] + "…"
    return PresetError(msg, json_path(best.absolute_path))


# --------------------------------------------------------------------------
# loading

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


MAX_DEPTH = 32          # nesting levels; the deepest v1 key sits at about 8
MAX_VALUES = 200_000    # JSON values (keys' values, list items) in one document
FLOAT32_MAX = 3.4028234663852886e38


def check_values(doc: Any) -> None:
    """Refuse what no preset needs before anything recursive walks the document.

    Iterative, so it cannot overflow the stack: nesting deeper than
    MAX_DEPTH, more than MAX_VALUES values, and numbers that are not finite
    or do not fit the kernel's 32-bit float (``1e400`` parses as infinity,
    a 400-digit integer cannot become a float at all).
    """
    stack = [(doc, ())]
    count = 0
    while stack:
        node, parts = stack.pop()
        count += 1
        if count > MAX_VALUES:
            raise PresetError(f"more than {MAX_VALUES} values; no preset needs that many", "(top level)")
        if len(parts) > MAX_DEPTH:
            raise PresetError(f"nested deeper than {MAX_DEPTH} levels", json_path(parts[:MAX_DEPTH]))
        if isinstance(node, dict):
            stack.extend((v, parts + (str(k),)) for k, v in node.items())
        elif isinstance(node, list):
            stack.extend((v, parts + (i,)) for i, v in enumerate(node))
        elif isinstance(node, (int, float)) and not isinstance(node, bool):
            if not abs(node) <= FLOAT32_MAX:
                shown = f"{node:g}" if isinstance(node, float) else f"an integer of {len(str(abs(node)))} digits"
                raise PresetError(f"number {shown} is not finite or does not fit a 32-bit float", json_path(parts))


def migrate(doc: dict) -> dict:
    """Bring an older document to the current version; never reinterpret."""
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
    # Version 1 is the first format: nothing to migrate yet.  Future
    # migrations go here as v -> v+1 steps, each a pure function.
    return doc


def load_preset(source) -> Preset:
    """Load a preset from a path, a JSON string or a dict, fully validated."""
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
    check_values(doc)
    doc = migrate(doc)
    err = _schema_error(doc)
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
        if c.source == "cc":
            if c.cc in seen:
                raise PresetError(f"CC {c.cc} is already bound by controls[{seen[c.cc]}]", f"controls[{i}].cc")
            seen[c.cc] = i
    exc = dict(doc.get("excitation", {"kind": "noise", "length": "period", "velocity_brightness": True}))
    preset = Preset(
        raw=doc, name=doc["name"], about=doc.get("about", ""),
        polyphony=int(doc.get("polyphony", DEFAULT_POLYPHONY)), notes=(int(notes[0]), int(notes[1])),
        parameters=params, controls=controls, excitation=exc,
        release_decay=float(doc.get("release", {}).get("decay", 0.9)), source=where,
    )
    preset.sheaf  # semantic validation of cells and wires
    from sheafsynth.engine.ir.lower import lower

    lower(preset)  # structural checks of the lowering (tuning loops, fields)
    return preset


_RESERVED_CC = {120: "all sound off", 121: "reset controllers", 123: "all notes off",
                64: "sustain", 100: "RPN LSB", 101: "RPN MSB", 6: "data entry", 38: "data entry LSB"}


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
    if source == "cc" and c["cc"] in _RESERVED_CC:
        raise PresetError(f'CC {c["cc"]} is reserved for {_RESERVED_CC[c["cc"]]}', path + ".cc")
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


# --------------------------------------------------------------------------
# saving

def dump_preset(doc: Mapping) -> str:
    return json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def save_preset(doc: Mapping | Preset, path: str | os.PathLike) -> Path:
    """Validate, then write atomically (temp file, fsync, rename, fsync dir)."""
    raw = doc.raw if isinstance(doc, Preset) else dict(doc)
    check_values(raw)
    parse_preset(copy.deepcopy(raw), str(path))  # never write an invalid preset
    return atomic_write_text(path, dump_preset(raw))


STALE_TEMP_S = 600.0
"""A temp file of an atomic write untouched this long (s) belongs to a write that was killed."""


def sweep_stale_temps(target: str | os.PathLike, older_than_s: float = STALE_TEMP_S) -> int:
    """Remove what killed atomic writes of ``target`` left behind; returns how many.

    Only files named exactly as :func:`atomic_write_text` names its temp
    files for this target (hidden, ``.NAME.<random>.tmp``, same folder) and
    not modified for ``older_than_s`` -- no running write keeps one that
    long.  Nothing else is touched; a file that cannot be removed is left.
    """
    target = Path(target)
    pattern = re.compile(re.escape("." + target.name + ".") + r"[A-Za-z0-9_]{6,16}\.tmp")
    cutoff = time.time() - float(older_than_s)
    removed = 0
    try:
        candidates = [e for e in os.scandir(target.parent) if pattern.fullmatch(e.name)]
    except OSError:
        return 0
    for e in candidates:
        try:
            if e.is_file(follow_symlinks=False) and e.stat(follow_symlinks=False).st_mtime < cutoff:
                os.unlink(e.path)
                removed += 1
        except OSError:
            pass
    return removed


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` so readers see the old file or the new one, never a part.

    Temp file in the same folder, fsync, rename, fsync of the folder.  Temp
    files that earlier, killed writes of the same file left are swept first
    (:func:`sweep_stale_temps`).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    sweep_stale_temps(target)
    fd, tmp = tempfile.mkstemp(prefix="." + target.name + ".", suffix=".tmp", dir=target.parent)
    try:
        os.chmod(tmp, _file_mode(target))
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    try:
        dfd = os.open(target.parent, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        pass
    return target


def _file_mode(target: Path) -> int:
    """Keep an existing file's mode; new files get 0666 minus the umask."""
    try:
        return target.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def factory_presets() -> list[Path]:
    """The factory preset files, sorted by name."""
    return sorted(FACTORY_DIR.glob("*.json"))

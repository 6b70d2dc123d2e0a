"""``sheafsynth new NAME``: write a starting preset into the user folder.

``--kind string|drum|bar|plate`` starts from one of our own small designs
(format version 2, times in s, losses in 1/s, filter corners in Hz, so the
file means the same at every sample rate); ``--from PRESET`` copies a bank
preset or a preset file (migrated to the current version) under the new
name.  Every part of a ``--kind`` design carries an ``about`` that says
what it does and which knob to turn first.

The file lands in the user folder (host.bank.user_dir; SHEAFSYNTH_USER_DIR
overrides) as ``NAME.json``: written to a temporary file first
(engine.preset.atomic_write_text), then hard-linked into place, so an
existing file is never replaced, not even by a racing writer, and a crash
leaves either nothing or the whole file.  The document passes the network
checks (engine.ir.validate.check_preset) before anything is written; run
``sheafsynth check NAME`` for the full stability report.
"""

from __future__ import annotations

import argparse
import copy
import errno
import os
import tempfile
from pathlib import Path

from sheafsynth.engine.errors import InputError
from sheafsynth.engine.ir.validate import check_preset
from sheafsynth.engine.preset import atomic_write_text, dump_preset, parse_preset
from sheafsynth.engine.preset.load import migrate, read_json
from sheafsynth.host import bank
from sheafsynth.host.commands.shared import Command

__all__ = ["COMMAND", "KINDS", "check_name", "starting_document", "write_new"]

_FORMAT = "sheafsynth-preset"
_DESIGN_RATE = 48000


def _head(name: str, about: str, polyphony: int, notes: tuple[int, int]) -> dict:
    return {"format": _FORMAT, "version": 2, "design_rate": _DESIGN_RATE, "name": name, "about": about,
            "polyphony": polyphony, "notes": list(notes)}


def _loss_param(what: str, value: float, lo: float, hi: float) -> dict:
    return {"value": value, "min": lo, "max": hi, "unit": "1/s",
            "about": f"loss rate of the {what}: amplitude falls as exp(-rate t), so T60 = 6.91 / rate seconds "
                     "(turn it down for a longer ring)"}


def _string(name: str) -> dict:
    doc = _head(name, "Starting string: a pitch-tracking delay loop (the string) closed through a two-tap "
                      "average (losses that grow with frequency) and a tuning allpass (the fraction of a "
                      "sample the loop length needs). Change the decay knob first, then the pluck.",
                16, (28, 100))
    doc["parameters"] = {
        "decay": {"value": 0.996, "min": 0.95, "max": 0.9995, "unit": "gain per pass",
                  "about": "loop gain each trip round the string: closer to 1 rings longer"},
        "pluck": {"value": 0.5, "min": 0.1, "max": 0.9, "unit": "gain",
                  "about": "how much of the noise burst reaches the string"},
    }
    doc["cells"] = [
        {"id": "string", "kind": "delay", "length": "pitch",
         "about": "the string: a delay line one period of the played note long"},
        {"id": "avg", "kind": "onepole", "b": [0.5, 0.5], "a": [1, 0],
         "about": "two-tap average: high partials lose more each trip, as in a real string"},
        {"id": "tune", "kind": "allpass", "delay": "pitch-fraction",
         "about": "tuning allpass: supplies the fraction of a sample that keeps the loop in tune"},
    ]
    doc["wires"] = [
        {"from": "excite", "to": "string", "gain": "pluck"},
        {"from": "string", "to": "avg", "gain": "decay"},
        {"from": "avg", "to": "tune"},
        {"from": "tune", "to": "string"},
        {"from": "string", "to": "out", "gain": 0.5},
    ]
    doc["excitation"] = {"kind": "noise", "length": "period", "velocity_brightness": True}
    doc["controls"] = [{"cc": 1, "parameter": "decay", "curve": "exp"}, {"cc": 74, "parameter": "pluck"},
                       {"source": "pitchbend", "range_semitones": 2}]
    doc["release"] = {"decay": 0.9}
    return doc


def _drum(name: str) -> dict:
    doc = _head(name, "Starting drum: a square head with a fixed rim (a 24 x 24 grid, 22 x 22 moving points) "
                      "tuned to the played note, hit by a short noise burst. Move the beater knob from the "
                      "centre towards the rim, then change the damping.", 6, (36, 70))
    doc["parameters"] = {
        "tension": {"value": 1.0, "min": 0.94, "max": 1.06, "unit": "x",
                    "about": "head tension relative to the tuned value (about a semitone either way)"},
        "damping": _loss_param("head", 5.76, 1.44, 48.0),
        "beater": {"value": 0.42, "min": 0.1, "max": 0.5, "unit": "fraction",
                   "about": "hit position from near the rim (0.1) to the centre (0.5)"},
    }
    doc["cells"] = [
        {"id": "head", "kind": "field", "complex": {"grid": [24, 24]}, "boundary": "fixed", "dynamics": "wave",
         "speed": {"param": "tension", "scale": 0.5}, "loss": {"per_second": "damping"},
         "hf_loss": {"per_second": 0.96}, "strike": ["beater", 0.47], "pickup": [0.58, 0.63], "tune": "pitch",
         "about": "the drum head: a wave field on a square grid, clamped at the rim, its lowest mode at the "
                  "played note"},
    ]
    doc["wires"] = [{"from": "excite", "to": "head", "gain": 0.5}, {"from": "head", "to": "out", "gain": 1.0}]
    doc["excitation"] = {"kind": "noise", "length": {"ms": 1.0}, "velocity_brightness": True}
    doc["controls"] = [{"cc": 74, "parameter": "beater"}, {"source": "pitchbend", "range_semitones": 2}]
    doc["release"] = {"decay": 0.8}
    return doc


def _bar(name: str) -> dict:
    doc = _head(name, "Starting bar: a stiff path of 16 points with free ends, tuned to the played note "
                      "(partials near 1 : 2.76 : 5.40, as a free-free bar has). Move the mallet along the "
                      "bar, then change the damping.", 8, (33, 60))
    doc["parameters"] = {
        "damping": _loss_param("bar", 2.88, 0.48, 24.0),
        "mallet": {"value": 0.3, "min": 0.05, "max": 0.5, "unit": "fraction",
                   "about": "strike position from the end (0.05) to the middle (0.5) of the bar"},
    }
    doc["cells"] = [
        {"id": "pulse", "kind": "onepole", "b": [1, -1], "a": [1, 0],
         "about": "first difference of the strike: the bar's rigid-body drift modes get no net push"},
        {"id": "bar", "kind": "field", "complex": {"path": 16}, "boundary": "free", "dynamics": "stiff",
         "speed": 0, "stiffness": 0.4, "loss": {"per_second": "damping"}, "hf_loss": {"per_second": 0.48},
         "strike": "mallet", "pickup": 0.03, "tune": "pitch",
         "about": "the bar: a bending (stiff) field on a path, free at both ends, its lowest ringing mode at "
                  "the played note"},
        {"id": "dc", "kind": "onepole", "highpass_hz": 38.3,
         "about": "a 38.3 Hz highpass: blocks the two rigid-body drift modes of a free bar"},
        {"id": "air", "kind": "biquad", "design": {"type": "lowpass", "hz": 5000, "q": 0.7071},
         "about": "a 5 kHz lowpass: keeps the highest grid modes of the short path down at every rate"},
    ]
    doc["wires"] = [
        {"from": "excite", "to": "pulse"}, {"from": "pulse", "to": "bar", "gain": 2.0},
        {"from": "bar", "to": "dc"}, {"from": "dc", "to": "air", "gain": 1.0},
        {"from": "air", "to": "out", "gain": 1.0},
    ]
    doc["excitation"] = {"kind": "impulse"}
    doc["controls"] = [{"cc": 74, "parameter": "mallet"}, {"source": "pitchbend", "range_semitones": 2}]
    doc["release"] = {"decay": 0.85}
    return doc


def _plate(name: str) -> dict:
    doc = _head(name, "Starting plate: a free plate on a 20 x 16 torus (no edges, so every point rings alike) "
                      "tuned to the played note; a knob walks the pickup round it. Change the sheen (how fast "
                      "the high partials fade), then the damping.", 6, (36, 78))
    doc["parameters"] = {
        "tension": {"value": 1.0, "min": 0.94, "max": 1.06, "unit": "x",
                    "about": "plate tension relative to the tuned value (about a semitone either way)"},
        "damping": _loss_param("plate", 3.84, 0.96, 28.8),
        "sheen": {"value": 1.44, "min": 0.0, "max": 9.6, "unit": "1/s",
                  "about": "extra loss rate of the high partials (per unit of the grid Laplacian)"},
        "pickup": {"value": 0.62, "min": 0.05, "max": 0.95, "unit": "fraction",
                   "about": "pickup position along the long way round"},
    }
    doc["cells"] = [
        {"id": "pulse", "kind": "onepole", "b": [1, -1], "a": [1, 0],
         "about": "first difference of the strike: the plate's drift mode gets no net push"},
        {"id": "plate", "kind": "field", "complex": {"grid": [20, 16], "wrap": "torus"}, "boundary": "free",
         "dynamics": "wave", "speed": {"param": "tension", "scale": 0.5}, "loss": {"per_second": "damping"},
         "hf_loss": {"per_second": "sheen"}, "strike": [0.21, 0.33], "pickup": ["pickup", 0.71], "tune": "pitch",
         "about": "the plate: a wave field on a torus, its lowest ringing mode at the played note"},
        {"id": "dc", "kind": "onepole", "highpass_hz": 38.3,
         "about": "a 38.3 Hz highpass: blocks the plate's drift mode (a torus has dim H0 = 1)"},
        {"id": "air", "kind": "biquad", "design": {"type": "lowpass", "hz": 7000, "q": 0.7071},
         "about": "a 7 kHz lowpass: keeps the plate's highest grid modes down at every rate"},
    ]
    doc["wires"] = [
        {"from": "excite", "to": "pulse"}, {"from": "pulse", "to": "plate", "gain": 2.0},
        {"from": "plate", "to": "dc"}, {"from": "dc", "to": "air", "gain": 1.0},
        {"from": "air", "to": "out", "gain": 1.0},
    ]
    doc["excitation"] = {"kind": "noise", "length": {"ms": 1.0}, "velocity_brightness": True}
    doc["controls"] = [{"cc": 74, "parameter": "pickup"}, {"source": "pitchbend", "range_semitones": 2}]
    doc["release"] = {"decay": 0.9}
    return doc


#: The starting designs ``--kind`` offers, by name.
KINDS = {"string": _string, "drum": _drum, "bar": _bar, "plate": _plate}


def starting_document(name: str, kind: str | None = None, source: str | None = None) -> dict:
    """The preset document ``new`` writes: design ``kind``, or a copy of preset ``source`` named ``name``.

    Raises PresetError (bad source file) or InputError (unknown kind); the
    result passes engine.ir.validate.check_preset.
    """
    if (kind is None) == (source is None):
        raise InputError("give exactly one of --kind and --from")
    if kind is not None:
        if kind not in KINDS:
            raise InputError(f"--kind must be one of {', '.join(KINDS)}, got {kind!r}")
        doc = KINDS[kind](name)
    else:
        path = bank.resolve(str(source))
        doc = migrate(copy.deepcopy(read_json(path)))
        first = str(doc.get("about", "")).strip()
        doc["about"] = f"Started from {path.stem}." + (f" {first}" if first else "")
        doc["name"] = name
    check_preset(parse_preset(copy.deepcopy(doc), name))
    return doc


def _link_into_place(tmp: Path, target: Path) -> None:
    """Give the finished temp file the name ``target`` unless that name exists (FileExistsError)."""
    try:
        os.link(tmp, target)
    except OSError as e:
        if e.errno == errno.EEXIST:
            raise FileExistsError(str(target)) from None
        if e.errno not in (errno.EPERM, errno.EOPNOTSUPP, errno.ENOSYS, errno.EXDEV, errno.EMLINK):
            raise
        if target.exists():                       # no hard links here: check, then rename
            raise FileExistsError(str(target)) from None
        os.replace(tmp, target)


def check_name(name: str) -> None:
    """InputError (one line) unless ``name`` can name a new user preset."""
    if not bank.valid_preset_name(name):
        raise InputError(f"name {name!r}: use 1-64 letters, digits, spaces, '-' or '_' (not first)")
    if bank.is_factory_name(name):
        raise InputError(f'name "{name}" is a factory preset; choose another name')


def write_new(doc: dict, name: str, folder: Path | None = None) -> Path:
    """Write ``doc`` as ``folder/NAME.json`` (default the user folder); never over an existing file.

    InputError for a bad or factory name, or when the file exists (which is
    then left byte for byte as it was).
    """
    check_name(name)
    folder = bank.user_dir() if folder is None else folder
    target = folder / f"{name}.json"
    if target.exists():
        raise InputError(f"{target} already exists: choose another name or move it away (nothing was written)")
    folder.mkdir(parents=True, exist_ok=True)
    tmpdir = Path(tempfile.mkdtemp(prefix=f".{name}.", suffix=".new", dir=folder))
    try:
        tmp = atomic_write_text(tmpdir / f"{name}.json", dump_preset(doc))
        try:
            _link_into_place(tmp, target)
        except FileExistsError:
            raise InputError(f"{target} already exists: choose another name or move it away "
                             "(nothing was written)") from None
    finally:
        for leftover in tmpdir.iterdir():
            leftover.unlink()
        tmpdir.rmdir()
    return target


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("name", metavar="NAME", help="the new preset's name (letters, digits, spaces, '-', '_')")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--kind", choices=list(KINDS), help="start from one of our small designs")
    g.add_argument("--from", dest="source", metavar="PRESET", help="start from a copy of a bank preset or file")


def _run(args: argparse.Namespace) -> int:
    check_name(args.name)
    doc = starting_document(args.name, kind=args.kind, source=args.source)
    try:
        path = write_new(doc, args.name)
    except PermissionError as e:
        raise InputError(f"{bank.user_dir()}: cannot write ({e.strerror}); nothing was written") from None
    print(f"wrote {path}")
    print(f"next: sheafsynth check {args.name!r}   then: sheafsynth inspect {args.name!r}")
    return 0


COMMAND = Command("new", "write a starting preset (a design of a kind, or a copy) into the user folder",
                  _add, _run)

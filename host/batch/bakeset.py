"""A sample set on disk: one WAV per take and ``map.json`` (JSON Schema: schema/bake-map.json).

Takes are rendered on the cluster (host.batch.takes) and written here, on
the client, each through a temporary file renamed into place
(host.offline.render.write_wav), so a crash or a full disk never leaves a
partial take under its final name.  ``map.json`` is written the same way
(engine.preset.atomic_write_text) every MAP_EVERY_S s while takes land, so an interrupted bake
keeps the map of what it finished.  A rerun with the same preset and
settings skips every take whose file still holds the samples its sha256 in
the map names.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import time
from pathlib import Path
from typing import Any, Callable, ContextManager

import jsonschema
import numpy as np
import soundfile as sf

from sheafsynth.engine import __version__
from sheafsynth.engine.errors import InputError, SheafsynthError
from sheafsynth.engine.preset import Preset, atomic_write_text
from sheafsynth.host.batch.cluster import run_tasks
from sheafsynth.host.batch.takes import SILENCE_DBFS, SILENCE_S, Take, TakeSettings, render_take
from sheafsynth.host.offline.render import peak_dbfs, write_wav

__all__ = ["MAP_NAME", "MAP_EVERY_S", "MAP_SCHEMA_PATH", "BakeResult", "parse_notes", "parse_velocities",
           "plan_takes", "samples_sha256", "validate_map", "check_folder", "bake_set"]

MAP_NAME = "map.json"
#: s between rewrites of map.json while a bake runs (it is always written at the end)
MAP_EVERY_S = 2.0
MAP_SCHEMA_PATH = Path(__file__).resolve().parent / "schema" / "bake-map.json"
_NOTE_SPEC = re.compile(r"^\s*(\d+)\s*-\s*(\d+)\s*(?:/\s*(\d+)\s*)?$")


class BakeResult(dict):
    """What ``bake_set`` did: "map" (the map document), "rendered", "skipped" (take counts), "path" (map.json)."""


def parse_notes(text: str, playable: tuple[int, int]) -> list[int]:
    """``--notes``: a range with an optional step (``36-96/3``) or a list (``48,55,60``), inside ``playable``."""
    m = _NOTE_SPEC.match(text)
    try:
        if m:
            lo, hi, step = int(m.group(1)), int(m.group(2)), int(m.group(3) or 1)
            if lo > hi or step < 1:
                raise InputError(f"--notes {text!r}: expected LOW-HIGH/STEP with LOW <= HIGH and STEP >= 1")
            notes = list(range(lo, hi + 1, step))
        else:
            notes = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--notes {text!r}: expected a range such as 36-96/3 or a list such as 48,55,60") from None
    if not notes:
        raise InputError(f"--notes {text!r}: no notes")
    lo, hi = playable
    for n in notes:
        if not lo <= n <= hi:
            raise InputError(f"--notes {text!r}: note {n} is outside the preset's playable range {lo}-{hi}")
    return sorted(set(notes))


def parse_velocities(text: str) -> list[int]:
    """``--velocities``: a list such as ``40,110``, each 1-127."""
    try:
        vels = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--velocities {text!r}: expected whole numbers 1-127 separated by commas") from None
    if not vels:
        raise InputError(f"--velocities {text!r}: no velocities")
    for v in vels:
        if not 1 <= v <= 127:
            raise InputError(f"--velocities {text!r}: velocity {v} is outside 1-127")
    return sorted(set(vels))


def plan_takes(notes: list[int], velocities: list[int], rounds: int) -> list[Take]:
    """Every (note, velocity, round), notes outermost."""
    if not 1 <= rounds <= 64:
        raise InputError(f"--rounds {rounds}: expected 1 to 64 round robins")
    return [Take(n, v, r) for n in notes for v in velocities for r in range(rounds)]


def samples_sha256(path: Path) -> str:
    """sha256 of a WAV file's samples, read as little-endian float32 (exact for 24-bit PCM and float)."""
    data, _ = sf.read(str(path), dtype="float32", always_2d=False)
    return hashlib.sha256(np.ascontiguousarray(data, dtype="<f4").tobytes()).hexdigest()


def validate_map(doc: Any) -> None:
    """Raise jsonschema.ValidationError unless ``doc`` follows schema/bake-map.json."""
    jsonschema.validate(doc, json.loads(MAP_SCHEMA_PATH.read_text()))


def _preset_sha256(preset: Preset) -> str:
    return hashlib.sha256(json.dumps(preset.raw, sort_keys=True).encode()).hexdigest()


def _settings(settings: TakeSettings, subtype: str) -> dict:
    return {"seconds_max": float(settings.seconds_max), "hold_s": float(settings.hold_s),
            "silence_dbfs": SILENCE_DBFS, "silence_s": SILENCE_S,
            "loudness": None if settings.loudness is None else float(settings.loudness),
            "seed": int(settings.seed), "subtype": subtype, "engine": __version__}


def check_folder(out: Path) -> None:
    """Refuse a folder we cannot write to, before any work (one clear line)."""
    try:
        out.mkdir(parents=True, exist_ok=True)
        probe = out / f".{MAP_NAME}.probe"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as e:
        raise InputError(f"--out {out}: cannot write there ({e.strerror or e})") from None


def _earlier(out: Path, head: dict) -> dict[tuple[int, int, int], dict]:
    """Takes of an earlier bake into ``out`` with the same preset and settings whose files are intact."""
    try:
        doc = json.loads((out / MAP_NAME).read_text())
        validate_map(doc)
    except (OSError, ValueError, jsonschema.ValidationError):
        return {}
    if any(doc[k] != head[k] for k in ("preset_sha256", "rate", "settings")):
        return {}
    keep = {}
    for t in doc["takes"]:
        path = out / t["file"]
        try:
            if samples_sha256(path) == t["sha256"]:
                keep[(t["note"], t["velocity"], t["round"])] = t
        except (OSError, RuntimeError, sf.LibsndfileError):
            continue
    return keep


def bake_set(cluster: Callable[[], ContextManager[Any]], preset: Preset, takes: list[Take], settings: TakeSettings, out: Path, *,
             subtype: str = "PCM_24", on_take: Callable[[dict], None] | None = None) -> BakeResult:
    """Render ``takes`` of ``preset`` into folder ``out`` on the cluster ``cluster()`` opens (module doc).

    ``cluster`` is called only when some take needs rendering (a rerun with every take intact starts none);
    it returns a context manager giving a ``distributed.Client`` (host.batch.cluster.open_cluster).

    ``on_take(entry)`` hears each take's map entry as its file lands.  Raises InputError for a folder that
    cannot be written (before any work) and SheafsynthError naming the file when a write fails (disk full).
    """
    out = Path(out)
    check_folder(out)
    head = {"format": "sheafsynth-bake-map", "version": 1, "preset": preset.name,
            "preset_sha256": _preset_sha256(preset), "rate": int(settings.rate),
            "settings": _settings(settings, subtype)}
    done = _earlier(out, head)
    entries: dict[tuple[int, int, int], dict] = {}
    todo = []
    for t in takes:
        old = done.get((t.note, t.velocity, t.round))
        if old is not None and old["file"] == t.file:
            entries[(t.note, t.velocity, t.round)] = old
        else:
            todo.append(t)

    def document() -> dict:
        listed = [entries[(t.note, t.velocity, t.round)] for t in takes if (t.note, t.velocity, t.round) in entries]
        return {**head, "takes": listed}

    last_write = [time.monotonic()]

    def landed(i: int, result: dict) -> None:
        t = todo[i]
        path = out / t.file
        audio = result["audio"]
        try:
            write_wav(path, audio, settings.rate, subtype)
        except (OSError, RuntimeError, sf.LibsndfileError) as e:
            why = getattr(e, "strerror", None) or str(e)
            raise SheafsynthError(f"bake: writing {path} failed ({why}); no partial take was left under that "
                                  "name") from None
        peak = peak_dbfs(audio)
        entry = {"file": t.file, "note": t.note, "velocity": t.velocity, "round": t.round,
                 "seconds": len(audio) / settings.rate, "peak": peak if math.isfinite(peak) else None,
                 "loudness": result["loudness"], "sha256": samples_sha256(path), "seed": int(result["seed"]),
                 "ended": result["ended"], "ceiling_held": bool(result["ceiling_held"])}
        entries[(t.note, t.velocity, t.round)] = entry
        now = time.monotonic()
        if now - last_write[0] >= MAP_EVERY_S:      # the map of what is done, now and then
            _write_map(out, document())
            last_write[0] = now
        if on_take is not None:
            on_take(entry)

    if todo:
        try:
            with cluster() as client:
                run_tasks(client, render_take, [(preset, t, settings) for t in todo], label="baking",
                          on_result=landed)
        except BaseException:
            try:            # keep the map of the takes that did land; the first error is the one to report
                _write_map(out, document())
            except SheafsynthError:
                pass
            raise
    doc = document()
    _write_map(out, doc)
    return BakeResult(map=doc, rendered=len(todo), skipped=len(takes) - len(todo), path=out / MAP_NAME)


def _write_map(out: Path, doc: dict) -> None:
    try:
        atomic_write_text(out / MAP_NAME, json.dumps(doc, indent=1) + "\n")
    except OSError as e:
        raise SheafsynthError(f"bake: writing {out / MAP_NAME} failed ({e.strerror or e})") from None

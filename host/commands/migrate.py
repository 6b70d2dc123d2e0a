"""``sheafsynth migrate FILE``: rewrite an older preset file in the current format version.

A version 1 file becomes version 2 with ``"design_rate": 48000`` (version 1
wrote every time, loss and coefficient per sample at 48 kHz); every other
key is kept as written, so the file sounds the same at 48 kHz and is carried
by the physical meaning of its values to other rates.  The original is kept
beside it as ``NAME.v1.json`` (written first, never over an existing file);
then the new text replaces FILE atomically (engine.preset.save), so a crash
leaves either the old file or the new one.  The migrated document is checked
(schema and network) before anything is written.
"""

from __future__ import annotations

import argparse
import copy
import os
from pathlib import Path

from sheafsynth.engine.errors import InputError
from sheafsynth.engine.ir.validate import check_preset
from sheafsynth.engine.preset import atomic_write_text, dump_preset, parse_preset
from sheafsynth.engine.preset.load import migrate, read_json
from sheafsynth.engine.preset.spec import VERSION
from sheafsynth.host.commands.shared import Command

__all__ = ["COMMAND", "migrate_file", "backup_path"]


def backup_path(path: Path, version: int) -> Path:
    """Where the original of ``path`` is kept: ``NAME.v<version>.json`` beside it."""
    stem = path.name[:-5] if path.name.endswith(".json") else path.name
    return path.with_name(f"{stem}.v{version}.json")


def migrate_file(path: Path) -> tuple[int, Path | None]:
    """Migrate ``path`` in place; returns (version found, backup written or None when already current)."""
    doc = read_json(path)                       # PresetError names the file (and line for bad JSON)
    new = migrate(copy.deepcopy(doc))           # PresetError for an unknown format, version or a newer one
    version = int(doc["version"])               # migrate checked it is an integer
    if version == VERSION:
        return VERSION, None
    check_preset(parse_preset(copy.deepcopy(new), str(path)))
    keep = backup_path(path, version)
    if keep.exists():
        raise InputError(f"{keep} already exists: move it away first, nothing was changed")
    original = path.read_text(encoding="utf-8")
    atomic_write_text(keep, original)
    try:
        atomic_write_text(path, dump_preset(new))
    except OSError:
        os.unlink(keep)                          # FILE is untouched: leave no stray copy
        raise
    return version, keep


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("file", metavar="FILE", help="a preset JSON file to bring to the current format version")


def _run(args: argparse.Namespace) -> int:
    path = Path(args.file)
    if not path.is_file():
        raise InputError(f"{path}: no such preset file")
    try:
        found, keep = migrate_file(path)
    except PermissionError as e:
        raise InputError(f"{path}: cannot write ({e.strerror}); nothing was changed") from None
    if keep is None:
        print(f"{path} is already format version {found}: nothing to do")
    else:
        print(f"migrated {path} from version {found} to {VERSION} (design rate 48000 Hz); original kept as {keep}")
    return 0


COMMAND = Command("migrate", "rewrite an older preset file in the current format version (keeps the original)",
                  _add, _run)

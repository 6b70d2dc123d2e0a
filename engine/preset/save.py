"""Write presets: JSON text, validation before writing, atomic replacement.

Saves are atomic (DESIGN §3): a temporary file in the same folder, fsync,
rename, fsync of the folder, so a reader sees the old file or the new one.
Temp files that killed writes left behind are swept on the next save of the
same file.
"""

from __future__ import annotations

import copy
import json
import os
import re
import tempfile
import time
from pathlib import Path
from typing import Callable, Mapping

from sheafsynth.engine.preset.load import parse_preset
from sheafsynth.engine.preset.checks import check_values
from sheafsynth.engine.preset.spec import Preset

__all__ = ["STALE_TEMP_S", "dump_preset", "save_preset", "sweep_stale_temps", "atomic_write_text",
           "atomic_write_bytes"]

STALE_TEMP_S = 600.0
"""A temp file of an atomic write untouched this long (s) belongs to a write that was killed."""


def dump_preset(doc: Mapping) -> str:
    """The JSON text a preset is saved as (2-space indent, UTF-8, final newline)."""
    return json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def save_preset(doc: Mapping | Preset, path: str | os.PathLike,
                check: Callable[[Preset], object] | None = None) -> Path:
    """Validate, then write atomically (temp file, fsync, rename, fsync dir).

    The document is parsed first (never write an invalid preset); ``check``,
    when given, runs on the parsed preset before anything is written -- pass
    ``sheafsynth.engine.ir.validate.check_preset`` for the network checks.
    """
    raw = doc.raw if isinstance(doc, Preset) else dict(doc)
    check_values(raw)
    parsed = parse_preset(copy.deepcopy(raw), str(path))
    if check is not None:
        check(parsed)
    return atomic_write_text(path, dump_preset(raw))


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
    """Write ``text`` (UTF-8) so readers see the old file or the new one, never a part (atomic_write_bytes)."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` so readers see the old file or the new one, never a part.

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
        with os.fdopen(fd, "wb") as f:
            f.write(data)
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

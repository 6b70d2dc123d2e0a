"""Preset bank: factory presets shipped in presets/ plus the user's folder.

The user folder is ``platformdirs.user_data_dir("sheafsynth")/presets``
(override with SHEAFSYNTH_USER_DIR).  Factory presets are never
overwritten; a corrupt user preset is reported by name and skipped, never
deleted.  Program numbers follow the listing order: factory presets first
(sorted by file name), then user presets.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

import platformdirs

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.ir.validate import check_preset, load_checked
from sheafsynth.engine.preset import Preset, save_preset

__all__ = ["BankEntry", "user_dir", "entries", "resolve", "load", "save_user_preset", "valid_preset_name",
           "is_factory_name"]

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9 _\-]{0,63}$")


def valid_preset_name(name: str) -> bool:
    """True when ``name`` can name a user preset: 1-64 letters, digits, spaces, '-' or '_' (not first)."""
    return _NAME_RE.match(name) is not None


def is_factory_name(name: str) -> bool:
    """True when a factory preset is called ``name`` (user presets may not take it)."""
    return (FACTORY_DIR / f"{name}.json").exists()


def user_dir() -> Path:
    """The user presets folder (SHEAFSYNTH_USER_DIR, else the platform's user data folder)."""
    override = os.environ.get("SHEAFSYNTH_USER_DIR")
    if override:
        return Path(override).expanduser()
    return Path(platformdirs.user_data_dir("sheafsynth")) / "presets"


@dataclass(frozen=True)
class BankEntry:
    """One preset of the bank listing; ``error`` is set when its file does not load."""

    name: str
    path: Path
    origin: str          # "factory" or "user"
    about: str
    error: str | None = None   # set when the file does not load


def entries(include_broken: bool = True) -> list[BankEntry]:
    """Factory then user presets; broken user files come back with ``error`` set."""
    out: list[BankEntry] = []
    for origin, folder in (("factory", FACTORY_DIR), ("user", user_dir())):
        if not folder.is_dir():
            continue
        for path in sorted(folder.glob("*.json")):
            try:
                p = load_checked(path)
                out.append(BankEntry(path.stem, path, origin, p.about.split("\n")[0]))
            except PresetError as e:
                if include_broken:
                    out.append(BankEntry(path.stem, path, origin, "", str(e)))
    return out


def resolve(name_or_path: str) -> Path:
    """A preset path from a file path or a factory/user preset name."""
    p = Path(name_or_path)
    if p.suffix == ".json" or os.sep in name_or_path or p.exists():
        if not p.exists():
            raise PresetError("no such preset file", str(p))
        return p
    for folder in (user_dir(), FACTORY_DIR):
        cand = folder / f"{name_or_path}.json"
        if cand.exists():
            return cand
    names = ", ".join(e.name for e in entries(include_broken=False)) or "none"
    raise PresetError(f'no preset named "{name_or_path}" (known: {names})', "PRESET")


def load(name_or_path: str) -> Preset:
    """The preset a file path or a factory/user preset name names."""
    return load_checked(resolve(name_or_path))


def save_user_preset(doc: dict, name: str) -> Path:
    """Save ``doc`` as user preset ``name`` atomically; factory names are refused."""
    if not valid_preset_name(name):
        raise PresetError(f"preset name {name!r} must be 1-64 letters, digits, spaces, '-' or '_'", "name")
    if is_factory_name(name):
        raise PresetError(f'"{name}" is a factory preset; save under another name', "name")
    doc = dict(doc)
    doc["name"] = name
    return save_preset(doc, user_dir() / f"{name}.json", check=check_preset)

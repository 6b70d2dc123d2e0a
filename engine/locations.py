"""Where sheafsynth's files live: shipped package data and per-user folders.

The repository root and the installed ``sheafsynth`` package have the same
shape (``engine/``, ``host/``, ``csrc/``, ``presets/`` side by side), so the
shipped folders are found next to this package in both an editable install
and a wheel.  Nothing here touches the disk at import time.
"""

from __future__ import annotations

import os
from pathlib import Path

import platformdirs

__all__ = ["ENGINE_DIR", "PACKAGE_DIR", "CSRC_DIR", "FACTORY_DIR", "cache_dir"]

#: The ``sheafsynth.engine`` package folder.
ENGINE_DIR = Path(__file__).resolve().parent
#: The folder that holds engine/, host/, csrc/ and presets/.
PACKAGE_DIR = ENGINE_DIR.parent
#: Hand-written C shipped with the package (headers included by every kernel, the live runtime).
CSRC_DIR = PACKAGE_DIR / "csrc"
#: Factory presets (read only).
FACTORY_DIR = PACKAGE_DIR / "presets"

_ENV_CACHE = "SHEAFSYNTH_CACHE_DIR"


def cache_dir() -> Path:
    """Directory of compiled kernels and cached reports: $SHEAFSYNTH_CACHE_DIR or the user cache."""
    override = os.environ.get(_ENV_CACHE)
    if override:
        return Path(override).expanduser().resolve()
    return Path(platformdirs.user_cache_dir("sheafsynth")) / "kernels"


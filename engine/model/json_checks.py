"""Checks of JSON values inside field cells: integers, numbers, indices and keys.

Every failure is a PresetError naming the JSON path at fault.  Used by the
complex generators, the twist parser and the position parser.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from sheafsynth.engine.errors import PresetError

__all__ = ["is_int", "is_num", "int_at_least", "index_arg", "no_extra_keys"]


def is_int(x: Any) -> bool:
    """True for a Python or NumPy integer (not a bool)."""
    return isinstance(x, (int, np.integer)) and not isinstance(x, bool)


def is_num(x: Any) -> bool:
    """True for a finite Python or NumPy number (not a bool)."""
    return (isinstance(x, (int, float, np.integer, np.floating))
            and not isinstance(x, bool) and math.isfinite(float(x)))


def int_at_least(x: Any, low: int, path: str, what: str) -> int:
    """``x`` as an int, refused unless it is an integer >= ``low``."""
    if not is_int(x):
        raise PresetError(f"{what} must be an integer, got {x!r}", path)
    if x < low:
        raise PresetError(f"{what} must be at least {low}, got {x}", path)
    return int(x)


def index_arg(x: Any, n: int, path: str, what: str) -> int:
    """``x`` as an index into ``n`` items (0..n-1), refused otherwise."""
    if not is_int(x):
        raise PresetError(f"{what} must be an integer, got {x!r}", path)
    if not 0 <= x < n:
        raise PresetError(f"{what} {x} out of range 0..{n - 1}", path)
    return int(x)


def no_extra_keys(spec: dict, allowed: Sequence[str], path: str) -> None:
    """Refuse the first key of ``spec`` not in ``allowed``."""
    for key in spec:
        if key not in allowed:
            raise PresetError(
                f"unknown key {key!r} (expected one of {', '.join(allowed)})",
                f"{path}.{key}")

"""The first gates a preset document passes: size limits and the JSON Schema.

:func:`check_values` refuses what no preset needs (deep nesting, huge
documents, numbers a 32-bit float cannot hold) before anything recursive
walks the document; :func:`schema_error` checks the shipped JSON Schema
(``engine/preset/schema/preset-v2.json``; version 1 files are migrated first and
kept as ``preset-v1.json`` for reference).  Every error names the JSON path
at fault, formatted by :func:`json_path`.
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path
from typing import Any, Iterable

from sheafsynth.engine.errors import PresetError

__all__ = ["SCHEMA_PATH", "MAX_DEPTH", "MAX_VALUES", "FLOAT32_MAX",
           "json_path", "check_values", "schema_error"]

SCHEMA_PATH = Path(__file__).resolve().parent / "schema" / "preset-v2.json"   # documents are migrated first
MAX_DEPTH = 32          # nesting levels; the deepest v1 key sits at about 8
MAX_VALUES = 200_000    # JSON values (keys' values, list items) in one document
FLOAT32_MAX = 3.4028234663852886e38


def json_path(parts: Iterable[str | int]) -> str:
    """``["cells", 2, "C", 0, 0]`` -> ``cells[2].C[0][0]``."""
    out = ""
    for p in parts:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            out += ("." if out else "") + str(p)
    return out or "(top level)"


def check_values(doc: Any) -> None:
    """Refuse what no preset needs before anything recursive walks the document.

    Iterative, so it cannot overflow the stack: nesting deeper than
    MAX_DEPTH, more than MAX_VALUES values, and numbers that are not finite
    or do not fit the kernel's 32-bit float (``1e400`` parses as infinity,
    a 400-digit integer cannot become a float at all).
    """
    stack: list[tuple[Any, tuple[str | int, ...]]] = [(doc, ())]
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


@lru_cache(maxsize=1)
def _validator():
    # jsonschema is imported on first use only: it costs start-up time and
    # most commands load a preset at most once.
    import jsonschema

    with open(SCHEMA_PATH, encoding="utf-8") as f:
        schema = json.load(f)
    return jsonschema.Draft202012Validator(schema)


def schema_error(doc: dict) -> PresetError | None:
    """The most specific JSON Schema violation in ``doc`` as a PresetError, or None."""
    import jsonschema  # see _validator: imported on first use for start-up time

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

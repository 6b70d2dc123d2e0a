"""``sheafsynth presets``: the bank listing (factory presets, then the user folder; program numbers follow it)."""

from __future__ import annotations

import argparse
import json

from sheafsynth.host import bank
from sheafsynth.host.commands.shared import Command

__all__ = ["COMMAND"]


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="machine-readable listing")


def _run(args: argparse.Namespace) -> int:
    items = bank.entries()
    if args.json:
        print(json.dumps([{"program": i, "name": e.name, "origin": e.origin, "about": e.about,
                           "path": str(e.path), "error": e.error} for i, e in enumerate(items)], indent=2))
        return 0
    width = max((len(e.name) for e in items), default=4)
    for i, e in enumerate(items):
        text = f"unusable: {e.error}" if e.error else e.about
        print(f"{i:>3}  {e.name:<{width}}  {e.origin:<7}  {text}")
    print(f"user presets folder: {bank.user_dir()}")
    return 0


COMMAND = Command("presets", "list factory and user presets", _add, _run)

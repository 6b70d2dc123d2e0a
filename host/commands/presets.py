"""``sheafsynth presets``: the bank listing (factory presets, then the user folder; program numbers follow it).

Program numbers are shown from 1, as controllers are: the preset shown as
program 1 is the one a MIDI program change with data byte 0 selects (in
``play``), program 2 answers byte 1, and so on.  ``--json`` gives both:
``number`` (as shown, from 1) and ``program`` (the MIDI data byte, from 0).
"""

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
        print(json.dumps([{"program": i, "number": i + 1, "name": e.name, "origin": e.origin, "about": e.about,
                           "path": str(e.path), "error": e.error} for i, e in enumerate(items)], indent=2))
        return 0
    width = max((len(e.name) for e in items), default=4)
    for i, e in enumerate(items):
        text = f"unusable: {e.error}" if e.error else e.about
        print(f"{i + 1:>3}  {e.name:<{width}}  {e.origin:<7}  {text}")
    print(f"user presets folder: {bank.user_dir()}")
    print("program numbers count from 1 (MIDI program change data byte 0 plays program 1)")
    return 0


COMMAND = Command("presets", "list factory and user presets", _add, _run)

"""``sheafsynth bake``: a sample set (notes x velocities x round robins) rendered on a dask cluster.

One WAV per take, ``DIR/map.json`` (schema: host/batch/schema/bake-map.json)
and a contact sheet ``DIR/contact-sheet.png`` (when matplotlib is
installed).  Lengths in s, rates in Hz, loudness in LUFS (ITU-R BS.1770).
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np
import soundfile as sf

from sheafsynth.engine.errors import InputError
from sheafsynth.host.batch.bakeset import MAP_NAME, bake_set, check_folder, parse_notes, parse_velocities, plan_takes
from sheafsynth.host.batch.cluster import open_cluster, probe_scheduler
from sheafsynth.host.batch.pictures import contact_sheet
from sheafsynth.host.batch.takes import TakeSettings
from sheafsynth.host.commands.shared import Command, load_preset_arg, warn_if_unstable

__all__ = ["COMMAND", "SHEET_NAME"]

SHEET_NAME = "contact-sheet.png"


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    p.add_argument("--out", metavar="DIR", required=True, help="folder for the WAV files and map.json")
    p.add_argument("--notes", default=None, metavar="LO-HI/STEP|N,N",
                   help="notes: a range with a step such as 36-96/3, or a list such as 48,55,60 "
                        "(default: the playable range in steps of 3)")
    p.add_argument("--velocities", default="100", metavar="V,V", help="velocities 1-127 (default 100)")
    p.add_argument("--rounds", type=int, default=1, help="round robins per note and velocity (default 1)")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 96000), help="sample rate (Hz)")
    p.add_argument("--seconds-max", type=float, default=8.0, metavar="S",
                   help="longest take (s); a take ends sooner once its output stays below -90 dBFS for 0.1 s")
    p.add_argument("--hold", type=float, default=None, metavar="S",
                   help="how long each note is held before release (s, default 3/4 of --seconds-max)")
    p.add_argument("--loudness", type=float, default=None, metavar="LUFS",
                   help="normalize each take to this integrated loudness (ITU-R BS.1770); the peak is held "
                        "at -1 dBFS at most")
    p.add_argument("--seed", type=int, default=0, help="base noise seed (each take's seed derives from it)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="set a parameter (repeatable)")
    p.add_argument("--float", action="store_true", help="write 32-bit float WAV instead of 24-bit PCM")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="worker processes of a local dask cluster (default: one per CPU)")
    where.add_argument("--scheduler", metavar="ADDRESS", help="use a running dask scheduler, e.g. tcp://host:8786")
    p.add_argument("--allow-unstable", action="store_true", help="bake even if the preset is not stable")


def _settings(args: argparse.Namespace) -> TakeSettings:
    if not (math.isfinite(args.seconds_max) and 0 < args.seconds_max <= 600):
        raise InputError(f"--seconds-max {args.seconds_max:g}: expected 0 < seconds <= 600")
    hold = 0.75 * args.seconds_max if args.hold is None else args.hold
    if not (math.isfinite(hold) and 0 <= hold <= args.seconds_max):
        raise InputError(f"--hold {hold:g}: expected 0 <= hold <= --seconds-max")
    if args.loudness is not None and not (math.isfinite(args.loudness) and -70 <= args.loudness <= 0):
        raise InputError(f"--loudness {args.loudness:g}: expected a level from -70 to 0 LUFS")
    return TakeSettings(rate=int(args.rate), seconds_max=float(args.seconds_max), hold_s=float(hold),
                        loudness=args.loudness, seed=int(args.seed))


def _run(args: argparse.Namespace) -> int:
    preset = load_preset_arg(args.preset, args.set)
    lo, hi = preset.notes
    notes = parse_notes(args.notes if args.notes is not None else f"{lo}-{hi}/3", preset.notes)
    takes = plan_takes(notes, parse_velocities(args.velocities), args.rounds)
    settings = _settings(args)
    if args.workers is not None and not 1 <= args.workers <= 512:
        raise InputError(f"--workers {args.workers}: expected 1 to 512 worker processes")
    out = Path(args.out)
    check_folder(out)
    if args.scheduler is not None:      # a scheduler nobody answers at is named before any other work
        probe_scheduler(args.scheduler)
    warn_if_unstable(args, preset)
    result = bake_set(lambda: open_cluster(args.workers, args.scheduler), preset, takes, settings, out,
                      subtype="FLOAT" if args.float else "PCM_24")
    doc = result["map"]
    held = sum(1 for t in doc["takes"] if t.get("ceiling_held"))
    cut = sum(1 for t in doc["takes"] if t["ended"] == "max")
    print(f"wrote {len(doc['takes'])} take(s) to {out} ({result['rendered']} rendered, {result['skipped']} "
          f"unchanged) and {out / MAP_NAME}")
    if cut:
        print(f"note: {cut} take(s) were still sounding at --seconds-max {settings.seconds_max:g} s")
    if held:
        print(f"note: {held} take(s) stayed below --loudness {settings.loudness:g} LUFS: the peak was held at "
              "-1 dBFS")
    thumbs = []
    for t in doc["takes"][:64]:
        audio, _ = sf.read(str(out / t["file"]), dtype="float32", always_2d=False)
        thumbs.append((f"{t['note']} v{t['velocity']} r{t['round']}", np.asarray(audio)))
    if contact_sheet(out / SHEET_NAME, thumbs, settings.rate):
        print(f"wrote {out / SHEET_NAME}")
    else:
        print("contact sheet skipped: matplotlib is not installed (pip install 'sheafsynth[plot]')",
              file=sys.stderr)
    return 0


COMMAND = Command("bake", "render a sample set (notes x velocities x round robins) on a dask cluster", _add, _run)

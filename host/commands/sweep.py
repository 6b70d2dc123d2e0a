"""``sheafsynth sweep``: the check over a grid of one or two parameters, on a dask cluster.

Writes ``DIR/sweep.csv`` (and ``DIR/sweep.parquet`` when pyarrow is
installed) with one row per grid point, and for two parameters a heat map
``DIR/heat-map.png`` of the slowest mode's growth (dB/s, negative: decays) with unstable points
crossed (when matplotlib is installed).  Values outside a parameter's
declared range need ``--beyond-range`` (see host/batch/sweep.py).
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

from sheafsynth.engine.analysis.deadline import CHECK_TIME_LIMIT_S
from sheafsynth.engine.errors import InputError
from sheafsynth.host.batch.cluster import open_cluster, probe_scheduler
from sheafsynth.host.batch.pictures import heat_map
from sheafsynth.host.batch.sweep import outside_range, parse_axis, sweep, write_csv, write_parquet
from sheafsynth.host.commands.shared import Command, load_preset_arg

__all__ = ["COMMAND", "CSV_NAME", "PARQUET_NAME", "HEAT_MAP_NAME"]

CSV_NAME, PARQUET_NAME, HEAT_MAP_NAME = "sweep.csv", "sweep.parquet", "heat-map.png"


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    p.add_argument("--param", action="append", required=True, metavar="NAME=LO..HI:N",
                   help="a swept parameter: N values from LO to HI (once or twice)")
    p.add_argument("--out", metavar="DIR", required=True, help="folder for sweep.csv and heat-map.png")
    p.add_argument("--notes", metavar="N,N,N", help="MIDI notes to check (default: lowest, middle, highest playable)")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 96000), help="sample rate (Hz)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="hold another parameter at VALUE")
    p.add_argument("--stability-only", action="store_true",
                   help="only the check's frozen stability scan (no certificate, no partials): much faster")
    p.add_argument("--beyond-range", action="store_true",
                   help="allow values outside a parameter's declared range (the check is then run on a design "
                        "the preset does not allow; rows say outside_range)")
    p.add_argument("--time-limit", type=float, default=CHECK_TIME_LIMIT_S, metavar="S",
                   help=f"give up on a point after S seconds ('not decided'; default {CHECK_TIME_LIMIT_S:g})")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="worker processes of a local dask cluster (default: one per CPU)")
    where.add_argument("--scheduler", metavar="ADDRESS", help="use a running dask scheduler, e.g. tcp://host:8786")


def _notes(text: str | None) -> list[int] | None:
    if not text:
        return None
    try:
        notes = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--notes {text!r}: expected MIDI note numbers separated by commas") from None
    for n in notes:
        if not 0 <= n <= 127:
            raise InputError(f"--notes {text!r}: note {n} is outside 0-127")
    return notes or None


def _run(args: argparse.Namespace) -> int:
    preset = load_preset_arg(args.preset, args.set)
    axes = [parse_axis(t, preset) for t in args.param]
    if len(axes) > 2 or len({a.name for a in axes}) != len(axes):
        raise InputError("--param: give one or two different parameters")
    if not (math.isfinite(args.time_limit) and args.time_limit > 0):
        raise InputError(f"--time-limit {args.time_limit:g}: expected a positive number of seconds")
    beyond = outside_range(axes, preset)
    if beyond and not args.beyond_range:
        raise InputError(f"--param: {beyond[0]}; pass --beyond-range to check designs outside it")
    for line in beyond:
        print(f"note: {line}: those points are checked as designs the preset does not allow", file=sys.stderr)
    notes = _notes(args.notes)
    if args.workers is not None and not 1 <= args.workers <= 512:
        raise InputError(f"--workers {args.workers}: expected 1 to 512 worker processes")
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(f"--out {out}: cannot write there ({e.strerror or e})") from None
    if args.scheduler is not None:
        probe_scheduler(args.scheduler)
    with open_cluster(args.workers, args.scheduler) as client:
        rows = sweep(client, preset, axes, notes, float(args.rate), stability_only=args.stability_only,
                     time_limit_s=args.time_limit)
    try:
        write_csv(rows, out / CSV_NAME)
        wrote = [out / CSV_NAME]
        if write_parquet(rows, out / PARQUET_NAME):
            wrote.append(out / PARQUET_NAME)
    except OSError as e:
        raise InputError(f"--out {out}: cannot write there ({e.strerror or e})") from None
    unstable = sum(1 for r in rows if r["stable"] is False)
    undecided = sum(1 for r in rows if r["stable"] is None)
    print(f"checked {len(rows)} point(s): {len(rows) - unstable - undecided} stable, {unstable} unstable"
          + (f", {undecided} not decided (--time-limit)" if undecided else ""))
    if len(axes) == 2:
        ax, ay = axes
        shape = (ax.count, ay.count)
        decay = np.array([np.nan if r["decay_db_per_s"] is None else r["decay_db_per_s"] for r in rows]).reshape(shape)
        bad = np.array([r["stable"] is False for r in rows]).reshape(shape)
        if heat_map(out / HEAT_MAP_NAME, ax.name, ax.values, ay.name, ay.values, decay.T, bad.T,
                    "slowest mode: growth, dB/s (> 0 grows)"):
            wrote.append(out / HEAT_MAP_NAME)
        else:
            print("heat map skipped: matplotlib is not installed (pip install 'sheafsynth[plot]')", file=sys.stderr)
    print("wrote " + ", ".join(str(p) for p in wrote))
    return 0


COMMAND = Command("sweep", "check stability, fundamental and T60 over a grid of parameter values", _add, _run)

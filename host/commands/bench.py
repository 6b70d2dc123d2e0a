"""``sheafsynth bench``: the kernel speed measurements (host.bench) as a command.

``--out`` writes the JSON report atomically (temp file, fsync, rename).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from sheafsynth.engine.errors import InputError
from sheafsynth.engine.preset import atomic_write_text
from sheafsynth.host.bench.report import format_table
from sheafsynth.host.bench.run import run_bench
from sheafsynth.host.commands.shared import Command

__all__ = ["COMMAND"]


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--quick", action="store_true", help="fewer repetitions and shorter runs (under a minute)")
    p.add_argument("--out", metavar="FILE.json", help="also write the JSON report to FILE.json")


def _run(args: argparse.Namespace) -> int:
    if args.out is not None:
        target = Path(args.out)
        if not str(args.out).strip() or target.is_dir():
            raise InputError(f"--out {args.out!r}: expected a file name")
        if not target.parent.resolve().is_dir():
            raise InputError(f"--out {args.out}: folder {str(target.parent)!r} does not exist")
    tty = sys.stderr.isatty()
    rep = run_bench(args.quick, (lambda s: print(s, file=sys.stderr, flush=True)) if tty or not args.json else None)
    text = json.dumps(rep, indent=2)
    if args.out:
        try:
            atomic_write_text(Path(args.out), text + "\n")
        except OSError as e:
            raise InputError(f"--out {args.out}: {e.strerror}") from None
    print(text if args.json else format_table(rep))
    return 0


COMMAND = Command("bench", "measure kernel speed against hand-written C, SciPy and the real-time budget", _add, _run)

"""What several commands share: the command record, ``--set`` parsing, preset
loading, the instrument every offline command builds, and the stability guard.

A command module exposes one :class:`Command` named ``COMMAND``; host/cli.py
lists them in a table.  Rates are in Hz, ramp times in s.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass
from typing import Callable

from sheafsynth.engine.analysis.report import ramp_limits
from sheafsynth.engine.errors import InputError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.preset import Preset
from sheafsynth.host import bank
from sheafsynth.host.guard import run_guard

__all__ = ["CAUTION", "Command", "parse_set", "load_preset_arg", "offline_instrument", "warn_if_unstable",
           "warn_limiter_off"]

CAUTION = ("Caution: physical models can ring, self-oscillate or build up at frequencies the ear "
           "barely hears. Keep the limiter on, start at low volume, protect hearing and speakers.")


@dataclass(frozen=True)
class Command:
    """One subcommand: its name, one-line help, argument adder and runner (returns the exit status)."""

    name: str
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


def parse_set(items: list[str] | None) -> dict[str, float]:
    """``--set NAME=VALUE`` items as {name: value}; InputError naming the bad item."""
    out: dict[str, float] = {}
    for item in items or []:
        name, eq, value = item.partition("=")
        if not eq or not name:
            raise InputError(f"--set {item!r}: expected NAME=VALUE")
        try:
            out[name] = float(value)
        except ValueError:
            raise InputError(f"--set {item!r}: {value!r} is not a number") from None
    return out


def load_preset_arg(preset_arg: str, sets: list[str] | None = None) -> Preset:
    """The preset a PRESET argument names (file, factory or user name), with ``--set`` values applied."""
    preset = bank.load(preset_arg)
    values = parse_set(sets)
    if values:
        preset = preset.with_values(values)
    return preset


def warn_limiter_off() -> None:
    """One warning line on stderr: the output limiter is off."""
    print("warning: the output limiter is OFF. " + CAUTION, file=sys.stderr)


def offline_instrument(args: argparse.Namespace, preset: Preset, knobs_move: bool = True) -> Instrument:
    """An Instrument at ``args.rate`` Hz with the ramp times (s) the stability certificate asks for.

    ``knobs_move=False`` (a take with no controller messages, like the demo
    phrase) needs no ramp limits: no parameter moves while a note sounds.
    """
    no_limiter = bool(getattr(args, "no_limiter", False))
    if no_limiter:
        warn_limiter_off()
    ramps = ramp_limits(preset, args.rate) if knobs_move else {}
    return Instrument(preset, rate=args.rate, max_block=512, seed=args.seed,
                      limiter=not no_limiter, min_ramp_s=ramps)


def warn_if_unstable(args: argparse.Namespace, preset: Preset) -> None:
    """Refuse presets that are not frozen-stable at ``args.rate`` Hz unless --allow-unstable; print warnings.

    ``preset`` is checked as it will sound (``--set`` values applied), in
    bounded time with a progress line after 1 s (host.guard.run_guard).
    """
    for line in run_guard(preset, float(args.rate), bool(getattr(args, "allow_unstable", False))):
        print(f"warning: {line}", file=sys.stderr)

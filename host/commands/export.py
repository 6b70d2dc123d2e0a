"""``sheafsynth export``: a preset as an LV2 instrument plugin bundle.

``export PRESET --lv2 DIR`` writes ``DIR/<name>.lv2/`` (manifest.ttl, the
plugin's .ttl, the .so) through engine.backends.lv2.bundle, with one kernel
per sample rate (Hz, ``--rates``; default every rate the bundle supports).
Each rate's kernel is checked by the stability guard first (at most
``--time-limit`` s a rate; refused unless ``--allow-unstable``) and lowered with the ramp limits (s) its certificate
asks for, so knob moves in a plugin host stay inside the proof.  The limiter
is always on in the plugin.
"""

from __future__ import annotations

import argparse
import math
import sys

from sheafsynth.engine.analysis.deadline import GUARD_TIME_LIMIT_S
from sheafsynth.engine.analysis.report import ramp_limits
from sheafsynth.engine.backends.lv2.bundle import (DEFAULT_RATES, LV2_MAX_BLOCK, LV2_RATES, RESERVED_CCS, MidiBinding,
                                                  build_bundle)
from sheafsynth.engine.errors import InputError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.ir.program import StepProgram
from sheafsynth.engine.preset import Preset
from sheafsynth.host.commands.shared import CAUTION, Command, load_preset_arg
from sheafsynth.host.controls import DEFAULT_BEND_RANGE
from sheafsynth.host.guard import run_guard

__all__ = ["COMMAND", "parse_rates", "midi_bindings"]


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    p.add_argument("--lv2", metavar="DIR", required=True,
                   help="write an LV2 plugin bundle DIR/<name>.lv2 (put it in ~/.lv2 for plugin hosts)")
    p.add_argument("--rates", metavar="HZ,HZ", default=None,
                   help="sample rates to build kernels for (default " + ",".join(str(r) for r in DEFAULT_RATES)
                        + "; also 192000); the plugin refuses other rates")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="set a parameter's default value (repeatable)")
    p.add_argument("--allow-unstable", action="store_true",
                   help="export even if the preset fails the stability check (the limiter stays on)")
    p.add_argument("--time-limit", type=float, default=GUARD_TIME_LIMIT_S, metavar="S",
                   help=f"seconds the stability check may take at each rate (default {GUARD_TIME_LIMIT_S:g})")


def parse_rates(text: str | None) -> tuple[int, ...]:
    """``--rates`` as sorted unique rates in Hz, each one of LV2_RATES; InputError naming a bad one."""
    if text is None:
        return DEFAULT_RATES
    out = set()
    for item in text.split(","):
        item = item.strip()
        try:
            r = int(item)
        except ValueError:
            raise InputError(f"--rates {text!r}: {item!r} is not a whole number of Hz") from None
        if r not in LV2_RATES:
            raise InputError(f"--rates {text!r}: {r} Hz is not one of " + ", ".join(str(x) for x in LV2_RATES))
        out.add(r)
    return tuple(sorted(out))


def midi_bindings(preset: Preset, index: dict[str, int]) -> tuple[MidiBinding, ...]:
    """The preset's CC, velocity and pressure bindings for the plugin (ranges as host.controls resolves them).

    A CC the plugin keeps for itself (sustain, notes off, RPN) is left out,
    as the live host's translator never reaches it either.
    """
    out = []
    for c in preset.controls:
        if c.source not in ("cc", "velocity", "pressure") or c.parameter is None:
            continue
        if c.source == "cc" and (c.cc is None or c.cc in RESERVED_CCS):
            continue
        spec = preset.parameters[c.parameter]
        lo = spec.lo if c.lo is None else c.lo
        hi = spec.hi if c.hi is None else c.hi
        out.append(MidiBinding(c.source, -1 if c.cc is None else int(c.cc), index[c.parameter], float(lo),
                               float(hi), c.curve))
    return tuple(out)


def _run(args: argparse.Namespace) -> int:
    preset = load_preset_arg(args.preset, args.set)
    rates = parse_rates(args.rates)
    limit = float(args.time_limit)
    if not (math.isfinite(limit) and limit > 0):
        raise InputError(f"--time-limit {args.time_limit:g}: expected a positive number of seconds")
    programs: dict[int, StepProgram] = {}
    for rate in rates:
        for line in run_guard(preset, float(rate), bool(args.allow_unstable), time_limit_s=limit):
            print(f"warning: {rate} Hz: {line}", file=sys.stderr)
        programs[rate] = lower(preset, float(rate), LV2_MAX_BLOCK, None,
                               ramp_limits(preset, float(rate), time_limit_s=limit))
    bend = next((c.range_semitones for c in preset.controls if c.source == "pitchbend"), DEFAULT_BEND_RANGE)
    bindings = midi_bindings(preset, programs[rates[0]].param_index)
    bundle = build_bundle(programs, preset.name, args.lv2, bend_range=float(bend), bindings=bindings)
    print(f"wrote {bundle.path} ({bundle.uri}; {len(bundle.ports)} control port(s); rates "
          + ", ".join(str(r) for r in bundle.rates) + " Hz)")
    print(f"copy the folder to ~/.lv2 (or add {bundle.path.parent} to LV2_PATH) for plugin hosts to find it. "
          + CAUTION, file=sys.stderr)
    return 0


COMMAND = Command("export", "write a preset as an LV2 instrument plugin bundle", _add, _run)

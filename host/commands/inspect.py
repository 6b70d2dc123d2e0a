"""Text for ``sheafsynth inspect``: the sheaf of a preset, made visible.

Lists every cell with its stalk dimensions (inputs, state, outputs; the
stalk is the augmented state [inputs ; state]), every restriction map with
its parameter dependence, the wires, the tuning loops, the parameters and
the controller map.  ``--plot FILE.png`` (or ``.svg``) also draws the
network, each field's complex with its strike and pickup, and the field's
lowest mode shapes (host.pictures.draw; needs the ``plot`` extra).
"""

from __future__ import annotations

import argparse

from sheafsynth.engine.errors import InputError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset import Preset
from sheafsynth.host.commands.shared import Command, load_preset_arg
from sheafsynth.host.pictures.draw import draw_instrument

__all__ = ["COMMAND", "describe"]


def _matrix(rows: list[list[str]], indent: str) -> list[str]:
    if not rows:
        return [indent + "(empty)"]
    widths = [max(len(r[j]) if j < len(r) else 0 for r in rows) for j in range(max(len(r) for r in rows))]
    return [indent + "[ " + "  ".join(c.rjust(widths[j]) for j, c in enumerate(r)) + " ]" for r in rows]


def describe(preset: Preset, rate: float = 48000.0) -> str:
    """The preset's cells, stalks, restriction maps, wires, loops, parameters and controls at ``rate`` Hz, as text."""
    sheaf = sheaf_of(preset, rate)
    prog = lower(preset, rate)
    L: list[str] = []
    w = L.append
    w(f"preset  {preset.name}")
    if preset.about:
        w(f"about   {preset.about}")
    w(f"voices  {preset.polyphony}    notes {preset.notes[0]}..{preset.notes[1]}    rate {rate:g} Hz")
    w("")
    w("cells (stalk = inputs + state)")
    for c in sheaf.cells:
        if c.delay is not None:
            length = "pitch-tracking" if c.delay.pitch else f"{c.delay.length} samples"
            w(f"  {c.name:<12} delay       in 1  state ring ({length})  out 1")
        else:
            tag = "  (tuned by pitch)" if c.tune else ""
            w(f"  {c.name:<12} {c.kind:<11} in {c.n_in}  state {c.n_state}  out {c.n_out}  "
              f"stalk {c.stalk_dim}{tag}")
    w("")
    w("restriction maps")
    for m in sheaf.restriction_maps():
        if "cell" in m:
            head = f"  {m['cell']}: {m['map']}"
            if "form" in m:
                w(f"{head}: {m['form']}")
            else:
                w(head)
                L.extend(_matrix(m["rows"], "      "))
        else:
            w(f"  wire {m['wire']}: {m['from']} -> {m['to']}")
            L.extend(_matrix(m["rows"], "      "))
    w("")
    dep = sheaf.parameter_dependence()
    w("parameters")
    for p in preset.parameters.values():
        moves = ", ".join(dep.get(p.name, [])) or "nothing"
        unit = f" {p.unit}" if p.unit else ""
        w(f"  {p.name:<10} {p.value:g}{unit} in [{p.lo:g}, {p.hi:g}]  moves: {moves}")
    if not preset.parameters:
        w("  (none)")
    w("")
    w("tuning loops")
    for lp in prog.loops:
        names = [prog.blocks[s.block].name for s in lp.steps]
        tuner = prog.blocks[lp.tuner].name if lp.tuner is not None else "none (length rounded)"
        w(f"  {prog.blocks[lp.delay].name} -> {' -> '.join(names) or '(itself)'} -> "
          f"{prog.blocks[lp.delay].name}   fraction: {tuner}")
    if not prog.loops:
        w("  (none: no pitch-tracking delay)")
    w("")
    w("controls")
    for ctl in preset.controls:
        if ctl.source == "pitchbend":
            w(f"  pitch bend  +-{ctl.range_semitones:g} semitones")
        elif ctl.source == "cc":
            w(f"  CC {ctl.cc:<3}     -> {ctl.parameter} ({ctl.curve}, {ctl.lo:g}..{ctl.hi:g})")
        else:
            w(f"  {ctl.source:<10}  -> {ctl.parameter} ({ctl.curve}, {ctl.lo:g}..{ctl.hi:g})")
    if not preset.controls:
        w("  (none)")
    return "\n".join(L)


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET")
    p.add_argument("--rate", type=int, default=48000)
    p.add_argument("--plot", metavar="FILE.png", help="also draw the network, each field's complex with strike "
                   "and pickup, and its lowest mode shapes (.png or .svg)")


def _run(args: argparse.Namespace) -> int:
    preset = load_preset_arg(args.preset)
    print(describe(preset, float(args.rate)))
    if args.plot:
        try:
            written = draw_instrument(preset, args.plot, float(args.rate))
        except (PermissionError, FileNotFoundError, IsADirectoryError) as e:
            raise InputError(f"--plot {args.plot}: cannot write ({e.strerror}); nothing was written") from None
        print(f"picture written to {written}")
    return 0


COMMAND = Command("inspect", "show a preset's cells, stalks and restriction maps", _add, _run)

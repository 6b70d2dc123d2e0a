"""``sheafsynth check``: stability, certificate, modes and drift of a preset.

Exit status 0 when the preset is stable at every corner and note, 1 when it
is not, 2 for bad input.  ``--json`` prints the report (shape in
engine/analysis/schema/check-report.json); ``--modes N`` sets how many
partials are listed (the lowest and the strongest at the output, default
8); ``--plot FILE.png`` draws poles, the partial ladder, T60 bars and modal amplitude bars.
"""

from __future__ import annotations

import argparse
import json
import math

import numpy as np

from sheafsynth.engine.analysis.assemble import assemble
from sheafsynth.engine.analysis.deadline import CHECK_TIME_LIMIT_S, GUARD_TIME_LIMIT_S
from sheafsynth.engine.analysis.modes import LISTED_DEFAULT, all_poles, modes
from sheafsynth.engine.analysis.plot import plot_report
from sheafsynth.engine.analysis.report import check
from sheafsynth.engine.errors import InputError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.preset import Preset
from sheafsynth.host.commands.shared import Command, load_preset_arg

__all__ = ["COMMAND", "MODES_MAX", "render_text"]

#: The most partials ``--modes`` lists.
MODES_MAX = 64


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET")
    p.add_argument("--notes", metavar="N,N,N", help="MIDI notes to check (default: lowest, middle, highest playable)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--plot", metavar="FILE.png", help="draw poles, partials, T60 bars and modal amplitude bars to a PNG")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="check with a parameter changed")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 88200, 96000, 192000))
    p.add_argument("--no-cache", action="store_true", help="recompute instead of reusing a stored report")
    p.add_argument("--modes", metavar="N", default=str(LISTED_DEFAULT),
                   help=f"how many partials to list: the lowest and the strongest (1..{MODES_MAX}, "
                        f"default {LISTED_DEFAULT})")
    p.add_argument("--time-limit", type=float, default=CHECK_TIME_LIMIT_S, metavar="S",
                   help=f"give up after S seconds with 'not decided' (default {CHECK_TIME_LIMIT_S:g}; "
                        f"render and play allow {GUARD_TIME_LIMIT_S:g})")


def _notes(text: str | None):
    if not text:
        return None
    try:
        return [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--notes {text!r}: expected MIDI note numbers separated by commas") from None


def _count(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if not 1 <= n <= MODES_MAX:
        raise InputError(f"--modes {text!r}: expected a whole number of partials from 1 to {MODES_MAX}")
    return n


def _fmt_t60(t) -> str:
    return "   inf" if t is None or not math.isfinite(t) else f"{t:6.2f}"


def _fmt_db(v) -> str:
    return "      -" if v is None else f"{v:+7.1f}"


def render_text(r: dict) -> str:
    """The check report as a table for people (radii, certificate, modes with Hz, T60 s, cents)."""
    L: list[str] = []
    w = L.append
    w(f"preset {r['preset']}   notes {', '.join(map(str, r['notes']))}   rate {r['rate']:g} Hz")
    box = ", ".join(f"{k} {v[0]:g}..{v[1]:g}" for k, v in r["box"].items()) or "no mapped parameters"
    w(f"knob box: {box}")
    verdict = {"stable": "STABLE", "drift": "STABLE apart from DC drift (bounded)", "marginal": "NOT STRICTLY STABLE (lossless somewhere)",
               "unstable": "UNSTABLE"}[r["frozen"]]
    kind = "exact" if r["radius_exact"] else "rigorous upper bound"
    w(f"frozen: {verdict}   largest spectral radius {r['spectral_radius_max']:.9f} ({kind})")
    if r.get("worst_corner"):
        wc = r["worst_corner"]
        vals = ", ".join(f"{k}={v:g}" for k, v in wc["values"].items()) or "defaults"
        w(f"        worst at note {wc['note']} with {vals}")
    cert = r["certified"]
    if cert == "any-speed":
        w(f"knob motion: CERTIFIED at any speed  ({r['route']})")
    elif cert == "ramp-limited":
        slopes = ", ".join(f"{k} <= {v:.4g}/s" for k, v in r["slope_per_s"].items())
        w(f"knob motion: CERTIFIED while ramps stay slow ({slopes}); the kernel's ramps are set to respect it")
        w(f"             ({r['route']})")
    else:
        w("knob motion: NOT CERTIFIED")
    if r.get("failing"):
        w(f"        reason: {r['failing']}")
    for n in r.get("certificate_notes", []):
        w(f"        note: {n}")
    for warn in r["warnings"]:
        w(f"warning: {warn}")
    w("")
    w(f"partials heard at note {r.get('mode_note')} (parameter defaults): the lowest (L), then the strongest")
    w("     freq Hz   note        T60 s    ampl dB  energy dB  rank   harmonic  cents    cells")
    for m in r["modes"]:
        cells = ", ".join(f"{k} {100 * v:.0f}%" for k, v in m.get("cells", {}).items())
        mark = ("L" if m.get("lowest") else " ") + ("*" if m.get("fundamental") else " ")
        pair = f" x{m['multiplicity']}" if m.get("multiplicity", 1) > 1 else ""
        w(f"{mark}{m['freq_hz']:10.3f}   {m['note']:<5} {m['cents_from_note']:+6.1f}  {_fmt_t60(m['t60_s'])}   "
          f"{_fmt_db(m.get('amplitude_db'))}   {_fmt_db(m.get('energy_db'))}  {m.get('strength_rank', 0):>4}   "
          f"{m['harmonic']:>5}  {m['cents_from_harmonic']:+7.2f}   {cells}{pair}")
    w("  (L = lowest, * = fundamental: the lowest strong partial; cents from its nearest harmonic; "
      "dB re a unit impulse at excite)")
    if r["drift_modes"]:
        for d in r["drift_modes"]:
            w(f"drift: eigenvalue 1 carried by {d['cells']}{' (grows)' if d.get('grows') else ''}")
    else:
        w("drift: none (no eigenvalue at z = 1)")
    for f in r["fields"]:
        extra = ", ".join(f"{k} {v}" for k, v in f.items() if k != "cell")
        w(f"field {f['cell']}: {extra}")
    return "\n".join(L)


def _run(args: argparse.Namespace) -> int:
    preset = load_preset_arg(args.preset, args.set)
    if not (math.isfinite(args.time_limit) and args.time_limit > 0):
        raise InputError(f"--time-limit {args.time_limit:g}: expected a positive number of seconds")
    report = check(preset, _notes(args.notes), float(args.rate), n_modes=_count(args.modes),
                   use_cache=not args.no_cache, time_limit_s=args.time_limit)
    if args.plot:
        _plot(preset, report, args.plot, float(args.rate))
    if args.json:
        print(json.dumps(report, indent=2, default=float))
    else:
        print(render_text(report))
    return 0 if report["stable"] else 1


def _plot(preset: Preset, report: dict, path: str, rate: float) -> None:
    """Draw poles, partials and T60 bars of ``preset`` at ``rate`` Hz to the PNG ``path``."""
    prog = lower(preset, rate)
    sysm = assemble(prog, None, report["mode_note"])
    poles = all_poles(sysm.A) if sysm.n_states <= 1500 else np.array([m.eigenvalue for m in
                                                                         modes(sysm.A, sysm.C, rate, count=40)])
    ms = modes(sysm.A, sysm.C, rate, B=sysm.B, count=max(12, len(report["modes"])), partition=sysm.partition)
    plot_report(path, [complex(p) for p in poles], ms, title=f"{preset.name} at note {report['mode_note']}",
                spectral_radius=report["spectral_radius_max"])
    print(f"wrote {path}")


COMMAND = Command("check", "check stability over every knob's range; modes, T60, drift", _add, _run)

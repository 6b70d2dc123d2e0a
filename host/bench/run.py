"""``sheafsynth bench``: how fast the compiled kernels are, measured as ratios.

Everything runs in one process on this machine.  Each comparison runs its
two (or more) sides in alternation -- rep 1: A then B, rep 2: B then A, ...
-- so that drift (other programs, clock changes) hits both sides alike, and
reports the median with its spread (quartiles, min, max, count) of the
per-repetition values.  Kernel times are taken in C (csrc/bench/drive.c
calls the render function for a run of blocks and reads the thread's CPU
clock), so Python's call overhead enters only the measurement that is
about it.

Measurements (JSON keys):

``generated_vs_handwritten``
    time of the compiled plain plucked-string preset ÷ time of the
    hand-written loop in csrc/bench/pluck_hand.c, same voices, same notes,
    same frames, same arithmetic.
``speedup_vs_lfilter``
    one voice of that preset written as one IIR of the loop's order and run
    by ``scipy.signal.lfilter`` ÷ the kernel rendering the same note.
``speedup_vs_reference``
    engine.backends.reference.stepper.ReferenceStepper ÷ the kernel, same events and frames.
``voices_at_half_core``
    preset name -> voices rendered at 48 kHz in half of one core's real
    time, for every factory string preset (a pitch-tracking delay loop;
    solved from the time per block measured at a few voice counts).
``torus4096_realtime_factor``, ``field_vs_handwritten``
    one voice of a 64 x 64 torus plate (4096 vertices): audio seconds per
    second of compute, and its time ÷ csrc/bench/stencil_hand.c's loop of
    the same leapfrog update.
``host_overhead_us_per_block``
    Python time per block of ``Instrument.process`` outside the kernel
    (event sorting and conversion, the cffi call), in microseconds.
``compile_cold_s``, ``load_warm_s``
    preset to ready instrument with an empty kernel cache / with the kernel
    already compiled on disk.
``denormal_tail_ratio``
    a block deep in a note's decaying tail ÷ the first blocks of that note.
``bake_two_vs_one_workers``
    wall time of two dask workers baking 24 takes ÷ one worker, side by side (host/bench/bake_scaling.py).
``machine``
    CPU model, cores, compiler and flags, library versions.

Speed goals are reported (``goals``), never asserted.
"""

from __future__ import annotations

import functools
import time
from typing import Callable

from sheafsynth.host.bench.bake_scaling import bake_scaling
from sheafsynth.host.bench.compile_load import compile_load
from sheafsynth.host.bench.context import BenchContext
from sheafsynth.host.bench.denormals import denormals
from sheafsynth.host.bench.fields import fields
from sheafsynth.host.bench.host_overhead import host_overhead
from sheafsynth.host.bench.machine import machine_info
from sheafsynth.host.bench.report import KEYS, goals_met
from sheafsynth.host.bench.stats import round_figures
from sheafsynth.host.bench.strings import capacity, generated_vs_handwritten
from sheafsynth.host.bench.yardsticks import one_voice

__all__ = ["run_bench"]


def run_bench(quick: bool = False, progress: Callable[[str], None] | None = None) -> dict:
    """Run every measurement; returns the report (module doc)."""
    ctx = BenchContext(quick, progress or (lambda s: None))
    t0 = time.perf_counter()
    ctx.report["machine"] = machine_info()
    items = [
        ("compile_cold_s", compile_load),
        ("generated_vs_handwritten", generated_vs_handwritten),
        ("voices_at_half_core", capacity),
        ("speedup_vs_lfilter", one_voice),
        ("host_overhead_us_per_block", host_overhead),
        ("denormal_tail_ratio", denormals),
        ("torus4096_realtime_factor", fields),
        ("bake_two_vs_one_workers", bake_scaling),
    ]
    for key, fn in items:
        ctx.item(key, functools.partial(fn, ctx))
        if key == "voices_at_half_core":
            ctx.drop_kernels()
    for key, partner in (("compile_cold_s", "load_warm_s"), ("speedup_vs_lfilter", "speedup_vs_reference"),
                         ("torus4096_realtime_factor", "field_vs_handwritten")):
        if key in ctx.notes and partner not in ctx.report:
            ctx.notes[partner] = ctx.notes[key]
    out = {key: ctx.report.get(key) for key in KEYS}
    out["goals"] = goals_met(out)
    out["details"] = ctx.details
    out["notes"] = ctx.notes
    out["mode"] = "quick" if ctx.quick else "full"
    out["reps"] = ctx.reps
    out["elapsed_s"] = time.perf_counter() - t0
    return round_figures(out)

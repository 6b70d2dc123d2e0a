"""Denormals: a block deep in a note's decaying tail against the first blocks of that note (a time ratio).
"""

from __future__ import annotations

import statistics

import numpy as np

from sheafsynth.engine.errors import SheafsynthError
from sheafsynth.host.bench.context import BLOCK, PLAIN_PRESET, RATE, BenchContext
from sheafsynth.host.bench.stats import spread

__all__ = ["denormals"]


def denormals(ctx: BenchContext) -> None:
    """``denormal_tail_ratio``: per-block time deep in a decaying chord's tail / its first blocks."""
    k = ctx.plain()
    # the preset's top note and above at the lowest decay: tails that reach the float denormal
    # range (below 1.2e-38) before the kernel frees a quiet voice (0.5 s below 1e-6)
    notes = [104, 105, 106, 107, 108]
    params = {p.name: p.lo for p in k.inst.parameters if "decay" in p.name}
    for name, v in params.items():
        k.inst.set_now(name, v)
    ev = k.events([(0, 1, nt, 127, 0.0) for nt in notes])
    nblk = int(1.5 * RATE / BLOCK)
    times = ctx.ffi.new("int64_t[]", nblk)
    first_n = 4
    ratios: list[float] = []
    tails: list[float] = []             # blocks in the deep tail, per repetition
    levels: list[float] = []
    reps = ctx.reps + 2
    for _ in range(reps):
        k.silence()
        out = np.zeros(BLOCK, np.float32)
        peaks = []
        # per-block times, and the output level of every block
        t_each = []
        for b in range(nblk):
            rc = ctx.lib.ssb_drive_each(k.fn, ctx.ffi.cast("void *", k.state),
                                         k.kffi.cast("void *", ev) if b == 0 else ctx.ffi.NULL,
                                         len(notes) if b == 0 else 0,
                                         ctx.ffi.cast("float *", ctx.ffi.from_buffer(out)), BLOCK, 1, times)
            if rc < 0:
                raise SheafsynthError("render failed")
            t_each.append(times[0] * 1e-9)
            peaks.append(float(np.max(np.abs(out))))
            if k.active == 0:
                break
        # deep tail: blocks still rendering voices whose output is within 1000x of the float
        # denormal threshold (1.2e-38): there the loop's products would be subnormal without
        # FTZ/DAZ -- else the last live blocks
        live = len(t_each) - (1 if k.active == 0 else 0)
        deep = [i for i in range(first_n, live) if peaks[i] < 1.2e-35]
        if not deep:
            deep = list(range(max(first_n, live - 8), live))
        if not deep:
            continue
        head = statistics.median(t_each[:first_n])
        tail = statistics.median(t_each[i] for i in deep)
        ratios.append(tail / head)
        tails.append(len(deep))
        levels.append(min(peaks[i] for i in deep))
    s = spread(ratios)
    ctx.report["denormal_tail_ratio"] = s["median"]
    ctx.details["denormal_tail_ratio"] = {
        "ratio": s, "preset": PLAIN_PRESET, "notes": notes, "parameters_set": params,
        "first_blocks": first_n, "tail_blocks": spread(tails), "tail_level_min": min(levels) if levels else None,
        "method": "per-block times of one chord from note-on until the voices are freed; tail = blocks "
                  "whose output is below 1.2e-35 (within 1000x of the float denormal threshold: without "
                  "FTZ/DAZ the loop's products would be subnormal) while the voices still render",
    }

"""Bake scaling: two dask workers baking 24 takes against one worker, timed side by side in one run.

The preset is the largest field preset (a take costs about a tenth of a
second or more to render), so that the work is rendering rather than
bookkeeping.  Both local clusters are started first and warmed (each worker compiles or
loads the kernel once), then the same 24 takes are baked into fresh
folders by each in alternation (host.bench.stats.interleave), so drift
hits both sides alike.  The time is the wall clock of ``bake_set``:
rendering on the workers, results back to the client, WAV files and
map.json written there.
"""

from __future__ import annotations

import os
import tempfile
import time
from contextlib import ExitStack, nullcontext
from pathlib import Path

from sheafsynth.host.bank import load as load_preset_named
from sheafsynth.host.batch.bakeset import bake_set, plan_takes
from sheafsynth.host.batch.cluster import open_cluster, run_tasks
from sheafsynth.host.batch.takes import Take, TakeSettings, render_take
from sheafsynth.host.bench.context import BenchContext
from sheafsynth.host.bench.stats import interleave, spread

__all__ = ["BAKE_TAKES", "BAKE_PRESET", "bake_scaling"]

#: Takes per timed bake: 12 notes x 2 velocities.
BAKE_TAKES = 24
#: The preset baked: the largest field preset, so that rendering, not bookkeeping, is the work.
BAKE_PRESET = "curb-plate"


def bake_scaling(ctx: BenchContext) -> None:
    """``bake_two_vs_one_workers``: wall time of a 24-take bake on two workers / on one (goal <= 0.6)."""
    preset = load_preset_named(BAKE_PRESET)
    lo, hi = preset.notes
    notes = [lo + (hi - lo) * k // 11 for k in range(12)]
    takes = plan_takes(sorted(set(notes)), [64, 120], 1)[:BAKE_TAKES]
    seconds = 2.0 if ctx.quick else 6.0         # s at most a take; the note is held for all but 0.5 s
    settings = TakeSettings(rate=48000, seconds_max=seconds, hold_s=seconds - 0.5, loudness=None, seed=0)
    reps = 2 if ctx.quick else 4
    with ExitStack() as stack:
        clients = {n: stack.enter_context(open_cluster(n)) for n in (1, 2)}
        for n, client in clients.items():          # every worker builds or loads the kernel once
            run_tasks(client, render_take, [(preset, Take(lo, 64, 0), settings)] * n, label="warming")
        folder = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="sheafsynth-bench-bake-")))
        runs = {n: 0 for n in clients}

        def side(n: int):
            def timed() -> float:
                runs[n] += 1
                t0 = time.perf_counter()
                bake_set(lambda: nullcontext(clients[n]), preset, takes, settings, folder / f"w{n}-{runs[n]}")
                return time.perf_counter() - t0
            return timed

        load_before = os.getloadavg()[0]
        times = interleave({"one": side(1), "two": side(2)}, reps)
        load_after = os.getloadavg()[0]
    ratios = [b / a for a, b in zip(times["one"], times["two"])]
    s = spread(ratios)
    ctx.report["bake_two_vs_one_workers"] = s["median"]
    ctx.details["bake_two_vs_one_workers"] = {
        "ratio": s, "one_worker_s": spread(times["one"]), "two_workers_s": spread(times["two"]),
        "preset": BAKE_PRESET, "cpus": os.cpu_count(),
        # other programs' load caps what two workers can gain: 1-minute load average before and after
        "load_average": [load_before, load_after], "takes": len(takes), "seconds_max": settings.seconds_max,
        "method": "two LocalClusters (1 and 2 single-thread worker processes) started and warmed first; "
                  "the same takes baked into fresh folders by each in alternation; wall time of bake_set",
    }

"""Compile and load times: preset to ready instrument with an empty kernel cache, and with the kernel cached (s, wall clock).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from sheafsynth.engine.errors import SheafsynthError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.host import bank
from sheafsynth.host.bench.context import PLAIN_PRESET, RATE, BenchContext
from sheafsynth.host.bench.stats import spread

__all__ = ["compile_load"]


def compile_load(ctx: BenchContext) -> None:
    """``compile_cold_s`` and ``load_warm_s``: preset to ready instrument, timed in fresh processes (s)."""
    src_path = str(bank.load(PLAIN_PRESET).source)
    reps = 1 if ctx.quick else 3
    imports: list[float] = []            # jsonschema import times of the helper processes, s
    tmp = Path(tempfile.mkdtemp(prefix="sheafsynth-bench-"))
    old = os.environ.get("SHEAFSYNTH_CACHE_DIR")
    # Every repetition builds a different polyphony (one #define apart), so no
    # repetition can reuse another's shared object.
    try:
        cold, cold_cpu, warm_fresh, warm_here, cold_here = [], [], [], [], []
        for r in range(reps):
            d = tmp / f"rep{r}"
            t, c, imp = _helper(src_path, 16 + r, d)        # fresh process, empty cache
            cold.append(t)
            cold_cpu.append(c)
            imports.append(imp)
            t, _, imp = _helper(src_path, 16 + r, d)        # fresh process, cached
            warm_fresh.append(t)
            imports.append(imp)
            os.environ["SHEAFSYNTH_CACHE_DIR"] = str(d)
            t0 = time.perf_counter()
            inst = Instrument(src_path, rate=RATE, max_block=512, polyphony=16 + r)
            warm_here.append(time.perf_counter() - t0)
            if not inst.cached:
                raise SheafsynthError("the warm load compiled")
            os.environ["SHEAFSYNTH_CACHE_DIR"] = str(tmp / f"here{r}")
            t0 = time.perf_counter()
            inst = Instrument(src_path, rate=RATE, max_block=512, polyphony=64 + r)
            cold_here.append(time.perf_counter() - t0)
            del inst
    finally:
        if old is None:
            os.environ.pop("SHEAFSYNTH_CACHE_DIR", None)
        else:
            os.environ["SHEAFSYNTH_CACHE_DIR"] = old
        shutil.rmtree(tmp, ignore_errors=True)
    sc, sw = spread(cold), spread(warm_fresh)
    ctx.report["compile_cold_s"] = sc["median"]
    ctx.report["load_warm_s"] = sw["median"]
    what = "Instrument(preset) to a ready kernel (load and check the preset, lower, generate C, "
    ctx.details["compile_cold_s"] = {
        "seconds": sc, "cpu_seconds": spread(cold_cpu), "in_this_process_seconds": spread(cold_here),
        "preset": PLAIN_PRESET,
        "path": what + "compile, load, init) with an empty kernel cache, timed inside a fresh process "
                       "(imports excluded); wall-clock: the compiler is a child process (cpu_seconds "
                       "counts its CPU time too); in_this_process: the same after this process compiled before"}
    ctx.details["load_warm_s"] = {
        "seconds": sw, "in_this_process_seconds": spread(warm_here), "preset": PLAIN_PRESET,
        "library_import_s": spread(imports),
        "path": what + "load the cached shared object, init), timed inside a fresh process (library "
                       "imports excluded: library_import_s is jsonschema's one-time import, which a "
                       "process pays on its first preset); in_this_process: a shared object this "
                       "process had not loaded yet"}


def _helper(src_path: str, polyphony: int, cache: Path) -> tuple[float, float, float]:
    """Time Instrument(preset) in a fresh Python process; (wall s, CPU s incl. the compiler, import s).

    Library imports happen before the clock starts, jsonschema's too (the
    preset check imports it on first use); its import time is kept apart.
    """
    code = (
        "import json, resource, sys, time\n"
        "from sheafsynth.engine.instrument import Instrument\n"
        "i0 = time.perf_counter()\n"
        "import jsonschema  # noqa: F401  (imported lazily by the first preset check)\n"
        "imp = time.perf_counter() - i0\n"
        "c0 = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
        "p0 = time.process_time()\n"
        "t0 = time.perf_counter()\n"
        f"Instrument({src_path!r}, rate={RATE}, max_block=512, polyphony={int(polyphony)})\n"
        "t = time.perf_counter() - t0\n"
        "c1 = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
        "cpu = time.process_time() - p0 + (c1.ru_utime - c0.ru_utime) + (c1.ru_stime - c0.ru_stime)\n"
        "print(json.dumps([t, cpu, imp]))\n"
    )
    env = dict(os.environ)
    env["SHEAFSYNTH_CACHE_DIR"] = str(cache)
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                         timeout=600, stdin=subprocess.DEVNULL)
    if res.returncode != 0:
        tail = (res.stderr or res.stdout).strip().splitlines()[-1:] or ["no output"]
        raise SheafsynthError(f"helper process failed: {tail[0]}")
    t, cpu, imp = json.loads(res.stdout.strip().splitlines()[-1])
    return float(t), float(cpu), float(imp)

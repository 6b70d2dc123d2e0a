"""Host overhead per block: Python time of ``Instrument.process`` outside the kernel, and the live runtime's event push (microseconds).
"""

from __future__ import annotations

import os

from sheafsynth.engine.ir import voicing as V
from sheafsynth.host.bench.context import BLOCK, RATE, BenchContext, Kernel, cpu_clock
from sheafsynth.host.bench.stats import interleave, spread
from sheafsynth.host.live.runtime import HostRuntime

__all__ = ["host_overhead"]


def host_overhead(ctx: BenchContext) -> None:
    """``host_overhead_us_per_block``: Python time of Instrument.process outside the kernel (us)."""
    k = ctx.plain()
    inst = k.inst
    evs = [(10, V.EV_PARAM, 0, 0, 0.99), (60, V.EV_NOTE_OFF, 61, 0, 0.0),
           (120, V.EV_PARAM, 0, 0, 0.995), (200, V.EV_NOTE_OFF, 62, 0, 0.0)]
    cev = k.events(evs)
    loops = 200 if ctx.quick else 1000

    def py_events():
        t0 = cpu_clock()
        for _ in range(loops):
            for e in evs:
                inst.push_event(*e)
            inst.process(BLOCK)
        return (cpu_clock() - t0) / loops

    def py_plain():
        t0 = cpu_clock()
        for _ in range(loops):
            inst.process(BLOCK)
        return (cpu_clock() - t0) / loops

    def c_events():
        tot = 0.0
        for _ in range(loops // 10):
            tot += k.run(1, cev)
        return tot / (loops // 10)

    def c_plain():
        return k.run(loops) / loops

    res = interleave({"py_events": py_events, "py_plain": py_plain, "c_events": c_events,
                      "c_plain": c_plain}, ctx.reps)
    over_ev = [(p - c) * 1e6 for p, c in zip(res["py_events"], res["c_events"])]
    over_plain = [(p - c) * 1e6 for p, c in zip(res["py_plain"], res["c_plain"])]
    s = spread(over_ev)
    ctx.report["host_overhead_us_per_block"] = s["median"]
    det = {
        "overhead_us_4_events": s, "overhead_us_no_events": spread(over_plain),
        "kernel_us_empty_block": spread([c * 1e6 for c in res["c_plain"]]),
        "path": "Instrument.process(256 frames) with 4 queued events minus the same render called from C; "
                "no voices sounding, so the kernel part is small and the rest is Python",
    }
    try:
        det.update(_live_overhead(ctx, k))
    except Exception as e:  # the runtime module may be unavailable; say so
        if os.environ.get("SHEAFSYNTH_DEBUG"):
            raise
        det["live"] = f"not measured: {type(e).__name__}: {e}"
    ctx.details["host_overhead_us_per_block"] = det


def _live_overhead(ctx: BenchContext, k: Kernel) -> dict:
    rt = HostRuntime(float(RATE), BLOCK, channels=2)
    rt.set_kernel(k.fn, k.state, keep=k)
    loops = 200 if ctx.quick else 1000
    now = rt.now_ns()

    def proc():
        nonlocal now
        t0 = cpu_clock()
        for _ in range(loops):
            now += int(BLOCK / RATE * 1e9)
            rt.process(BLOCK, now)
        return (cpu_clock() - t0) / loops

    def push():
        tot = 0.0
        for _ in range(loops // 50 or 1):
            t0 = cpu_clock()
            for _ in range(50):
                rt.push(V.EV_PARAM, 0, 0, 0.99)
            tot += cpu_clock() - t0
            rt.process(BLOCK, rt.now_ns())
        return tot / ((loops // 50 or 1) * 50)

    res = interleave({"proc": proc, "push": push}, ctx.reps)
    c = rt.counters()
    cb_us = c.cb_last_ns / 1e3
    rt.set_kernel(None, None)
    rt.release_all_kernels()
    return {
        "live_callback_python_us_per_block": 0.0,
        "live_note": "the live callback is C (csrc/host_rt.c, a PortAudio callback): no Python runs "
                     "per audio block; Python only pushes MIDI events into the C ring",
        "midi_push_us_per_event": spread([x * 1e6 for x in res["push"]]),
        "hand_driven_callback_us_per_block": spread([x * 1e6 for x in res["proc"]]),
        "hand_driven_note": f"HostRuntime.process from Python (tests/offline only), callback itself "
                            f"{cb_us:.2f} us in C",
    }

"""Soak: ``sheafsynth play`` on the JACK dummy server under 300 random events per second.

Notes (with velocities), note-offs, CCs (mapped knobs, sustain, volume,
unmapped numbers), pitch bends, channel pressure and program changes across
the bank arrive through a JACK MIDI port at 300 events per second for
SHEAFSYNTH_SOAK_SECONDS (60 s by default, in CI; 600 for the long soak).

Pass when PortAudio reports zero xruns, the 99.9th-percentile callback time
stays below half the block period, no sample is non-finite, the recorded
output never exceeds the limiter ceiling, and the resident memory of the
``play`` process grows by less than 5 MB after the first 10 seconds.  The
figures are printed (run with -s) and, when SHEAFSYNTH_SOAK_RESULTS names a
file, written there as JSON.
"""

from __future__ import annotations

import json
import os
import random
import threading
import time

import numpy as np
import pytest

from sheafsynth.engine.ir.program import LIMITER_CEILING
from tests.conftest import midi_loss_explained, realtime_criteria, host_xruns
from tests.hardening.conftest import soak_seconds
from tests.live import send_timeline

pytestmark = [pytest.mark.live, pytest.mark.slow]

RATE_EVENTS = 300            # events per second
WARMUP_S = 10.0              # memory growth is measured after this
RSS_GROWTH_LIMIT_KIB = 5 * 1024


def soak_timeline(seconds: float, programs: int, seed: int = 23) -> list[tuple[float, list[int]]]:
    rng = random.Random(seed)
    out = []
    held: list[tuple[int, int]] = []
    n = int(seconds * RATE_EVENTS)
    next_program = rng.uniform(1.0, 3.0)
    for i in range(n):
        t = i / RATE_EVENTS
        if t >= next_program:
            out.append((t, [0xC0, rng.randrange(programs)]))
            next_program = t + rng.uniform(1.0, 3.0)
            continue
        ch = rng.choice([0, 0, 0, 1, 9])
        k = rng.random()
        if k < 0.30:
            note = rng.randrange(24, 109)
            out.append((t, [0x90 | ch, note, rng.randrange(1, 128)]))
            held.append((ch, note))
        elif k < 0.55 and held:
            c, note = held.pop(rng.randrange(len(held)))
            out.append((t, [0x80 | c, note, rng.randrange(128)]))
        elif k < 0.75:
            cc = rng.choice([1, 74, 74, 64, 7, 11, 71, rng.randrange(128)])
            if cc in (120, 121, 123) and rng.random() < 0.8:
                cc = 74
            out.append((t, [0xB0 | ch, cc, rng.randrange(128)]))
        elif k < 0.92:
            v = rng.randrange(16384)
            out.append((t, [0xE0 | ch, v & 0x7F, v >> 7]))
        else:
            out.append((t, [0xD0 | ch, rng.randrange(128)]))
    return out


def test_soak_300_events_per_second(live, tmp_path):
    seconds = soak_seconds()
    bank_dir = tmp_path / "bank"
    bank_dir.mkdir()
    from sheafsynth.host import bank

    os.environ["SHEAFSYNTH_USER_DIR"] = str(bank_dir)
    try:
        programs = len([e for e in bank.entries() if not e.error])
    finally:
        os.environ.pop("SHEAFSYNTH_USER_DIR", None)
    timeline = soak_timeline(seconds, programs)
    # --no-timing-log: the per-message log is the tests' instrument, not the host; it would
    # add about 5 kB a second to the memory measured here
    play = live.Play(tmp_path, "porch-pluck", seconds + 3.0,
                     extra=["--bank-dir", str(bank_dir), "--no-timing-log"],
                     virtual="sshard-soak")
    play.wait_ready()
    rss: list[tuple[float, int]] = []
    stop = threading.Event()
    t_ready = time.monotonic()

    def sample():
        while not stop.is_set():
            kib = play.rss_kib()
            if kib is None:
                return
            rss.append((time.monotonic() - t_ready, kib))
            stop.wait(0.5)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    try:
        send_timeline("sshard-soak", timeline)
    finally:
        stop.set()
        sampler.join(5)
    rc = play.wait(timeout=120)
    assert rc == 0, play.log()
    rep = play.report()
    x = play.recording()
    after = [k for t, k in rss if WARMUP_S <= t <= seconds]
    growth_kib = (max(after) - after[0]) if after else None
    peak = float(np.max(np.abs(x))) if x.size else 0.0
    period_ms = 1000.0 * live.block / live.rate
    figures = {
        "seconds": rep["seconds"], "events_sent": len(timeline), "midi_received": rep["midi"]["received"],
        "programs": len(rep["programs"]), "xruns": rep["xruns"], "load_p999": rep["load_p999"],
        "load_worst": rep["load_worst"], "p999_ms": None if rep["load_p999"] is None else rep["load_p999"] * period_ms,
        "block_period_ms": period_ms, "nonfinite_samples": rep["nonfinite_samples"],
        "clipped_samples": rep["clipped_samples"], "peak": peak, "ceiling": LIMITER_CEILING,
        "voices_stolen": rep["voices_stolen"], "guard_resets": rep["guard_resets"],
        "events_dropped": rep["events"]["dropped"], "rss_start_kib": after[0] if after else None,
        "load_cpu_p999": rep.get("load_cpu_p999"), "load_cpu_worst": rep.get("load_cpu_worst"),
        "callbacks_blocked": rep.get("callbacks_blocked"), "callbacks_preempted": rep.get("callbacks_preempted"),
        "xruns_host": host_xruns(rep), "shallow_idle": rep.get("shallow_idle"),
        "xruns_machine_stall": rep.get("machine", {}).get("xruns_explained"),
        "xruns_preempted": rep.get("machine", {}).get("xruns_preempted"),
        "explain_coverage": rep.get("machine", {}).get("explain_coverage"),
        "xruns_elsewhere": rep.get("machine", {}).get("xruns_elsewhere"),
        "machine_stalls": rep.get("machine", {}).get("probe", {}).get("stalls"),
        "worst_wake_late_ms": (rep.get("machine", {}).get("probe", {}).get("worst_late_s") or 0) * 1e3,
        "rss_growth_kib": growth_kib, "rss_samples": len(after),
    }
    print("\nSOAK " + json.dumps(figures))
    out = os.environ.get("SHEAFSYNTH_SOAK_RESULTS")
    if out:
        with open(out, "w", encoding="utf-8") as fh:
            json.dump(figures, fh, indent=1)
    # every message arrives in a run without xruns; JACK drops MIDI of the cycles it skips
    assert rep["nonfinite_samples"] == 0 and np.all(np.isfinite(x))
    assert peak <= LIMITER_CEILING * (1 + 1e-6), f"output peak {peak} above the ceiling {LIMITER_CEILING}"
    assert rep["kernel_errors"] == 0
    assert len(rep["programs"]) >= seconds / 4, "too few program changes were carried out"
    assert growth_kib is not None and len(after) >= 2 * (seconds - WARMUP_S) * 0.8
    assert growth_kib < RSS_GROWTH_LIMIT_KIB, f"resident memory grew {growth_kib / 1024:.1f} MB after {WARMUP_S:g} s"
    realtime_criteria(rep)
    # JACK drops the MIDI of the cycles it skips: without xruns every message arrives
    assert midi_loss_explained(rep, len(timeline)), (
        f"{rep['midi']['received']} of {len(timeline)} messages arrived with {rep['xruns']} xruns")

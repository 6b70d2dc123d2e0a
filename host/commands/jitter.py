"""``sheafsynth jitter``: can this machine keep a real-time deadline every audio block?

Runs the stall probe (host.live.stall_probe) alone for a while and prints how
late its real-time threads woke, by bins, with the stalls (wake-ups later
than a quarter of a block) per minute.  When the process may hold a
shallow-idle request (host.live.idle_latency) it measures a second pass with it
held, side by side, so the reader sees what that setting buys here.  No
audio device is opened.
"""

from __future__ import annotations

import argparse
import json
import sys
import time

from sheafsynth.engine.errors import InputError
from sheafsynth.host.commands.shared import Command
from sheafsynth.host.live.idle_latency import ShallowIdle
from sheafsynth.host.live.stall_probe import StallProbe

__all__ = ["COMMAND", "measure", "verdict"]


def measure(seconds: float, period_s: float, *, shallow_idle: bool = False) -> dict:
    """One probe pass; returns its reading as a dict (plus whether shallow idle was held)."""

    with ShallowIdle() if shallow_idle else _Nothing() as idle:
        with StallProbe(period_s) as probe:
            time.sleep(seconds)
            r = probe.read()
    d = r.as_dict()
    d["seconds"] = seconds
    d["stalls_per_minute"] = r.stalls * 60.0 / seconds
    d["shallow_idle"] = bool(getattr(idle, "held", False))
    d["shallow_idle_reason"] = getattr(idle, "reason", "")
    return d


class _Nothing:
    held = False
    reason = "not asked"

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return None


def _bin_labels(edges: list[float]) -> list[str]:
    labels, lo = [], 0.0
    for e in edges:
        labels.append(f"{_us(lo)}-{_us(e)}")
        lo = e
    labels.append(f">= {_us(lo)}")
    return labels


def _us(v: float) -> str:
    return f"{v / 1000:g} ms" if v >= 1000 else f"{v:g} µs"


def verdict(d: dict) -> str:
    """One line judging a pass: how late wake-ups were against the block period (ms)."""
    period_ms = d["period_s"] * 1e3
    worst_ms = d["worst_late_s"] * 1e3
    if not d["realtime"]:
        return ("the probe could not get real-time priority: these figures are those of an ordinary "
                "thread; real-time audio needs SCHED_FIFO (rtprio limits, or root)")
    if d["stalls"] == 0 and worst_ms < 0.25 * period_ms:
        return f"fit: every wake-up came within a quarter of the {period_ms:.2f} ms block"
    per_min = 60.0 / d["seconds"]
    if d["skipped"]:
        return (f"unfit at this buffer: {d['skipped'] * per_min:.0f} block deadlines a minute passed while "
                f"a CPU stalled (worst {worst_ms:.1f} ms), each one an xrun whatever plays; "
                f"try a bigger --buffer or a quieter machine")
    return (f"{d['stalls_per_minute']:.0f} stalls a minute took over a quarter of the {period_ms:.2f} ms block "
            f"(worst {worst_ms:.1f} ms): xruns become likely when the instrument's work is heavy")


def _print_pass(title: str, d: dict) -> None:
    print(f"{title}: {d['cpus']} CPU(s), {d['seconds']:g} s, "
          + (f"SCHED_FIFO {d['priority']}" if d["realtime"] else "normal scheduling")
          + (", pinned" if d["pinned"] else ""))
    total = sum(d["hist"]) or 1
    for label, n in zip(_bin_labels(d["bin_edges_us"]), d["hist"]):
        print(f"  late {label:>16}  {n:>8}  {100.0 * n / total:6.2f}%")
    print(f"  stalls (late > {d['stall_threshold_s'] * 1e3:.2f} ms): {d['stalls']} "
          f"({d['stalls_per_minute']:.1f} a minute); worst {d['worst_late_s'] * 1e3:.2f} ms")
    print(f"  {verdict(d)}")


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--seconds", type=float, default=10.0, help="length of each pass (default 10)")
    p.add_argument("--rate", type=int, default=48000, help="sample rate in Hz (default 48000)")
    p.add_argument("--buffer", type=int, default=128, help="frames per block (default 128)")
    p.add_argument("--json", action="store_true", help="machine-readable result")


def _run(args: argparse.Namespace) -> int:
    if not 0.5 <= args.seconds <= 3600:
        raise InputError(f"--seconds {args.seconds:g}: expected 0.5..3600")
    if not 8000 <= args.rate <= 192000:
        raise InputError(f"--rate {args.rate}: expected 8000..192000 Hz")
    if not 16 <= args.buffer <= 4096:
        raise InputError(f"--buffer {args.buffer}: expected 16..4096 frames")
    period = args.buffer / args.rate
    passes = {"as_is": measure(args.seconds, period)}
    probe_idle = ShallowIdle().open()
    can_hold, why = probe_idle.held, probe_idle.reason
    probe_idle.close()
    if can_hold:
        passes["shallow_idle"] = measure(args.seconds, period, shallow_idle=True)
    if args.json:
        print(json.dumps({"rate": args.rate, "buffer": args.buffer, "period_s": period, "passes": passes,
                          "shallow_idle_unavailable": None if can_hold else why}, indent=1))
        return 0
    print(f"Real-time wake-ups every {args.buffer} frames at {args.rate} Hz ({period * 1e3:.2f} ms):")
    _print_pass("as the machine is", passes["as_is"])
    if can_hold:
        _print_pass("with the CPUs kept out of slow idle states (play --shallow-idle)", passes["shallow_idle"])
    else:
        print(f"(no second pass with shallow idle: {why})")
    sys.stdout.flush()
    return 0


COMMAND = Command("jitter", "measure how promptly this machine wakes real-time threads at the audio block rate",
                  _add, _run)

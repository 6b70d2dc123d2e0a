"""What a live session tells when it stops: the ``--report`` JSON and the stop line's xrun text.

The report's shape ("sheafsynth-play-report", version 1) is read by the live
tests and by people; keep its keys.  Loads are fractions of the block period,
times in s unless a key says ns (CLOCK_MONOTONIC nanoseconds).
"""

from __future__ import annotations

import math
from array import array
from typing import Any

from sheafsynth.host.live.runtime import HostCounters, HostRuntime, SlowCallback
from sheafsynth.host.live.stall_probe import (CAUSE_ELSEWHERE, CAUSE_PREEMPTED, CAUSE_SLOW, EXPLAIN_WINDOW_S,
                                              ProbeReading, Stall, explain_coverage, explain_xruns, xrun_causes)

__all__ = ["LOG_LIMIT", "MidiLog", "PairLog", "machine_report", "play_report", "xrun_summary", "latency_ms", "latency_text"]

LOG_LIMIT = 200_000        # most MIDI messages / anchors kept for the report


class MidiLog:
    """(arrival stamp ns, bytes) of received MIDI messages, packed: about 15 bytes a message,
    so a long session with --report does not grow the resident memory by megabytes."""

    def __init__(self) -> None:
        self._stamps = array("q")
        self._ends = array("Q")
        self._data = bytearray()

    def __len__(self) -> int:
        return len(self._stamps)

    def append(self, item: tuple[int, Any] | list[Any]) -> None:
        """Add one ``(stamp_ns, data bytes)``."""
        stamp, data = item
        self._data.extend(bytes(data))
        self._stamps.append(int(stamp))
        self._ends.append(len(self._data))

    def to_list(self) -> list:
        """[[stamp_ns, [byte, ...]], ...] for JSON."""
        out, start = [], 0
        for stamp, end in zip(self._stamps, self._ends):
            out.append([stamp, list(self._data[start:end])])
            start = end
        return out


class PairLog:
    """[int, int] pairs (timing anchors: frame, callback start ns), packed."""

    def __init__(self) -> None:
        self._a = array("q")
        self._b = array("q")

    def __len__(self) -> int:
        return len(self._a)

    def __getitem__(self, i: int) -> list:
        return [self._a[i], self._b[i]]

    def append(self, item: list[int] | tuple[int, int]) -> None:
        """Add one pair."""
        self._a.append(int(item[0]))
        self._b.append(int(item[1]))

    def to_list(self) -> list:
        """[[a, b], ...] for JSON."""
        return [[a, b] for a, b in zip(self._a, self._b)]


def machine_report(reading: ProbeReading, stalls: list[Stall], rt: HostRuntime, elapsed: float) -> dict:
    """The stall probe's figures and which xruns the machine's stalls explain (``elapsed`` in s)."""
    xrun_ns = rt.xrun_times()
    slow: list[SlowCallback] = rt.slow_callbacks()
    gaps = explain_xruns(xrun_ns, stalls)
    causes = xrun_causes(xrun_ns, stalls, slow, reading.period_s)
    return {"probe": reading.as_dict(), "explain_window_s": EXPLAIN_WINDOW_S,
            "explain_coverage": explain_coverage(stalls, elapsed),
            "xrun_times_ns": xrun_ns,
            "xrun_stall_gap_s": gaps,
            "xrun_causes": causes,
            "xruns_explained": sum(g is not None for g in gaps),
            "xruns_unexplained": sum(g is None for g in gaps),
            "xruns_preempted": causes.count(CAUSE_PREEMPTED),
            "xruns_slow_callback": causes.count(CAUSE_SLOW),
            "xruns_elsewhere": causes.count(CAUSE_ELSEWHERE),
            "slow_callbacks": [list(c) for c in slow],
            "stalls": [[st.deadline_ns, st.late_ns, st.cpu] for st in stalls[:4096]]}


def play_report(c: HostCounters, *, period_ns: float, head: dict, midi: dict, kernels: dict,
                frames_recorded: int, tail: dict) -> dict:
    """The report dict: ``head`` (preset, rate, device...), the runtime counters ``c`` (loads as
    fractions of ``period_ns``), ``midi``, ``kernels`` (summed kernel counters), then ``tail``
    (programs, learned, saved...)."""
    p999 = c.load_percentile(99.9)
    cpu_p999 = c.load_percentile(99.9, on_cpu=True)
    rep = {
        "format": "sheafsynth-play-report", "version": 1,
        **head,
        "callbacks": int(c.callbacks), "frames": int(c.frames),
        "xruns": int(c.xruns), "underflows": int(c.underflows), "overflows": int(c.overflows),
        "load_worst": c.cb_worst_ns / period_ns,
        "load_p999": p999 if math.isfinite(p999) else None,
        "load_cpu_worst": c.cb_cpu_worst_ns / period_ns,
        "load_cpu_p999": cpu_p999 if math.isfinite(cpu_p999) else None,
        "callbacks_blocked": int(c.cb_blocked),
        "callbacks_preempted": int(c.cb_preempted),
        "midi": midi,
        "events": {"pushed": int(c.events_pushed), "dropped": int(c.events_dropped),
                   "delivered": int(c.events_delivered), "late": int(c.events_late)},
        "voices_stolen": kernels["voices_stolen"], "guard_resets": kernels["guard_resets"],
        "kernel_events_ignored": kernels["events_ignored"],
        "frames_recorded": int(frames_recorded), "record_dropped": int(c.record_dropped),
        "nonfinite_samples": int(c.nonfinite), "clipped_samples": int(c.clipped),
        "kernel_errors": int(c.kernel_errors),
        "switches": int(c.switches), "fade_timeouts": int(c.fade_timeouts),
        **tail,
    }
    return rep


def latency_ms(buffer: int, rate: float, output_s: float | None) -> dict:
    """Key-to-sound latency in ms: {"event_delay_ms", "output_ms", "key_to_sound_ms"}.

    The runtime places every event one block after its arrival (csrc/host_rt.c:
    ``buffer`` frames at ``rate`` Hz, so the timing inside the block is kept);
    the block then reaches the listener after the output latency PortAudio
    reports for the opened stream (``output_s``, s; None while no stream is
    open, and then the output and the total are None too).
    """
    event = 1000.0 * buffer / rate
    if output_s is None or not math.isfinite(output_s):
        return {"event_delay_ms": event, "output_ms": None, "key_to_sound_ms": None}
    out = 1000.0 * output_s
    return {"event_delay_ms": event, "output_ms": out, "key_to_sound_ms": event + out}


def latency_text(lat: dict) -> str:
    """The start-up line's latency part, from a :func:`latency_ms` dict."""
    if lat.get("key_to_sound_ms") is None:
        return f"key to sound: one block ({lat['event_delay_ms']:.1f} ms) + an output latency PortAudio did not report"
    return (f"key to sound {lat['key_to_sound_ms']:.1f} ms (one block {lat['event_delay_ms']:.1f} "
            f"+ output {lat['output_ms']:.1f})")


def xrun_summary(report: dict) -> str:
    """"N xruns", with their causes when the stall probe ran, and a blocked-callback warning."""
    n = int(report["xruns"])
    text = f"{n} xruns"
    m = report.get("machine")
    if m and n:
        text += (f" ({m['xruns_explained'] + m['xruns_preempted']} the machine's, "
                 f"{m['xruns_slow_callback']} after slow callbacks, {m['xruns_elsewhere']} elsewhere)")
    if report.get("callbacks_blocked"):
        text += f", the audio thread BLOCKED in {report['callbacks_blocked']} callbacks (a host bug: please report it)"
    return text

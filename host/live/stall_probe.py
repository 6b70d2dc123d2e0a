"""How promptly this machine wakes a real-time thread, and which xruns that explains.

An xrun means some part of the audio graph missed its deadline.  On a
shared or virtual machine that is often nobody's code: the machine did not
run any thread on a CPU for a while (the hypervisor took the CPU, a deep
idle state was slow to leave).  :class:`StallProbe` runs csrc/stall_probe.c
-- one real-time thread per CPU that only sleeps to block-period deadlines
and notes how late it woke -- beside the audio.  :func:`explain_xruns` then
sets each xrun against the stalls the probe saw just before it: an xrun
with a stall in its window is the machine's.  :func:`xrun_causes` goes on
with the runtime's log of slow callbacks: an xrun after a callback of ours
that took most of the period on its CPU is the host's own; one after a
callback that took as long but was off its CPU most of that time was
preempted (the machine's again, a stall too short for the probe to see); one
with neither happened elsewhere in the audio graph (another client, or the
server, missed the cycle while our callback was in time).

The probe runs in the host runtime module (engine.backends.c.build, tag "host"); it
costs a clock read per CPU and block.
"""

from __future__ import annotations

import bisect
import dataclasses
from typing import Iterable, Sequence

from sheafsynth.engine.errors import AudioError
from sheafsynth.host.live.runtime import check_created, check_status, load_runtime

__all__ = ["StallProbe", "ProbeReading", "Stall", "explain_xruns", "explain_coverage", "xrun_causes", "CAUSES", "STALL_FRACTION",
           "EXPLAIN_WINDOW_S", "PROBE_PRIORITY", "PLAY_TICKS"]

STALL_FRACTION = 0.25     # a wake-up later than this part of a block period is a stall
EXPLAIN_WINDOW_S = 0.025  # a stall ending at most this long before an xrun is reported explains it
SLOW_FRACTION = 0.75      # a callback longer than this part of the period can make the cycle miss
PROBE_PRIORITY = 80       # SCHED_FIFO; above a JACK server's usual 70 so audio load cannot delay it
PLAY_TICKS = 4            # probe deadlines per audio block beside a running stream


class ProbeError(AudioError):
    """The stall probe could not start."""


@dataclasses.dataclass(frozen=True)
class Stall:
    """One late wake-up: the deadline it missed (CLOCK_MONOTONIC ns), by how much (ns), on which CPU."""

    deadline_ns: int
    late_ns: int
    cpu: int


@dataclasses.dataclass(frozen=True)
class ProbeReading:
    """Totals of a probe: wake-ups, stalls, lateness histogram (bin edges in µs).

    ``period_s`` is the audio block period the probe stands beside, ``tick_s``
    the time between its deadlines (a fraction of the period when it samples
    finer, so that a stall shorter than a block still meets a deadline);
    ``skipped`` counts deadlines of ``tick_s`` passed inside stalls.
    """

    period_s: float
    tick_s: float
    stall_threshold_s: float
    wakes: int
    stalls: int
    skipped: int
    hist: tuple[int, ...]
    bin_edges_us: tuple[float, ...]
    worst_late_s: float
    cpus: int
    realtime: bool
    priority: int
    pinned: bool

    def as_dict(self) -> dict:
        """The reading as JSON-ready values (s, us, counts)."""
        d = dataclasses.asdict(self)
        d["hist"] = list(self.hist)
        d["bin_edges_us"] = list(self.bin_edges_us)
        return d

    def quantile_upper_us(self, q: float) -> float | None:
        """Upper bin edge (µs) below which a fraction ``q`` of wake-ups fell; None in the open bin."""
        total = sum(self.hist)
        if total == 0:
            return None
        acc = 0
        for i, n in enumerate(self.hist):
            acc += n
            if acc >= q * total:
                return self.bin_edges_us[i] if i < len(self.bin_edges_us) else None
        return None


class StallProbe:
    """One pinned real-time sleeper per CPU (``start``/``stop`` or a ``with`` block).

    Each sleeps to deadlines ``period_s / ticks_per_period`` apart and counts a
    wake-up later than ``stall_fraction`` of the period as a stall.  One tick
    per period (``sheafsynth jitter``) measures exactly what an audio thread
    waking once a block meets.  Beside a running stream (``play
    --stall-probe``) :data:`PLAY_TICKS` ticks per block catch every stall long
    enough to make a block late: with deadlines a quarter period apart, any
    stall longer than half a period crosses one and wakes it more than a
    quarter period late.
    """

    def __init__(self, period_s: float, *, stall_fraction: float = STALL_FRACTION,
                 priority: int = PROBE_PRIORITY, ticks_per_period: int = 1):
        if not 1e-4 <= float(period_s) <= 1.0:
            raise ValueError(f"probe period {period_s!r} s must be within 0.0001..1")
        if not 0.0 < float(stall_fraction) <= 10.0:
            raise ValueError(f"stall fraction {stall_fraction!r} must be within 0..10")
        if not 1 <= int(priority) <= 99:
            raise ValueError(f"probe priority {priority!r} must be within 1..99")
        if not 1 <= int(ticks_per_period) <= 16:
            raise ValueError(f"probe ticks per period {ticks_per_period!r} must be within 1..16")
        mod = load_runtime()
        self.ffi, self.lib = mod.ffi, mod.lib
        self.period_s = float(period_s)
        # Deadlines tick_s apart (no closer than the C probe's 100 µs floor).
        ticks = max(1, min(int(ticks_per_period), int(self.period_s / 1e-4 + 1e-9)))
        self.tick_s = self.period_s / ticks
        self.stall_s = float(period_s) * float(stall_fraction)
        self.priority = int(priority)
        self._ptr = None

    def start(self) -> "StallProbe":
        """Start the probe threads (ProbeError when none starts)."""
        if self._ptr is not None:
            return self
        self._ptr = check_created(self.ffi, self.lib.ss_probe_start(int(round(self.tick_s * 1e9)),
                                                                    int(round(self.stall_s * 1e9)), self.priority),
                                  "the stall probe could not start a thread", ProbeError)
        return self

    def stop(self) -> None:
        """Stop and join the probe threads (idempotent)."""
        if self._ptr is not None:
            self.lib.ss_probe_stop(self._ptr)
            self._ptr = None

    def __enter__(self) -> "StallProbe":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    @property
    def running(self) -> bool:
        """True between start() and stop()."""
        return self._ptr is not None

    def read(self) -> ProbeReading:
        """The totals so far (ProbeError when not running)."""
        if self._ptr is None:
            raise ProbeError("the stall probe is not running")
        st = self.ffi.new("ss_probe_stats *")
        check_status(self.lib, self.lib.ss_probe_read(self._ptr, st), "read the stall probe", ProbeError)
        edges = tuple(float(self.lib.ss_probe_bin_edges_us[i]) for i in range(self.lib.SS_PROBE_BINS - 1))
        return ProbeReading(
            period_s=self.period_s, tick_s=self.tick_s, stall_threshold_s=self.stall_s, wakes=int(st.wakes),
            stalls=int(st.stalls), skipped=int(st.skipped), hist=tuple(int(x) for x in st.hist),
            bin_edges_us=edges, worst_late_s=int(st.worst_late_ns) * 1e-9, cpus=int(st.cpus),
            realtime=bool(st.realtime), priority=int(st.priority), pinned=bool(st.pinned))

    def stalls(self, limit: int = 1 << 16) -> list[Stall]:
        """The stalls kept so far (oldest first per CPU; the ring keeps the last 4096 per CPU)."""
        if self._ptr is None:
            raise ProbeError("the stall probe is not running")
        d = self.ffi.new("int64_t[]", limit)
        late = self.ffi.new("int64_t[]", limit)
        cpu = self.ffi.new("int32_t[]", limit)
        n = check_status(self.lib, self.lib.ss_probe_stalls(self._ptr, d, late, cpu, limit),
                         "read the stall log", ProbeError)
        out = [Stall(int(d[i]), int(late[i]), int(cpu[i])) for i in range(n)]
        out.sort(key=lambda s: s.deadline_ns)
        return out


def explain_xruns(xrun_ns: Sequence[int], stalls: Iterable[Stall], *,
                  window_s: float = EXPLAIN_WINDOW_S) -> list[float | None]:
    """For each xrun time, the gap in s from the end of the latest stall that overlaps
    ``[t - window_s, t]`` to ``t`` (0 when the stall was still going on), or None when
    no stall falls in the window -- an xrun the machine does not explain.

    ``xrun_ns`` are the start times of the callbacks flagged with an xrun: the
    flag reaches the callback after the cycle that missed, so the cause lies
    before it.
    """
    spans = sorted((s.deadline_ns, s.deadline_ns + s.late_ns) for s in stalls)
    starts = [a for a, _ in spans]
    w = int(window_s * 1e9)
    out: list[float | None] = []
    for t in xrun_ns:
        i = bisect.bisect_right(starts, t)          # stalls that began at or before t
        best = None
        for _a, b in reversed(spans[max(0, i - 64):i]):
            if b < t - w:
                continue
            gap = max(0, t - b) * 1e-9
            best = gap if best is None else min(best, gap)
        out.append(best)
    return out


def explain_coverage(stalls: Iterable[Stall], seconds: float, *, window_s: float = EXPLAIN_WINDOW_S) -> float:
    """Fraction of a session of ``seconds`` in which an xrun would be put down to a stall.

    The union of every stall stretched by the explanation window, over the
    session length: how likely an xrun at a random instant would be explained
    by chance.  Small (a few percent) means the explanations carry weight.
    """
    if seconds <= 0:
        return 0.0
    w = int(window_s * 1e9)
    covered, end = 0, None
    for a, b in sorted((s.deadline_ns, s.deadline_ns + s.late_ns + w) for s in stalls):
        if end is None or a > end:
            covered += b - a
            end = b
        elif b > end:
            covered += b - end
            end = b
    return min(1.0, covered * 1e-9 / seconds)


CAUSE_STALL = "machine stall"
CAUSE_PREEMPTED = "preempted callback"
CAUSE_SLOW = "slow callback"
CAUSE_ELSEWHERE = "elsewhere in the graph"
CAUSES = (CAUSE_STALL, CAUSE_PREEMPTED, CAUSE_SLOW, CAUSE_ELSEWHERE)


def xrun_causes(xrun_ns: Sequence[int], stalls: Iterable[Stall],
                slow: Sequence[tuple[int, int] | tuple[int, int, int | None]],
                period_s: float, *, window_s: float = EXPLAIN_WINDOW_S,
                slow_fraction: float = SLOW_FRACTION) -> list[str]:
    """Each xrun's likely cause, one of :data:`CAUSES`.

    A machine stall the probe saw in the window comes first (it also makes
    callbacks slow).  Else the callbacks of ours that began in the window and
    took more than ``slow_fraction`` of the block period decide (``slow``:
    (start ns, duration ns[, CPU ns]) from the runtime's log): one that also
    spent that long on its CPU is a "slow callback", the host's own; one that
    spent less was held off its CPU (the hypervisor took the vCPU, too
    briefly for the probe to catch) -- a "preempted callback", the
    machine's.  A callback without a CPU time counts as slow.  Else our
    callbacks were in time and no CPU stalled: another client of the audio
    graph, or the server, missed the cycle.
    """
    gaps = explain_xruns(xrun_ns, stalls, window_s=window_s)
    limit = slow_fraction * period_s * 1e9
    long_ones = sorted(((int(c[0]), c[2] if len(c) > 2 else None) for c in slow if c[1] > limit),
                       key=lambda sc: sc[0])
    starts = [a for a, _ in long_ones]
    w = int(window_s * 1e9)
    out = []
    for t, gap in zip(xrun_ns, gaps):
        if gap is not None:
            out.append(CAUSE_STALL)
            continue
        lo, hi = bisect.bisect_left(starts, t - w), bisect.bisect_right(starts, t)
        inside = [cpu for _, cpu in long_ones[lo:hi]]
        if not inside:
            out.append(CAUSE_ELSEWHERE)
        elif any(cpu is None or cpu > limit for cpu in inside):
            out.append(CAUSE_SLOW)
        else:
            out.append(CAUSE_PREEMPTED)
    return out

"""The stall probe, the xrun log, xrun attribution, shallow idle and ``sheafsynth jitter``.

No audio device.  The probe's counts are checked for consistency
(histogram against wake-ups, kept stalls against the threshold, deadlines
on one grid of whole periods); nothing here asserts how fast the machine is.
"""

from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
import time
from pathlib import Path

import pytest

from sheafsynth.host.live.idle_latency import ShallowIdle
from sheafsynth.host.live.runtime import HostRuntime
from sheafsynth.host.live.stall_probe import CAUSES, Stall, StallProbe, explain_coverage, explain_xruns, xrun_causes

REPO = Path(__file__).resolve().parents[3]
PA_OUTPUT_UNDERFLOW = 0x4      # PortAudio v19 portaudio.h: paOutputUnderflow


@pytest.mark.parametrize("ticks", [1, 4])
def test_probe_counts_every_wake_on_every_cpu(ticks):
    period = 0.002
    with StallProbe(period, ticks_per_period=ticks) as probe:
        time.sleep(0.5)
        r = probe.read()
        stalls = probe.stalls()
    assert r.tick_s == pytest.approx(period / ticks)
    cpus = len(os.sched_getaffinity(0))
    assert r.cpus == cpus
    assert r.wakes > 0 and sum(r.hist) == r.wakes
    assert r.stalls == len(stalls) or len(stalls) == 4096 * cpus
    assert all(s.late_ns > r.stall_threshold_s * 1e9 for s in stalls)
    assert r.worst_late_s >= max((s.late_ns * 1e-9 for s in stalls), default=0.0)
    assert r.stall_threshold_s == pytest.approx(0.25 * period)
    # every CPU's deadlines lie on one grid of whole ticks of CLOCK_MONOTONIC
    p_ns = int(round(period / ticks * 1e9))
    assert all(s.deadline_ns % p_ns == 0 for s in stalls)
    assert {s.cpu for s in stalls} <= set(os.sched_getaffinity(0))


def test_probe_rejects_bad_arguments():
    with pytest.raises(ValueError, match="period"):
        StallProbe(5.0)
    with pytest.raises(ValueError, match="priority"):
        StallProbe(0.003, priority=0)
    with pytest.raises(ValueError, match="fraction"):
        StallProbe(0.003, stall_fraction=0.0)
    with pytest.raises(ValueError, match="ticks"):
        StallProbe(0.003, ticks_per_period=0)
    # ticks never closer than the C probe's 100 µs floor
    assert StallProbe(0.0003, ticks_per_period=4).tick_s == pytest.approx(0.0001)


def test_probe_reading_quantile():
    with StallProbe(0.003) as probe:
        time.sleep(0.2)
        r = probe.read()
    q = r.quantile_upper_us(0.5)
    assert q is None or q in r.bin_edges_us


def _st(start_ms: float, late_ms: float) -> Stall:
    return Stall(int(start_ms * 1e6), int(late_ms * 1e6), 0)


def test_explain_xruns_windows():
    stalls = [_st(100.0, 5.0), _st(500.0, 1.0), _st(900.0, 40.0)]
    xr = [int(x * 1e6) for x in (106.0, 131.0, 499.0, 520.0, 930.0, 2000.0)]
    got = explain_xruns(xr, stalls, window_s=0.025)
    assert got[0] == pytest.approx(0.001)     # 1 ms after the stall ended
    assert got[1] is None                     # 26 ms after: outside the window
    assert got[2] is None                     # before the stall began: not its cause
    assert got[3] == pytest.approx(0.019)
    assert got[4] == 0.0                      # the stall was still going on
    assert got[5] is None
    assert explain_xruns([], stalls) == []
    assert explain_xruns(xr[:2], []) == [None, None]


def test_xrun_causes_put_the_machine_first_then_our_slow_callbacks():
    period = 0.002
    stalls = [_st(100.0, 3.0)]
    slow = [(int(98.0e6), int(1.9e6)),       # slow, but a stall covers it: the machine's
            (int(300.0e6), int(1.8e6)),      # 0.9 of the period, no CPU time known: ours
            (int(600.0e6), int(1.2e6))]      # 0.6 of the period: cannot make a cycle miss by itself
    xr = [int(x * 1e6) for x in (104.0, 305.0, 606.0, 900.0)]
    assert xrun_causes(xr, stalls, slow, period) == [
        "machine stall", "slow callback", "elsewhere in the graph", "elsewhere in the graph"]


def test_explain_coverage_is_the_union_of_stretched_stalls():
    # stalls of 3 ms at 100 ms and 110 ms overlap once stretched by the 25 ms window:
    # 100..138 ms; one at 500 ms covers 500..526 ms; 64 ms of a 1 s session
    stalls = [_st(100.0, 3.0), _st(110.0, 3.0), _st(500.0, 1.0)]
    assert explain_coverage(stalls, 1.0) == pytest.approx(0.064)
    assert explain_coverage([], 1.0) == 0.0
    assert explain_coverage(stalls, 0.0) == 0.0
    assert explain_coverage(stalls * 40, 0.01) == 1.0


def test_xrun_causes_tell_a_preempted_callback_from_a_slow_one():
    """A callback long in wall time but short on its CPU was held off the CPU."""
    period = 0.002
    slow = [(int(100.0e6), int(2.4e6), int(0.3e6)),   # 1.2 periods, 0.15 of them on the CPU
            (int(300.0e6), int(1.8e6), int(1.7e6)),   # on the CPU nearly all the time: ours
            (int(500.0e6), int(2.0e6), int(0.2e6)),   # a preempted one and ...
            (int(510.0e6), int(1.9e6), int(1.6e6))]   # ... a slow one in the same window: ours
    xr = [int(x * 1e6) for x in (104.0, 305.0, 515.0)]
    assert xrun_causes(xr, [], slow, period) == ["preempted callback", "slow callback", "slow callback"]
    # two logged callbacks may share a start time, one with its CPU time unknown
    twins = [(int(100.0e6), int(1.8e6), None), (int(100.0e6), int(1.9e6), int(0.2e6))]
    assert xrun_causes([int(104.0e6)], [], twins, period) == ["slow callback"]
    assert set(xrun_causes(xr, [], slow, period)) <= set(CAUSES)


_TIMING_KERNELS_CDEF = """
typedef struct ss_event ss_event;
typedef struct { ...; } ss_counters_t;
int ss_test_sleep(void *state, const ss_event *events, int n_events, float *out, int frames);
int ss_test_spin(void *state, const ss_event *events, int n_events, float *out, int frames);
"""

_TIMING_KERNELS_SOURCE = r"""
#include <string.h>
#include <time.h>
#include "ss_abi.h"
typedef ss_counters ss_counters_t;
static long long cpu_ns_(void) {
    struct timespec t; clock_gettime(CLOCK_THREAD_CPUTIME_ID, &t);
    return (long long)t.tv_sec * 1000000000LL + t.tv_nsec;
}
/* 6 ms asleep: a callback held off its CPU that long. */
int ss_test_sleep(void *state, const ss_event *events, int n_events, float *out, int frames) {
    struct timespec d = {0, 6000000};
    (void)state; (void)events; (void)n_events;
    nanosleep(&d, NULL);
    memset(out, 0, sizeof(float) * (size_t)frames);
    return 0;
}
/* 6 ms of this thread's own CPU time: a callback that is slow itself. */
int ss_test_spin(void *state, const ss_event *events, int n_events, float *out, int frames) {
    long long end = cpu_ns_() + 6000000LL;
    (void)state; (void)events; (void)n_events;
    while (cpu_ns_() < end) { }
    memset(out, 0, sizeof(float) * (size_t)frames);
    return 0;
}
"""


def test_callbacks_held_off_the_cpu_are_told_from_slow_ones():
    """End to end through the runtime: a kernel that sleeps 6 ms stands in for a
    callback the machine held off its CPU, one that burns 6 ms of its own CPU time
    for a slow callback; the xrun flagged after each is put down to the right cause.

    POSIX clock_gettime(CLOCK_THREAD_CPUTIME_ID) counts only the time the
    thread ran, which is what tells the two apart.
    """
    from sheafsynth.engine.backends.c.build import compile_module

    mod = compile_module(_TIMING_KERNELS_CDEF, _TIMING_KERNELS_SOURCE, tag="timing")
    state = mod.ffi.new("ss_counters_t *")
    rate, frames = 48000, 128                # a 2.67 ms period: both kernels overrun it
    period_ns = frames / rate * 1e9
    rt = HostRuntime(rate, frames)
    t = rt.now_ns()
    rt.set_kernel(mod.ffi.addressof(mod.lib, "ss_test_sleep"), state, keep=mod)
    rt.process(frames, t)                    # takes the kernel, sleeps
    rt.process(frames, t + int(period_ns), PA_OUTPUT_UNDERFLOW)
    rt.set_kernel(mod.ffi.addressof(mod.lib, "ss_test_spin"), state, keep=mod)
    rt.process(frames, t + int(2 * period_ns))
    rt.process(frames, t + int(3 * period_ns), PA_OUTPUT_UNDERFLOW)

    slow = rt.slow_callbacks()
    long_ones = [c for c in slow if c.dur_ns > 5_000_000]
    assert len(long_ones) >= 2
    asleep, spun = long_ones[0], long_ones[-1]
    assert asleep.cpu_ns is not None and asleep.cpu_ns < 0.5 * period_ns
    assert spun.cpu_ns is not None and spun.cpu_ns >= 6_000_000
    assert all(c.cpu_ns is None or c.cpu_ns <= c.dur_ns + 100_000 for c in slow)
    c = rt.counters()
    # getrusage(2) RUSAGE_THREAD: a sleep is a voluntary context switch, a spin is none
    assert c.cb_blocked >= 2 and c.cb_blocked <= c.callbacks - 1
    assert c.cb_cpu_worst_ns >= 6_000_000 and sum(c.cpu_hist) == sum(c.hist) == c.callbacks
    xr = rt.xrun_times()
    assert len(xr) == 2
    assert xrun_causes(xr, [], slow, period_ns * 1e-9, window_s=0.02) == [
        "preempted callback", "slow callback"]
    assert set(xrun_causes(xr, [], slow, period_ns * 1e-9)) <= set(CAUSES)


def test_runtime_logs_slow_callbacks():
    """Callbacks over half the period are logged with their start and duration."""
    from sheafsynth.engine.instrument import Instrument

    inst = Instrument("presets/curb-plate.json", rate=48000, max_block=128)
    for k in range(6):
        inst.note_on(50 + k, 100)
    inst.process(128)                       # the notes reach the kernel: six plate voices ring
    h = inst.handle()
    # The runtime told the rate is 4.8 MHz: a 128-frame period of 27 µs, which
    # six plate voices take far longer than half of; an empty callback does not.
    rt = HostRuntime(4_800_000, 128)
    t = rt.now_ns()
    rt.process(128, t)                      # no kernel yet: fast, not logged
    rt.set_kernel(h.render_fn, h.state, keep=inst)
    for k in range(1, 4):
        rt.process(128, t + k * 26_667)
    slow = rt.slow_callbacks()
    assert 3 <= len(slow) <= 4           # (the empty one only if the machine stalled in it)
    assert all(c.dur_ns > 0.5 * 128 / 4_800_000 * 1e9 for c in slow)
    assert [c.start_ns for c in slow] == sorted(c.start_ns for c in slow)


def test_runtime_logs_xrun_times():
    rt = HostRuntime(48000, 128)
    t = 1_000_000_000
    flagged = []
    for k in range(10):
        flags = PA_OUTPUT_UNDERFLOW if k in (2, 3, 7) else 0
        before = rt.now_ns()
        rt.process(128, t + k * 2_666_667, flags)
        if flags:
            flagged.append(before)
    times = rt.xrun_times()
    c = rt.counters()
    assert c.underflows == 3 and len(times) == 3
    # stamped with the clock at the callback's start (CLOCK_MONOTONIC, as the probe)
    for got, before in zip(times, flagged):
        assert before <= got <= before + 1_000_000_000


def test_shallow_idle_writes_a_zero_and_holds_the_file(tmp_path):
    f = tmp_path / "qos"
    f.write_bytes(b"")
    with ShallowIdle(str(f)) as idle:
        assert idle.held and idle.reason == ""
        assert f.read_bytes() == struct.pack("=i", 0)   # Linux PM QoS: a 32-bit binary value
    assert not idle.held


def test_shallow_idle_says_why_not(tmp_path):
    missing = ShallowIdle(str(tmp_path / "none")).open()
    assert not missing.held and "does not exist" in missing.reason
    folder = ShallowIdle(str(tmp_path)).open()
    assert not folder.held and str(tmp_path) in folder.reason
    missing.close()
    folder.close()


def _cli(*args, timeout=120):
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", *args], cwd=REPO, capture_output=True,
                          text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def test_jitter_command_json():
    r = _cli("jitter", "--seconds", "0.5", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    first = d["passes"]["as_is"]
    assert first["wakes"] > 0 and first["cpus"] >= 1
    assert d["period_s"] == pytest.approx(128 / 48000)
    assert ("shallow_idle" in d["passes"]) == (d["shallow_idle_unavailable"] is None)


def test_jitter_command_text_and_bad_input():
    r = _cli("jitter", "--seconds", "0.5", "--buffer", "256")
    assert r.returncode == 0, r.stderr
    assert "5.33 ms" in r.stdout and "stalls" in r.stdout
    bad = _cli("jitter", "--seconds", "0")
    assert bad.returncode == 2 and "--seconds" in bad.stderr and "Traceback" not in bad.stderr


def test_jitter_verdicts():
    from sheafsynth.host.commands.jitter import verdict

    base = dict(period_s=128 / 48000, seconds=10.0, realtime=True, stalls=0, skipped=0,
                stalls_per_minute=0.0, worst_late_s=0.0001)
    assert verdict(base).startswith("fit")
    some = dict(base, stalls=5, stalls_per_minute=30.0, worst_late_s=0.0012)
    assert "30 stalls a minute" in verdict(some)
    bad = dict(base, stalls=5, stalls_per_minute=30.0, skipped=4, worst_late_s=0.012)
    assert verdict(bad).startswith("unfit") and "24 block deadlines a minute" in verdict(bad)
    assert "real-time priority" in verdict(dict(base, realtime=False))


def test_play_stop_line_names_the_xrun_causes():
    from sheafsynth.host.live.report import xrun_summary

    assert xrun_summary({"xruns": 0, "callbacks_blocked": 0}) == "0 xruns"
    machine = {"xruns_explained": 3, "xruns_preempted": 1, "xruns_slow_callback": 0, "xruns_elsewhere": 1}
    assert xrun_summary({"xruns": 5, "machine": machine, "callbacks_blocked": 0}) == (
        "5 xruns (4 the machine's, 0 after slow callbacks, 1 elsewhere)")
    assert "BLOCKED in 2 callbacks" in xrun_summary({"xruns": 1, "callbacks_blocked": 2})

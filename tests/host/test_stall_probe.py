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

from host.idle_latency import ShallowIdle
from host.runtime import HostRuntime
from host.stall_probe import Stall, StallProbe, explain_xruns, xrun_causes

REPO = Path(__file__).resolve().parents[2]
PA_OUTPUT_UNDERFLOW = 0x4      # PortAudio v19 portaudio.h: paOutputUnderflow


def test_probe_counts_every_wake_on_every_cpu():
    period = 0.002
    with StallProbe(period) as probe:
        time.sleep(0.5)
        r = probe.read()
        stalls = probe.stalls()
    cpus = len(os.sched_getaffinity(0))
    assert r.cpus == cpus
    assert r.wakes > 0 and sum(r.hist) == r.wakes
    assert r.stalls == len(stalls) or len(stalls) == 4096 * cpus
    assert all(s.late_ns > r.stall_threshold_s * 1e9 for s in stalls)
    assert r.worst_late_s >= max((s.late_ns * 1e-9 for s in stalls), default=0.0)
    assert r.stall_threshold_s == pytest.approx(0.25 * period)
    # every CPU's deadlines lie on one grid of whole periods of CLOCK_MONOTONIC
    p_ns = int(round(period * 1e9))
    assert all(s.deadline_ns % p_ns == 0 for s in stalls)
    assert {s.cpu for s in stalls} <= set(os.sched_getaffinity(0))


def test_probe_rejects_bad_arguments():
    with pytest.raises(ValueError, match="period"):
        StallProbe(5.0)
    with pytest.raises(ValueError, match="priority"):
        StallProbe(0.003, priority=0)
    with pytest.raises(ValueError, match="fraction"):
        StallProbe(0.003, stall_fraction=0.0)


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
            (int(300.0e6), int(1.8e6)),      # 0.9 of the period: ours
            (int(600.0e6), int(1.2e6))]      # 0.6 of the period: cannot make a cycle miss by itself
    xr = [int(x * 1e6) for x in (104.0, 305.0, 606.0, 900.0)]
    assert xrun_causes(xr, stalls, slow, period) == [
        "machine stall", "slow callback", "elsewhere in the graph", "elsewhere in the graph"]


def test_runtime_logs_slow_callbacks():
    """Callbacks over half the period are logged with their start and duration."""
    from engine.instrument import Instrument

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
    assert all(d > 0.5 * 128 / 4_800_000 * 1e9 for _, d in slow)
    assert [a for a, _ in slow] == sorted(a for a, _ in slow)


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
    return subprocess.run([sys.executable, "-m", "host.cli", *args], cwd=REPO, capture_output=True,
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
    from host.jitter_cmd import _verdict

    base = dict(period_s=128 / 48000, seconds=10.0, realtime=True, stalls=0, skipped=0,
                stalls_per_minute=0.0, worst_late_s=0.0001)
    assert _verdict(base).startswith("fit")
    some = dict(base, stalls=5, stalls_per_minute=30.0, worst_late_s=0.0012)
    assert "30 stalls a minute" in _verdict(some)
    bad = dict(base, stalls=5, stalls_per_minute=30.0, skipped=4, worst_late_s=0.012)
    assert _verdict(bad).startswith("unfit") and "24 block deadlines a minute" in _verdict(bad)
    assert "real-time priority" in _verdict(dict(base, realtime=False))

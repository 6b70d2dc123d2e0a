"""Deterministic tests of the C live runtime, driven by hand (no device).

ss_host_process is called with synthetic CLOCK_MONOTONIC times, so event
placement, kernel switching, guards and rings are checked exactly.
"""

import numpy as np
import pytest

from sheafsynth.engine.errors import AudioError
from sheafsynth.engine.ir.voicing import EV_NOTE_OFF, EV_NOTE_ON, EV_PARAM, EV_RELEASE_ALL
from sheafsynth.host.live import runtime as rtmod
from sheafsynth.host.live.runtime import HostRuntime, KernelSwitchError

RATE = 48000
BLOCK = 128
PERIOD_NS = BLOCK * 1_000_000_000 // RATE  # 2_666_666 ns
T0 = 10_000_000_000  # an arbitrary CLOCK_MONOTONIC origin, ns


def echoes(state):
    n = state.n_echo
    return [(state.echo_block[i], state.echo_offset[i], state.echo_type[i], state.echo_a[i])
            for i in range(n)]


@pytest.fixture
def rt():
    return HostRuntime(RATE, BLOCK, 2, event_capacity=64, record_seconds=0.1)


def test_runtime_compiles_strictly():
    mod = rtmod.load_runtime(strict=True)
    assert mod.lib.SS_HOST_HIST_BINS > 0


def test_silence_without_kernel_and_counters(rt):
    out = rt.process(BLOCK, T0)
    assert out.shape == (BLOCK, 2) and not out.any()
    c = rt.counters()
    assert (c.callbacks, c.frames, c.generation, c.retired) == (1, BLOCK, 0, 0)
    assert sum(c.hist) == 1
    assert 0 < c.load_percentile(99.9) <= 2.0


def test_mono_kernel_is_copied_to_every_channel(rt, make_kernel):
    render, state = make_kernel(RATE, 1000.0, amp=0.5)
    gen = rt.set_kernel(render, state)
    assert gen == 1
    out = rt.process(BLOCK, T0)
    assert np.array_equal(out[:, 0], out[:, 1])
    expected = 0.5 * np.sin(2 * np.pi * 1000.0 * np.arange(BLOCK) / RATE)
    np.testing.assert_allclose(out[:, 0], expected, atol=1e-5)
    c = rt.counters()
    assert c.generation == 1 and c.switches == 1
    assert c.peak == pytest.approx(np.abs(expected).max(), abs=1e-5)


def test_event_offset_is_stamp_relative_to_previous_block(rt, make_kernel):
    render, state = make_kernel(RATE, 100.0)
    rt.set_kernel(render, state)
    rt.process(BLOCK, T0)                      # block 0 starts at T0
    stamp = T0 + 1_000_000                     # 1 ms after block 0 began
    rt.push_at(stamp, EV_NOTE_ON, 60, 100)
    rt.process(BLOCK, T0 + PERIOD_NS)          # block 1 delivers it
    # 1 ms at 48 kHz = 48 samples: common practice (no source)
    assert echoes(state) == [(1, 48, EV_NOTE_ON, 60)]
    c = rt.counters()
    assert (c.events_pushed, c.events_delivered, c.events_late) == (1, 1, 0)


def test_event_stamped_during_callback_waits_for_next_block(rt, make_kernel):
    render, state = make_kernel(RATE, 100.0)
    rt.set_kernel(render, state)
    rt.process(BLOCK, T0)
    rt.push_at(T0 + PERIOD_NS + 10, EV_NOTE_ON, 61, 100)  # after block 1 began
    rt.process(BLOCK, T0 + PERIOD_NS)
    assert echoes(state) == []
    rt.process(BLOCK, T0 + 2 * PERIOD_NS)
    assert echoes(state) == [(2, 0, EV_NOTE_ON, 61)]


def test_late_event_goes_to_offset_zero_and_is_counted(rt, make_kernel):
    render, state = make_kernel(RATE, 100.0)
    rt.set_kernel(render, state)
    rt.process(BLOCK, T0)
    rt.push_at(T0 - 5 * PERIOD_NS, EV_NOTE_OFF, 62)
    rt.process(BLOCK, T0 + PERIOD_NS)
    assert echoes(state) == [(1, 0, EV_NOTE_OFF, 62)]
    assert rt.counters().events_late == 1


def test_offsets_clamped_and_sorted(rt, make_kernel):
    render, state = make_kernel(RATE, 100.0)
    rt.set_kernel(render, state)
    rt.process(BLOCK, T0)
    # a callback that comes late: the gap is 3 periods, stamps spread over it
    rt.push_at(T0 + 2 * PERIOD_NS, EV_NOTE_ON, 1, 1)   # beyond the block: clamped
    rt.push_at(T0 + 500_000, EV_NOTE_ON, 2, 1)          # pushed later, earlier stamp
    rt.process(BLOCK, T0 + 3 * PERIOD_NS)
    got = echoes(state)
    assert [(o, a) for _, o, _, a in got] == [(24, 2), (BLOCK - 1, 1)]


def test_long_device_block_is_split_and_offsets_rebased(make_kernel):
    rt = HostRuntime(RATE, 64, 1)
    render, state = make_kernel(RATE, 100.0)
    rt.set_kernel(render, state)
    frames = 256
    period = frames * 1_000_000_000 // RATE
    rt.process(frames, T0)
    for off in (10, 70, 200):
        rt.push_at(T0 + off * 1_000_000_000 // RATE + 1000, EV_PARAM, off, 0, 0.5)
    out = rt.process(frames, T0 + period)
    assert out.shape == (frames, 1)
    # kernel block 4 = chunk 0 of the second callback, etc.
    assert [(b, o, a) for b, o, _, a in echoes(state)] == [(4, 10, 10), (5, 6, 70), (7, 8, 200)]
    assert all(state.render_frames[i] == 64 for i in range(8))


def test_event_ring_full_drops_and_counts(make_kernel):
    rt = HostRuntime(RATE, BLOCK, 1, event_capacity=4)
    results = [rt.push_at(T0, EV_NOTE_ON, i, 1) for i in range(6)]
    assert [r is not None for r in results] == [True] * 4 + [False] * 2
    c = rt.counters()
    assert (c.events_pushed, c.events_dropped) == (4, 2)


def test_events_without_kernel_are_unrouted(rt):
    rt.process(BLOCK, T0)
    rt.push_at(T0 + 1000, EV_NOTE_ON, 60, 1)
    rt.process(BLOCK, T0 + PERIOD_NS)
    assert rt.counters().events_unrouted == 1


def test_switch_fades_old_kernel_without_gap(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0, amp=0.4, release_mul=0.99)
    rb, sb = make_kernel(RATE, 660.0, amp=0.4)
    ga = rt.set_kernel(ra, sa)
    rt.process(BLOCK, T0)
    gb = rt.set_kernel(rb, sb)
    assert gb == ga + 1
    t = T0
    outs = []
    for _ in range(40):
        t += PERIOD_NS
        outs.append(rt.process(BLOCK, t)[:, 0])
        if not rt.counters().fading_active:
            break
    # the fading kernel got exactly one release, at the first switched block
    assert [(b, o, ty) for b, o, ty, _ in echoes(sa)] == [(1, 0, EV_RELEASE_ALL)]
    assert echoes(sb) == []
    first = outs[0]
    ea = 0.4 * np.sin(2 * np.pi * 440.0 * np.arange(BLOCK, 2 * BLOCK) / RATE) * 0.99 ** np.arange(1, BLOCK + 1)
    eb = 0.4 * np.sin(2 * np.pi * 660.0 * np.arange(BLOCK) / RATE)
    np.testing.assert_allclose(first, ea + eb, atol=1e-4)
    c = rt.counters()
    assert not c.fading_active and c.retired == ga and c.generation == gb
    assert sa.counters.voices_active == 0
    blocks_a = sa.counters.blocks
    rt.process(BLOCK, t + PERIOD_NS)
    assert sa.counters.blocks == blocks_a, "a retired kernel must not be rendered"


def test_fading_kernel_that_never_stops_is_ramped_out_after_timeout(rt, make_kernel):
    rt.set_fade(timeout_s=0.01, ramp_s=0.002)  # 480 frames, then a 96-frame ramp
    ra, sa = make_kernel(RATE, 440.0, amp=0.4, ignore_release=1)
    rb, sb = make_kernel(RATE, 660.0, amp=0.0)
    rt.set_kernel(ra, sa)
    rt.process(BLOCK, T0)
    rt.set_kernel(rb, sb)
    outs = [rt.process(BLOCK, T0 + (i + 1) * PERIOD_NS)[:, 0] for i in range(8)]
    c = rt.counters()
    assert c.fade_timeouts == 1 and not c.fading_active
    y = np.concatenate(outs)
    # timeout after 4 blocks (512 >= 480 frames), ramp over the next 96 frames
    assert np.abs(y[512:512 + 96]).max() <= 0.4
    assert np.abs(np.diff(y[:700])).max() < 0.1, "ramp must not click"
    assert not y[640:].any()


def test_third_switch_while_fading_ramps_quickly_then_takes(rt, make_kernel):
    rt.set_fade(timeout_s=10.0, ramp_s=0.001)
    ra, sa = make_kernel(RATE, 440.0, ignore_release=1)
    rb, sb = make_kernel(RATE, 550.0)
    rc, sc = make_kernel(RATE, 660.0)
    rt.set_kernel(ra, sa)
    rt.process(BLOCK, T0)
    rt.set_kernel(rb, sb)
    rt.process(BLOCK, T0 + PERIOD_NS)
    rt.lib.ss_host_set_kernel(rt._ptr, int(rt.ffi.cast("uintptr_t", rc)),
                              int(rt.ffi.cast("uintptr_t", sc)))
    for i in range(2, 6):
        rt.process(BLOCK, T0 + i * PERIOD_NS)
    c = rt.counters()
    assert c.generation == 3 and c.switches == 3
    assert c.retired >= 1


def test_switch_busy_until_taken(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0)
    rb, sb = make_kernel(RATE, 660.0)
    rt.set_kernel(ra, sa)
    with pytest.raises(KernelSwitchError, match="not taken"):
        rt.set_kernel(rb, sb, wait_s=0.01)
    rt.process(BLOCK, T0)
    assert rt.set_kernel(rb, sb, wait_s=0.01) == 2


def test_keepalive_released_after_retire(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0, release_mul=0.5)
    rb, sb = make_kernel(RATE, 660.0)
    keep = object()
    rt.set_kernel(ra, sa, keep=keep)
    rt.process(BLOCK, T0)
    rt.set_kernel(rb, sb)
    assert 1 in rt._keep
    rt.process(BLOCK, T0 + PERIOD_NS)
    rt.collect()
    assert 1 not in rt._keep and 2 in rt._keep


def test_remove_kernel_fades_to_silence(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0, release_mul=0.9)
    rt.set_kernel(ra, sa)
    rt.process(BLOCK, T0)
    rt.set_kernel(None, None)
    rt.process(BLOCK, T0 + PERIOD_NS)
    out = rt.process(BLOCK, T0 + 2 * PERIOD_NS)
    assert not out.any()
    c = rt.counters()
    assert c.generation == 2 and c.retired == 1


def test_nonfinite_output_is_zeroed_and_counted(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0, emit_nan=1)
    rt.set_kernel(ra, sa)
    out = rt.process(BLOCK, T0)
    assert np.isfinite(out).all() and not out.any()
    assert rt.counters().nonfinite == BLOCK


def test_safety_clip_at_ceiling(rt, make_kernel):
    rt.set_ceiling(0.5)
    ra, sa = make_kernel(RATE, 440.0, amp=2.0)
    rt.set_kernel(ra, sa)
    out = rt.process(BLOCK, T0)
    assert np.abs(out).max() == pytest.approx(0.5)
    c = rt.counters()
    assert c.clipped > 0 and c.peak == pytest.approx(0.5)
    with pytest.raises(AudioError, match="ceiling"):
        rt.set_ceiling(0.0)


def test_c_status_codes_become_audio_errors_that_name_them(rt):
    """Every C status goes through one choke point; the codes are csrc/host_rt.h's #defines."""
    with pytest.raises(AudioError, match=r"rate=0\.0.*bad argument \(SS_HOST_ERR_ARG\)"):
        rt.set_rate(0.0)
    with pytest.raises(AudioError, match="fade.*SS_HOST_ERR_ARG"):
        rt.set_fade(-1.0, 0.01)
    assert rtmod.check_status(rt.lib, 7, "anything") == 7
    with pytest.raises(KernelSwitchError, match="what failed: failed with status -99"):
        rtmod.check_status(rt.lib, -99, "what failed", KernelSwitchError)


def test_kernel_error_gives_silence_and_is_counted(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0, fail=1)
    rt.set_kernel(ra, sa)
    assert not rt.process(BLOCK, T0).any()
    assert rt.counters().kernel_errors == 1


def test_record_ring_copies_output_and_counts_drops(make_kernel):
    rt = HostRuntime(RATE, BLOCK, 2, record_seconds=1024 / RATE)  # 1024 frames
    ra, sa = make_kernel(RATE, 440.0)
    rt.set_kernel(ra, sa)
    rt.set_recording(True)
    outs = [rt.process(BLOCK, T0 + i * PERIOD_NS) for i in range(4)]
    rec = rt.read_record()
    np.testing.assert_array_equal(rec, np.concatenate(outs))
    for i in range(10):
        rt.process(BLOCK, T0 + (4 + i) * PERIOD_NS)
    c = rt.counters()
    assert c.record_frames == 4 * BLOCK + 1024 and c.record_dropped == 10 * BLOCK - 1024
    rt.set_recording(False)
    rt.process(BLOCK, T0 + 20 * PERIOD_NS)
    assert rt.counters().record_frames == 4 * BLOCK + 1024


def test_status_flags_counted_as_xruns(rt):
    rt.process(BLOCK, T0, flags=0x4)  # paOutputUnderflow in PortAudio's header
    rt.process(BLOCK, T0 + PERIOD_NS, flags=0x8)  # paOutputOverflow
    c = rt.counters()
    assert (c.underflows, c.overflows, c.xruns) == (1, 1, 2)


def test_peak_hold_and_reset(rt, make_kernel):
    ra, sa = make_kernel(RATE, 440.0, amp=0.3)
    rt.set_kernel(ra, sa)
    rt.process(BLOCK, T0)
    assert rt.counters().peak_hold == pytest.approx(0.3, abs=1e-3)
    sa.amp = 0.1
    rt.reset_peak()
    rt.process(BLOCK, T0 + PERIOD_NS)
    assert rt.counters().peak_hold == pytest.approx(0.1, abs=1e-3)


@pytest.mark.parametrize("kwargs, word", [
    ({"channels": 0}, "channels"),
    ({"channels": 9}, "channels"),
    ({"max_block": 0}, "max_block"),
    ({"rate": -1}, "rate"),
    ({"record_seconds": 0}, "record_seconds"),
])
def test_bad_arguments_are_audio_errors(kwargs, word):
    args = {"rate": RATE, "max_block": BLOCK, "channels": 2}
    args.update(kwargs)
    with pytest.raises(AudioError, match=word):
        HostRuntime(args.pop("rate"), args.pop("max_block"), args.pop("channels"), **args)


def test_load_percentile():
    c = HostRuntime(RATE, BLOCK, 1).counters()
    hist = [0] * 512
    hist[10] = 999
    hist[100] = 1
    c2 = type(c)(**{**c.__dict__, "hist": tuple(hist)})
    assert c2.load_percentile(99.9) == pytest.approx(11 * c.hist_bin_width)
    assert c2.load_percentile(100) == pytest.approx(101 * c.hist_bin_width)
    with pytest.raises(ValueError):
        c2.load_percentile(101)

"""Live tests: the C callback runs on a real PortAudio stream on JACK's dummy backend.

These need jackd (the jack_server fixture starts one when none runs) and
PortAudio built with JACK support; .ci/run installs both.
"""

import threading
import time

import numpy as np
import pytest
import soundfile

from sheafsynth.engine.errors import AudioError
from sheafsynth.engine.ir.voicing import EV_PARAM, EV_RELEASE_ALL
from sheafsynth.host.live.audio import AudioOutput, list_audio_devices

pytestmark = pytest.mark.live

BLOCK = 128


def _peak_frequency(x, rate):
    spec = np.abs(np.fft.rfft(x * np.hanning(len(x))))
    k = int(np.argmax(spec[1:])) + 1
    # parabolic interpolation of the peak bin
    a, b, c = np.log(spec[k - 1:k + 2] + 1e-30)
    k += 0.5 * (a - c) / (a - 2 * b + c)
    return k * rate / len(x)


def _longest_zero_run(x):
    zero = np.concatenate([[False], x == 0.0, [False]])
    edges = np.flatnonzero(np.diff(zero.astype(np.int8)))
    runs = edges[1::2] - edges[::2]
    return int(runs.max()) if len(runs) else 0


@pytest.fixture
def output(jack_device):
    out = AudioOutput(device=jack_device.index, rate=jack_device.default_samplerate,
                      blocksize=BLOCK, channels=2)
    out.open()
    yield out
    out.close()


def test_list_audio_devices_shows_jack(jack_device):
    devs = list_audio_devices()
    assert any(d.index == jack_device.index and d.max_output_channels >= 1 for d in devs)


def test_sine_kernel_plays_and_records(output, make_kernel, tmp_path):
    rate = output.rate
    render, state = make_kernel(rate, 1000.0, amp=0.5)
    output.set_kernel(render, state)
    path = tmp_path / "sine.wav"
    before = output.counters()
    output.start_recording(path)
    time.sleep(2.0)
    written = output.stop_recording()
    c = output.counters()

    x, file_rate = soundfile.read(str(path), dtype="float32")
    assert file_rate == rate and x.shape == (written, 2)
    assert np.array_equal(x[:, 0], x[:, 1])
    # the recording holds what the callbacks rendered, never more (counted by
    # the device's own callbacks, not by a wall clock)
    assert BLOCK <= written <= (c.callbacks - before.callbacks) * BLOCK
    assert c.callbacks > before.callbacks > 0
    assert c.record_dropped == 0 and c.nonfinite == 0 and c.kernel_errors == 0
    assert c.record_frames - before.record_frames == written
    assert _peak_frequency(x[:, 0].astype(np.float64), rate) == pytest.approx(1000.0, abs=1.0)
    assert np.abs(x).max() == pytest.approx(0.5, abs=1e-3)
    assert c.cb_worst_ns > 0 and 0 < c.load_percentile(99.9) <= 2.0
    assert state.counters.blocks > 0


def test_events_arrive_at_expected_block_and_offset(output, make_kernel):
    rate = output.rate
    render, state = make_kernel(rate, 200.0, amp=0.1)
    output.set_kernel(render, state)
    time.sleep(0.05)
    stamps = {}

    def midi_thread():  # the only producer
        for i in range(60):
            s = output.push(EV_PARAM, i, 0, float(i))
            assert s is not None
            stamps[i] = s
            time.sleep(0.0037 + 0.0011 * (i % 3))

    th = threading.Thread(target=midi_thread)
    th.start()
    th.join()
    deadline = time.monotonic() + 2.0
    while state.n_echo < 60 and time.monotonic() < deadline:
        time.sleep(0.01)
    assert state.n_echo == 60, "every pushed event reaches the kernel"
    c = output.counters()
    assert c.events_pushed >= 60 and c.events_dropped == 0

    period_ns = BLOCK * 1e9 / rate

    def stalled(block: int) -> bool:
        """A machine stall near ``block``: a callback gap over 1.5 periods, or the
        back-to-back catch-up after one (JACK keeps frame time, so an event then
        lands by frames, later by the wall clock)."""
        for b in range(max(1, block - 3), block + 1):
            gap = state.render_ns[b] - state.render_ns[b - 1]
            if gap > 1.5 * period_ns or gap < 0.5 * period_ns:
                return True
        return False

    close = 0
    stalls = 0
    for k in range(60):
        i = state.echo_a[k]
        block, offset = state.echo_block[k], state.echo_offset[k]
        s = stamps[i]
        assert state.echo_type[k] == EV_PARAM and state.echo_value[k] == float(i)
        assert 0 <= offset < BLOCK
        # delivered by the first block that started after the stamp
        assert state.render_ns[block] > s
        if stalled(block):
            stalls += 1
            continue
        t_prev = state.render_ns[block - 1]
        if s >= t_prev:
            # offset = (stamp - previous block start) * rate, within a few
            # samples of jitter between the callback start and the render call
            expected = min((s - t_prev) * rate / 1e9, BLOCK - 1)
            if abs(offset - expected) <= 3:
                close += 1
        assert s >= t_prev - 2 * period_ns, "an event waited more than one block"
    assert stalls <= 20, f"{stalls} of 60 events met a machine stall: too few left to judge"
    assert close >= 50 - stalls, f"only {close}/{60 - stalls} events (outside stalls) within 3 samples of the expected offset"


def test_switch_between_kernels_leaves_no_gap(output, make_kernel, tmp_path):
    rate = output.rate
    ra, sa = make_kernel(rate, 440.0, amp=0.4, release_mul=0.9995)
    rb, sb = make_kernel(rate, 660.0, amp=0.4)
    ga = output.set_kernel(ra, sa)
    time.sleep(0.05)
    path = tmp_path / "switch.wav"
    output.start_recording(path)
    time.sleep(0.6)
    gb = output.set_kernel(rb, sb)
    time.sleep(1.2)
    output.stop_recording()
    c = output.counters()

    x, _ = soundfile.read(str(path), dtype="float32")
    y = x[:, 0]
    assert _longest_zero_run(y) <= 4, "the output must not drop out during the switch"
    assert c.generation == gb and c.retired >= ga and not c.fading_active
    assert c.switches >= 2 and c.fade_timeouts == 0
    assert [sa.echo_type[k] for k in range(sa.n_echo)] == [EV_RELEASE_ALL]
    assert sb.n_echo == 0
    n = len(y)
    head = y[: int(0.4 * rate)].astype(np.float64)
    tail = y[n - int(0.5 * rate):].astype(np.float64)
    assert _peak_frequency(head, rate) == pytest.approx(440.0, abs=2.0)
    assert _peak_frequency(tail, rate) == pytest.approx(660.0, abs=2.0)
    assert np.abs(y).max() <= 0.9661 and c.nonfinite == 0


def test_bad_device_is_audio_error(jack_server):
    out = AudioOutput(device=10_000, rate=48000, blocksize=BLOCK)
    with pytest.raises(AudioError, match="cannot open audio output"):
        out.open()
    assert not out.is_open

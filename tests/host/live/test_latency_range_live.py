"""Live ``play`` on JACK's dummy backend: out-of-range notes are ignored and counted, and the
report states the key-to-sound latency.

porch-pluck declares notes 28-100.  A note-on of 110 must give no sound and
appear in the report's "notes_out_of_range"; a note-on of 69 after it must
sound.  The report's "latency_ms" holds the event delay (one block:
csrc/host_rt.c places an event one block after it arrives), the output
latency PortAudio reports for the opened stream (Pa_GetStreamInfo
outputLatency) and their sum.
"""

from __future__ import annotations

import bisect

import numpy as np
import pytest

from tests.live import LIVE_BLOCK, LIVE_RATE, PlayProcess, send_timeline

pytestmark = pytest.mark.live

OUTSIDE, INSIDE = 110, 69          # porch-pluck plays 28-100


def frame_of(rep: dict, stamp_ns: int) -> float:
    """Recording frame of a CLOCK_MONOTONIC stamp, through the report's (frame, callback start ns) anchors."""
    anchors = rep["timing"]["anchors"]
    assert len(anchors) > 10, "the report has too few timing anchors"
    ns = [a[1] for a in anchors]
    i = max(0, bisect.bisect_right(ns, stamp_ns) - 1)
    return anchors[i][0] + (stamp_ns - anchors[i][1]) * LIVE_RATE / 1e9


def stamp_of(rep: dict, data: list[int]) -> int:
    """Arrival stamp (ns) of the first received message with these bytes."""
    for stamp, got in rep["timing"]["midi"]:
        if got == data:
            return int(stamp)
    raise AssertionError(f"message {data} was not received")


def test_out_of_range_note_is_silent_and_counted_and_latency_is_reported(jack_server, tmp_path):
    play = PlayProcess(tmp_path, "porch-pluck", 3.5, virtual="sstest-range")
    play.wait_ready()
    send_timeline("sstest-range", [(0.3, [0x90, OUTSIDE, 100]), (0.8, [0x80, OUTSIDE, 0]),
                                   (1.3, [0x90, INSIDE, 100]), (1.8, [0x80, INSIDE, 0])],
                  client="sstest-range-send")
    assert play.wait() == 0, play.log()
    rep, x = play.results()

    assert rep["midi"]["received"] == 4, play.log()
    assert rep["notes_out_of_range"] == 1 and rep["notes_out_of_range_which"] == [OUTSIDE]
    f_out = int(frame_of(rep, stamp_of(rep, [0x90, OUTSIDE, 100])))
    f_in = int(frame_of(rep, stamp_of(rep, [0x90, INSIDE, 100])))
    assert f_in - f_out > 0.5 * LIVE_RATE
    assert np.all(x[:f_in] == 0.0), "something sounded before the in-range note"
    assert np.max(np.abs(x[f_in:f_in + LIVE_RATE // 2])) > 1e-3, "the in-range note did not sound"

    lat = rep["latency_ms"]
    assert lat["event_delay_ms"] == pytest.approx(1000.0 * LIVE_BLOCK / LIVE_RATE)   # one block
    assert lat["output_ms"] is not None and lat["output_ms"] >= 0.0
    assert lat["key_to_sound_ms"] == pytest.approx(lat["event_delay_ms"] + lat["output_ms"])
    started = next(line for line in play.out if line.startswith("playing "))
    assert f"key to sound {lat['key_to_sound_ms']:.1f} ms" in started, started

"""MIDI input plumbing without a MIDI system: parsing, arrival stamps, port
watching and reconnecting (a fake backend), status line, play options."""

import math

import mido
import pytest

from sheafsynth.engine.errors import InputError
from sheafsynth.host.live.midi import ArrivalClock, MidiInputBase, find_port, parse
from sheafsynth.host.live.options import PlayOptions
from sheafsynth.host.live.status import StatusInfo, dbfs, format_status


# ---------------------------------------------------------------- parsing

def test_parse_agrees_with_mido():
    """Byte layouts per the MIDI 1.0 Detailed Specification; mido as reference library."""
    for msg in (mido.Message("note_on", channel=3, note=60, velocity=7),
                mido.Message("control_change", control=74, value=127),
                mido.Message("pitchwheel", pitch=-8192),
                mido.Message("program_change", program=9),
                mido.Message("sysex", data=[0x7D, 1, 2])):
        assert parse(msg.bytes()) == msg


@pytest.mark.parametrize("data", [[0x90, 60], [0x45], [0xB0, 74, 200], [], [0xE0, 1, 2, 3], [0xF0, 1, 2]])
def test_parse_rejects_malformed(data):
    assert parse(data) is None


# ---------------------------------------------------------------- arrival stamps

def test_arrival_clock_follows_gaps_and_never_runs_ahead():
    c = ArrivalClock()
    assert c.stamp(0.0, 1_000_000) == 1_000_000            # first message: picked up = arrived
    # picked up late (at 5 ms) but it came 1 ms after the first: 2 ms
    assert c.stamp(0.001, 5_000_000) == 2_000_000
    # a gap that would put it after the pick-up time is capped at the pick-up time
    assert c.stamp(0.010, 6_000_000) == 6_000_000
    # never earlier than the previous arrival
    assert c.stamp(-1.0, 7_000_000) == 7_000_000
    c.reset()
    assert c.stamp(0.5, 9_000_000) == 9_000_000


# ---------------------------------------------------------------- port watching

class FakeInput(MidiInputBase):
    """A backend over a list of source names and a message queue."""

    def __init__(self, sources, **kw):
        self.sources = sources
        self.queue = []
        self.connected = None
        self.now = 0
        super().__init__(clock=lambda: self.now, **kw)

    def _sources(self):
        return list(self.sources)

    def _open_virtual(self, name):
        self.connected = ("virtual", name)

    def _connect(self, index, name):
        self.connected = name
        self.port_name = name

    def _disconnect(self):
        self.connected = None

    def _read(self):
        return self.queue.pop(0) if self.queue else None

    def _close(self):
        self.connected = None


def test_find_port_is_a_case_insensitive_substring():
    names = ["Midi Through:Midi Through Port-0 14:0", "Porch Keys 25:Porch Keys MIDI 1 20:0"]
    assert find_port(names, "porch keys") == 1
    assert find_port(names, "nothing") is None


def test_unknown_port_name_lists_the_inputs():
    with pytest.raises(InputError, match="Keys A"):
        FakeInput(["Keys A", "Pads B"], name="zzz").open()


def test_port_lost_and_back():
    inp = FakeInput(["client:Keys A"], name="keys a").open()
    assert inp.state == "connected" and inp.connected == "client:Keys A"
    inp.sources.clear()
    assert inp.check() == "lost" and inp.connected is None
    assert "LOST" in inp.description
    assert inp.check() == "lost"
    inp.sources.append("client:Keys A")
    assert inp.check() == "connected" and inp.reconnects == 1 and inp.lost_count == 1


def test_virtual_port_never_gets_lost():
    inp = FakeInput([], virtual="sheafsynth in").open()
    assert inp.state == "virtual" and inp.check() == "virtual"


def test_poll_stamps_each_message():
    inp = FakeInput(["x"], name="x").open()
    inp.now = 10_000_000
    inp.queue = [([0x90, 60, 1], 0.0), ([0x80, 60, 0], 0.002)]
    got = inp.poll()
    assert got == [([0x90, 60, 1], 10_000_000), ([0x80, 60, 0], 10_000_000)]
    inp.queue = [([0x90, 61, 1], 0.001)]
    inp.now = 20_000_000
    assert inp.poll() == [([0x90, 61, 1], 11_000_000)]


def test_an_input_needs_exactly_one_kind():
    with pytest.raises(InputError):
        FakeInput([], name="a", virtual="b")
    with pytest.raises(InputError):
        FakeInput([])


# ---------------------------------------------------------------- status line

def test_dbfs():
    assert dbfs(1.0) == 0.0
    assert dbfs(0.5) == pytest.approx(-6.0206, abs=1e-4)
    assert dbfs(0.0) == -math.inf


def test_status_line_shows_what_a_player_needs():
    line = format_status(StatusInfo(preset="porch-pluck", program=2, voices=3, polyphony=16,
                                    load=0.125, load_p999=0.3, xruns=1, peak=0.5,
                                    last_control="decay = 0.997 gain per pass",
                                    midi="virtual port 'x'", learn="tone"))
    for part in ("#2 porch-pluck", "voices  3/16", "DSP  12%", "xruns 1", "-6.0 dBFS",
                 "decay = 0.997 gain per pass", "virtual port", "LEARN tone"):
        assert part in line
    quiet = format_status(StatusInfo("p", None, 0, 4, float("nan"), float("nan"), 0, 0.0, "", "closed"))
    assert "-inf dBFS" in quiet


# ---------------------------------------------------------------- options

@pytest.mark.parametrize("kw, needle", [
    ({"buffer": 8}, "--buffer"), ({"channel": 0}, "--channel"), ({"rate": 1000}, "--rate"),
    ({"seconds": -1}, "--seconds"), ({"record": "out.mp3"}, "--record"),
    ({"midi_in": "a", "virtual_midi": "b"}, "choose one"),
    ({"save_as": "porch-pluck"}, "factory"), ({"save_as": "bad/name"}, "--save-as"),
    ({"report": "/no/such/dir/r.json"}, "--report"),
])
def test_play_options_name_the_bad_one(kw, needle):
    with pytest.raises(InputError, match=needle):
        PlayOptions(preset="porch-pluck", **kw).check()

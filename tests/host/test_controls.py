"""MidiTranslator: MIDI messages -> kernel events, without audio.

Message meanings are checked against the MIDI 1.0 Detailed Specification
(MMA): CC 64 sustain (>= 64 down), CC 120 all sound off, CC 121 reset all
controllers, CC 123 all notes off (124-127 also end all notes), pitch bend
14-bit centred on 8192 with the range set by RPN 0/0 (data entry MSB =
semitones, LSB = cents; General MIDI default +-2 semitones).  Messages are
built with mido (the reference library for MIDI bytes).
"""

import copy
import math

import mido
import pytest

from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.preset import ControlSpec, load_preset, parse_preset
from sheafsynth.host.controls import CURVES, MidiTranslator, curve_value
from sheafsynth.host.live.programs import controls_doc

from sheafsynth.engine.locations import FACTORY_DIR


def M(*args, **kw):
    return mido.Message(*args, **kw)


def make(name="lantern-harp", doc_edit=None, **kw):
    preset = load_preset(FACTORY_DIR / f"{name}.json")
    if doc_edit is not None:
        raw = copy.deepcopy(preset.raw)
        doc_edit(raw)
        preset = parse_preset(raw)
    return MidiTranslator(preset, lower(preset).param_index, **kw)


def params_of(events):
    return [(e[2], e[4]) for e in events if e[1] == V.EV_PARAM]


# ---------------------------------------------------------------- curves

def test_curves_are_a_table_with_exact_ends():
    assert set(CURVES) == {"linear", "exp"}
    lin = ControlSpec("cc", 1, "p", "linear", 0.2, 0.8)
    ex = ControlSpec("cc", 1, "p", "exp", 0.01, 1.0)
    assert curve_value(lin, 0.0) == pytest.approx(0.2) and curve_value(lin, 1.0) == pytest.approx(0.8)
    assert curve_value(lin, 0.5) == pytest.approx(0.5)
    assert curve_value(ex, 0.0) == pytest.approx(0.01) and curve_value(ex, 1.0) == pytest.approx(1.0)
    # exponential: equal knob steps are equal ratios; the middle is the geometric mean
    assert curve_value(ex, 0.5) == pytest.approx(math.sqrt(0.01 * 1.0))
    assert curve_value(ex, 0.25) / curve_value(ex, 0.0) == pytest.approx(curve_value(ex, 1.0) / curve_value(ex, 0.75))
    # out-of-range knob positions are clamped
    assert curve_value(lin, -1) == pytest.approx(0.2) and curve_value(lin, 2) == pytest.approx(0.8)


def test_mapped_cc_moves_its_parameter_over_its_range():
    tr = make()
    tone = tr.preset.parameters["tone"]
    idx = tr.param_index["tone"]
    assert params_of(tr.translate(M("control_change", control=74, value=0))) == [(idx, pytest.approx(tone.lo))]
    assert params_of(tr.translate(M("control_change", control=74, value=127))) == [(idx, pytest.approx(tone.hi))]
    (i, v), = params_of(tr.translate(M("control_change", control=1, value=64)))   # decay, exp curve
    d = tr.preset.parameters["decay"]
    assert i == tr.param_index["decay"] and v == pytest.approx(d.lo * (d.hi / d.lo) ** (64 / 127))
    assert "tone" in tr.counters.last_control or "decay" in tr.counters.last_control
    assert "gain per pass" in tr.counters.last_control      # the parameter's own unit


# ---------------------------------------------------------------- bend and RPN

def test_pitch_bend_default_range_two_semitones():
    """General MIDI default bend range +-2 semitones; centre 8192 is no bend."""
    tr = make()
    bend = lambda p: [e[4] for e in tr.translate(M("pitchwheel", pitch=p)) if e[1] == V.EV_BEND][0]
    assert bend(0) == 0.0
    assert bend(8191) == pytest.approx(2.0)        # full up (16383 on the wire)
    assert bend(-8192) == pytest.approx(-2.0)      # full down (0 on the wire)
    assert bend(4096) == pytest.approx(4096 / 8191 * 2.0)


def test_rpn_0_0_sets_bend_range_and_null_rpn_stops_it():
    """RPN 0/0 pitch bend sensitivity: CC 101/100 select, CC 6 = semitones, CC 38 = cents."""
    tr = make()
    for c, v in ((101, 0), (100, 0), (6, 12)):
        assert tr.translate(M("control_change", control=c, value=v)) == []
    assert tr.bend_range == pytest.approx(12.0)
    tr.translate(M("control_change", control=38, value=50))
    assert tr.bend_range == pytest.approx(12.5)
    # a new MSB sets the LSB to zero (MIDI 1.0, 14-bit controllers; from memory)
    tr.translate(M("control_change", control=6, value=7))
    assert tr.bend_range == pytest.approx(7.0)
    (b,) = [e[4] for e in tr.translate(M("pitchwheel", pitch=8191))]
    assert b == pytest.approx(7.0)
    # RPN null (127/127): data entry no longer changes the range
    tr.translate(M("control_change", control=101, value=127))
    tr.translate(M("control_change", control=100, value=127))
    tr.translate(M("control_change", control=6, value=1))
    assert tr.bend_range == pytest.approx(7.0)
    # another RPN (0/1, fine tuning) is not the bend range
    tr.translate(M("control_change", control=101, value=0))
    tr.translate(M("control_change", control=100, value=1))
    tr.translate(M("control_change", control=6, value=3))
    assert tr.bend_range == pytest.approx(7.0)


def test_reset_controllers_centres_bend_lifts_pedal_keeps_range():
    """CC 121: bend centre, sustain off; the RPN selection is nulled, the range kept (RP-015)."""
    tr = make()
    for c, v in ((101, 0), (100, 0), (6, 5)):
        tr.translate(M("control_change", control=c, value=v))
    evs = tr.translate(M("control_change", control=121, value=0))
    assert (V.EV_BEND, 0.0) in [(e[1], e[4]) for e in evs]
    assert (V.EV_SUSTAIN, 0) in [(e[1], e[3]) for e in evs]
    assert tr.bend_range == pytest.approx(5.0)
    tr.translate(M("control_change", control=6, value=9))      # RPN is null now
    assert tr.bend_range == pytest.approx(5.0)


# ---------------------------------------------------------------- pedals and mode messages

@pytest.mark.parametrize("value, down", [(0, 0), (63, 0), (64, 1), (127, 1)])
def test_sustain_threshold_is_64(value, down):
    """CC 64: 0-63 off, 64-127 on (MIDI 1.0 Detailed Specification)."""
    (e,) = make().translate(M("control_change", control=64, value=value))
    assert e[1] == V.EV_SUSTAIN and e[3] == down


@pytest.mark.parametrize("control, kind", [(120, V.EV_ALL_SOUND_OFF), (123, V.EV_ALL_NOTES_OFF),
                                           (124, V.EV_ALL_NOTES_OFF), (125, V.EV_ALL_NOTES_OFF),
                                           (126, V.EV_ALL_NOTES_OFF), (127, V.EV_ALL_NOTES_OFF)])
def test_channel_mode_messages(control, kind):
    """CC 120 all sound off; CC 123 all notes off; omni/mono/poly (124-127) also end all notes."""
    (e,) = make().translate(M("control_change", control=control, value=0))
    assert e[1] == kind


# ---------------------------------------------------------------- notes, channels, unknown messages

def test_notes_and_velocity_zero():
    tr = make()
    (e,) = tr.translate(M("note_on", note=60, velocity=90))
    assert e[1:4] == (V.EV_NOTE_ON, 60, 90)
    (e,) = tr.translate(M("note_off", note=60, velocity=30))
    assert e[1:3] == (V.EV_NOTE_OFF, 60)
    # note-on with velocity 0 is a note-off (MIDI 1.0); the kernel reads b == 0 that way
    (e,) = tr.translate(M("note_on", note=61, velocity=0))
    assert e[1] == V.EV_NOTE_ON and e[3] == 0


def test_channel_filter_and_omni():
    omni = make()
    assert omni.translate(M("note_on", channel=9, note=60, velocity=1))
    only3 = make(channel=2)                   # "channel 3" to a player: 0-based 2 on the wire
    assert only3.translate(M("note_on", channel=0, note=60, velocity=100)) == []
    assert only3.translate(M("control_change", channel=5, control=123, value=0)) == []
    assert only3.translate(M("note_on", channel=2, note=60, velocity=100))
    assert only3.counters.ignored == 2 and only3.counters.received == 3


def test_unknown_messages_are_ignored_and_counted():
    tr = make()
    for msg in (M("polytouch", note=60, value=3), M("sysex", data=[1, 2, 3]),
                M("control_change", control=30, value=5), M("songpos", pos=3)):
        assert tr.translate(msg) == []
    assert tr.counters.ignored == 4


def test_program_change_calls_back():
    got = []
    tr = make(on_program=got.append)
    assert tr.translate(M("program_change", program=5)) == []
    assert got == [5]


def test_velocity_and_pressure_can_be_mapped():
    def edit(raw):
        raw["controls"] += [{"source": "velocity", "parameter": "tone", "min": 0.1, "max": 0.4},
                            {"source": "pressure", "parameter": "decay", "curve": "exp"}]
    tr = make(doc_edit=edit)
    evs = tr.translate(M("note_on", note=60, velocity=127))
    assert params_of(evs) == [(tr.param_index["tone"], pytest.approx(0.4))]
    assert evs[-1][1] == V.EV_NOTE_ON                 # the parameter lands before the note
    (i, v), = params_of(tr.translate(M("aftertouch", value=0)))
    assert i == tr.param_index["decay"] and v == pytest.approx(tr.preset.parameters["decay"].lo)


# ---------------------------------------------------------------- learn

def test_learn_binds_the_next_moved_cc():
    tr = make()
    tr.learn("decay")
    # reserved controllers never get learned
    tr.translate(M("control_change", control=64, value=127))
    assert tr.learn_target == "decay"
    evs = tr.translate(M("control_change", control=21, value=127))
    assert tr.learn_target is None and tr.learned == [(21, "decay")]
    assert params_of(evs) == [(tr.param_index["decay"], pytest.approx(tr.preset.parameters["decay"].hi))]
    # the binding stays
    assert params_of(tr.translate(M("control_change", control=21, value=0))) == [
        (tr.param_index["decay"], pytest.approx(tr.preset.parameters["decay"].lo))]


def test_learn_can_rebind_a_mapped_cc():
    tr = make()
    tr.learn("decay")
    tr.translate(M("control_change", control=74, value=0))      # was "tone"
    assert tr.cc_map[74].spec.parameter == "decay"


def test_learn_unknown_parameter_is_refused():
    with pytest.raises(PresetError, match="brigth"):
        make().learn("brigth")


def test_control_map_saves_as_valid_preset_controls():
    tr = make()
    tr.learn("decay")
    tr.translate(M("control_change", control=21, value=10))
    for c, v in ((101, 0), (100, 0), (6, 4)):
        tr.translate(M("control_change", control=c, value=v))
    doc = copy.deepcopy(tr.preset.raw)
    doc["controls"] = controls_doc(tr)
    back = parse_preset(doc)
    by_cc = {c.cc: c for c in back.controls if c.source == "cc"}
    assert by_cc[21].parameter == "decay" and by_cc[74].parameter == "tone"
    assert by_cc[1].curve == "exp"
    assert [c.range_semitones for c in back.controls if c.source == "pitchbend"] == [4.0]

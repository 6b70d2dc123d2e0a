"""The voice allocator, driven by MIDI through the translator, without audio.

Semantics checked against the MIDI 1.0 Detailed Specification (MMA): a
note-off (or note-on with velocity 0) ends a note; while the sustain pedal
(CC 64 >= 64) is down, ended notes sound on until it comes up; All Notes
Off (CC 123) acts as a note-off for every note, so the pedal still holds
them; All Sound Off (CC 120) silences at once.  Stealing order when every
voice is busy -- oldest released, then oldest sustained, then oldest held
-- is common practice (no source).
"""

import mido
import numpy as np
import pytest

from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.preset import load_preset
from sheafsynth.host.controls import MidiTranslator

POLY = 4
BLOCK = 128


@pytest.fixture(scope="module")
def preset():
    return load_preset(FACTORY_DIR / "porch-pluck.json")


@pytest.fixture
def rig(preset):
    inst = Instrument(preset, rate=48000, max_block=BLOCK, polyphony=POLY)
    tr = MidiTranslator(preset, inst.program.param_index)
    return inst, tr


def send(rig, *msgs, blocks=1):
    """Translate mido messages into the instrument and render some blocks."""
    inst, tr = rig
    for msg in msgs:
        for off, typ, a, b, value in tr.translate(msg):
            if typ == V.EV_NOTE_ON:
                if b == 0:
                    inst.note_off(a, off)
                else:
                    inst.note_on(a, b, off)
            elif typ == V.EV_NOTE_OFF:
                inst.note_off(a, off)
            elif typ == V.EV_PARAM:
                inst.control_index(a, value, off)
            elif typ == V.EV_BEND:
                inst.bend(value, off)
            elif typ == V.EV_SUSTAIN:
                inst.sustain(bool(b), off)
            elif typ == V.EV_ALL_NOTES_OFF:
                inst.all_notes_off(off)
            elif typ == V.EV_ALL_SOUND_OFF:
                inst.all_sound_off(off)
            else:
                raise AssertionError(f"unexpected event type {typ}")
    out = [inst.process(BLOCK).copy() for _ in range(blocks)]
    return np.concatenate(out)


def on(n, v=100):
    return mido.Message("note_on", note=n, velocity=v)


def off(n):
    return mido.Message("note_off", note=n)


def pedal(down):
    return mido.Message("control_change", control=64, value=127 if down else 0)


def notes(inst, status):
    return sorted(n for s, n in inst.voices() if s == status)


def test_free_voices_first_no_stealing(rig):
    inst, _ = rig
    send(rig, on(60), on(62), on(64), on(65))
    assert notes(inst, "held") == [60, 62, 64, 65]
    assert inst.counters["voices_stolen"] == 0 and inst.counters["voices_active"] == POLY


def test_steals_the_oldest_released_voice_first(rig):
    inst, _ = rig
    send(rig, on(60), on(62), on(64), on(65))
    send(rig, off(62))
    send(rig, off(64))
    assert notes(inst, "released") == [62, 64]
    send(rig, on(67), blocks=3)          # a short fade, then the new note
    assert inst.counters["voices_stolen"] == 1
    assert notes(inst, "held") == [60, 65, 67]
    assert notes(inst, "released") == [64]


def test_steals_sustained_before_held(rig):
    inst, _ = rig
    send(rig, pedal(True), on(60), on(62), on(64), on(65))
    send(rig, off(64))
    assert notes(inst, "sustained") == [64]
    send(rig, on(67), blocks=3)
    assert notes(inst, "held") == [60, 62, 65, 67] and notes(inst, "sustained") == []


def test_steals_the_oldest_held_when_all_are_held(rig):
    inst, _ = rig
    send(rig, on(60))
    send(rig, on(62), on(64), on(65))
    send(rig, on(67), blocks=3)
    assert notes(inst, "held") == [62, 64, 65, 67]
    assert inst.counters["voices_stolen"] == 1


def test_note_off_releases_and_velocity_zero_is_note_off(rig):
    inst, _ = rig
    send(rig, on(60), on(64))
    send(rig, off(60), on(64, 0))
    assert notes(inst, "released") == [60, 64] and notes(inst, "held") == []


def test_sustain_pedal_holds_ended_notes_until_it_comes_up(rig):
    inst, _ = rig
    send(rig, on(60), pedal(True))
    send(rig, off(60))
    assert notes(inst, "sustained") == [60]
    send(rig, on(62))                     # a note played under the pedal is held as usual
    assert notes(inst, "held") == [62]
    send(rig, pedal(False))
    assert notes(inst, "released") == [60] and notes(inst, "held") == [62]


def test_all_notes_off_is_held_by_the_pedal(rig):
    inst, _ = rig
    send(rig, on(60), on(64), pedal(True))
    send(rig, mido.Message("control_change", control=123, value=0))
    assert notes(inst, "sustained") == [60, 64]
    send(rig, pedal(False))
    assert notes(inst, "released") == [60, 64]


def test_all_notes_off_without_pedal_releases_and_falls_silent(rig):
    inst, _ = rig
    send(rig, on(60), on(67), blocks=20)
    send(rig, mido.Message("control_change", control=123, value=0))
    assert notes(inst, "released") == [60, 67]
    tail = send(rig, blocks=int(1.0 * 48000 / BLOCK))
    assert inst.counters["voices_active"] == 0 and np.all(tail[-BLOCK:] == 0.0)


def test_all_sound_off_silences_at_once(rig):
    inst, _ = rig
    send(rig, pedal(True), on(60), on(62), blocks=10)
    out = send(rig, mido.Message("control_change", control=120, value=0), blocks=3)
    assert inst.counters["voices_active"] == 0
    assert np.all(out[2 * BLOCK:] == 0.0)


def test_repeated_note_does_not_stack_held_voices(rig):
    """A second note-on of a sounding note retriggers it (common practice, no source)."""
    inst, _ = rig
    send(rig, on(60))
    send(rig, on(60))
    assert notes(inst, "held") == [60]
    send(rig, off(60))
    assert notes(inst, "held") == []


def test_stolen_voice_fades_out_instead_of_being_cut(preset):
    """Stealing ramps the old note down over RAMP_FADE_S (a few ms) before the new one starts."""
    from sheafsynth.engine.ir.program import RAMP_FADE_S

    inst = Instrument(preset, rate=48000, max_block=BLOCK, polyphony=1)
    tr = MidiTranslator(preset, inst.program.param_index)
    fade = V.fade_samples(48000, RAMP_FADE_S)
    before = send((inst, tr), on(45), blocks=40)[-fade:]
    x = send((inst, tr), on(57), blocks=4)
    assert inst.counters["voices_stolen"] == 1
    rms = lambda y: float(np.sqrt(np.mean(np.square(y, dtype=np.float64))))
    q = fade // 4
    assert rms(x[:q]) > 0.5 * rms(before)              # not cut off at once
    assert rms(x[fade - q:fade]) < 0.3 * rms(before)   # down to near silence at the end of the fade
    assert notes(inst, "held") == [57]

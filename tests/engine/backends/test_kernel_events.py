"""Sample-accurate events and the voice pool, through the compiled kernel."""

from __future__ import annotations

import numpy as np

from sheafsynth.engine.instrument import Instrument

IMPULSE_THRU = {
    "format": "sheafsynth-preset", "version": 1, "name": "offset-probe", "polyphony": 2,
    "cells": [{"id": "d", "kind": "delay", "length": 5}],
    "wires": [{"from": "excite", "to": "d"}, {"from": "d", "to": "out"}],
    "excitation": {"kind": "impulse"},
}


def test_note_on_offset_is_sample_accurate():
    inst = Instrument(IMPULSE_THRU, max_block=128, limiter=False)
    for offset in (0, 1, 37, 127):
        inst.all_sound_off()
        inst.render(1024)
        inst.note_on(60, 127, offset)
        y = inst.render(256)
        hits = np.flatnonzero(np.abs(y) > 0)
        assert hits.tolist() == [offset + 5], f"offset {offset}: impulse at {hits}"


def test_polyphony_and_stealing_counts():
    inst = Instrument("presets/porch-pluck.json", polyphony=4)
    for n in range(60, 66):
        inst.note_on(n, 100)
    inst.render(2048)
    c = inst.counters
    assert c["voices_active"] == 4
    assert c["voices_stolen"] == 2
    assert sorted(n for s, n in inst.voices()) == [62, 63, 64, 65]   # the two oldest were stolen


def test_release_frees_voices_and_sustain_holds_them():
    inst = Instrument("presets/lantern-harp.json", polyphony=4)
    inst.sustain(True)
    inst.note_on(60, 100)
    inst.render(512)
    inst.note_off(60)
    inst.render(512)
    assert inst.voices()[0][0] == "sustained"
    inst.sustain(False)
    inst.render(512)
    assert inst.voices()[0][0] == "released"
    inst.render(48000 * 4)
    assert inst.counters["voices_active"] == 0


def test_unknown_events_are_counted_not_fatal():
    inst = Instrument(IMPULSE_THRU)
    inst.push_event(0, 99)            # unknown type
    inst.push_event(0, 1, 200, 100)   # note out of range
    inst.push_event(0, 3, 7, 0, 1.0)  # parameter index out of range
    y = inst.render(512)
    assert np.isfinite(y).all()
    assert inst.counters["events_ignored"] == 3

"""Every factory preset is stable and in tune at 44.1, 48, 88.2, 96 and 192 kHz.

Stable: the frozen spectral radius (engine.analysis.report.frozen, the
check's own verdict) is below 1 at every corner of the mapped knob box and
its centre, at the lowest, middle and highest notes; a tuned field is
checked up to the highest note plus the bend range when it is lowered.

In tune: a take at the lowest note, and one at the highest note bent up by
the full bend range, has its fundamental within 0.5 cent of the note
(equal temperament, A4 = 440 Hz: ISO 16:1975), measured by quadratic
interpolation of the spectral peak (tests/audio_measures.py).
"""

from __future__ import annotations

import json

import pytest

from sheafsynth.engine.analysis.report import check_notes, frozen, mapped_box
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir.fields import bend_range
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.ir.program import note_hz
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.engine.preset import factory_presets, load_preset
from tests.audio_measures import cents, fundamental_hz

pytestmark = pytest.mark.slow

RATES = (44100, 48000, 88200, 96000, 192000)
CASES = [(p, r) for p in factory_presets() for r in RATES]


@pytest.mark.parametrize("path,rate", CASES, ids=[f"{p.stem}-{r}" for p, r in CASES])
def test_stable_at_every_rate(path, rate):
    preset = load_checked(path)
    result = frozen(lower(preset, float(rate)), mapped_box(preset), check_notes(preset))
    assert result["status"] in ("stable", "drift"), f"{path.stem} at {rate} Hz: {result['status']}"


def _fundamental(doc: dict, rate: int, note: int, bend: float) -> float:
    inst = Instrument(load_preset(doc), rate=rate, max_block=512, seed=1)
    if bend:
        inst.bend(bend)
    inst.note_on(note, 100)
    x = inst.render(int(1.6 * rate))
    x = x[:, 0] if x.ndim > 1 else x
    return fundamental_hz(x, rate, note_hz(note + bend), window_s=1.5)


@pytest.mark.parametrize("path", factory_presets(), ids=lambda p: p.stem)
def test_in_tune_over_the_range_and_bend_at_every_rate(path):
    doc = json.loads(path.read_text())
    doc["excitation"] = {"kind": "impulse"}        # deterministic strike (test_rate_independence explains)
    preset = load_preset(doc)
    lo, hi = preset.notes
    bend = bend_range(preset)
    off = []
    for rate in RATES:
        for note, b in ((lo, 0.0), (hi, bend)):
            c = cents(_fundamental(doc, rate, note, b), note_hz(note + b))
            if abs(c) > 0.5:
                off.append(f"note {note}{f' bent +{b:g}' if b else ''} at {rate} Hz: {c:+.2f} cents")
    assert not off, "; ".join(off)

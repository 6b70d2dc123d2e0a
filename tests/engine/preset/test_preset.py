"""Preset format v1: loading, validation errors with JSON paths, atomic saves."""

from __future__ import annotations

import copy
import json
import os

import pytest

from sheafsynth.engine.model.cells import CELL_KINDS
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset import SCHEMA_PATH, factory_presets, parse_preset, save_preset

BASE = {
    "format": "sheafsynth-preset", "version": 1, "name": "test-string",
    "parameters": {"decay": {"value": 0.99, "min": 0.9, "max": 0.999},
                   "bright": {"value": 0.5, "min": 0.0, "max": 1.0}},
    "cells": [
        {"id": "loop", "kind": "delay", "length": "pitch"},
        {"id": "damp", "kind": "statespace", "A": [[0]], "B": [[1]],
         "C": [["bright"]], "D": [[{"param": "bright", "scale": -1, "offset": 1}]]},
        {"id": "tune", "kind": "allpass", "delay": "pitch-fraction"},
    ],
    "wires": [
        {"from": "excite", "to": "loop"},
        {"from": "loop", "to": "damp", "gain": "decay"},
        {"from": "damp", "to": "tune"},
        {"from": "tune", "to": "loop"},
        {"from": "loop", "to": "out", "gain": 0.5},
    ],
    "controls": [{"cc": 74, "parameter": "bright"}, {"cc": 1, "parameter": "decay", "curve": "exp"}],
}


def mutate(fn):
    doc = copy.deepcopy(BASE)
    fn(doc)
    return doc


def test_base_preset_loads():
    p = load_checked(BASE)
    assert p.name == "test-string"
    assert [c.name for c in sheaf_of(p).cells] == ["loop", "damp", "tune"]


def test_design_example_keys_load():
    """Every key of the documented v1 example loads (the format is a contract)."""
    doc = mutate(lambda d: d.update({
        "about": "x", "polyphony": 16,
        "excitation": {"kind": "noise", "length": "period", "velocity_brightness": True},
        "controls": [{"cc": 74, "parameter": "bright"}, {"cc": 1, "parameter": "decay", "curve": "exp"},
                     {"source": "pitchbend", "range_semitones": 2}],
        "release": {"decay": 0.95}}))
    p = load_checked(doc)
    assert p.release_decay == 0.95
    assert p.controls[2].range_semitones == 2


def _bad_json(tmp_path):
    f = tmp_path / "bad.json"
    f.write_text('{"format": "sheafsynth-preset", "version": 1,, }')
    return f


def _set(path, value):
    def fn(d):
        node = d
        for k in path[:-1]:
            node = node[k]
        node[path[-1]] = value
    return fn


def _del(path):
    def fn(d):
        node = d
        for k in path[:-1]:
            node = node[k]
        del node[path[-1]]
    return fn


# (case id, mutation, expected path prefix, expected words in the message)
MALFORMED = [
    ("wrong-format", _set(["format"], "other"), "format", "sheafsynth-preset"),
    ("newer-version", _set(["version"], 3), "version", "newer"),
    ("zero-version", _set(["version"], 0), "version", "first is 1"),
    ("string-version", _set(["version"], "1"), "version", "integer"),
    ("missing-cells", _del(["cells"]), "(top level)", "cells"),
    ("unknown-top-key", _set(["colour"], "red"), "(top level)", "colour"),
    ("unknown-kind", _set(["cells", 1, "kind"], "wobbler"), "cells[1].kind", "wobbler"),
    ("unknown-param-in-matrix", _set(["cells", 1, "C"], [["brigth"]]), "cells[1].C[0][0]", 'unknown parameter "brigth"'),
    ("unknown-param-in-entry", _set(["cells", 1, "D"], [[{"param": "nope"}]]), "cells[1].D[0][0].param", "nope"),
    ("matrix-shape", _set(["cells", 1, "B"], [[1], [2]]), "cells[1].B", "expected 1x"),
    ("ragged-matrix", _set(["cells", 1, "A"], [[0, 1], [0]]), "cells[1].A", "row 1"),
    ("wrong-type-entry", _set(["cells", 1, "A"], [[True]]), "cells[1].A[0][0]", ""),
    ("typo-key-in-cell", _set(["cells", 0, "lenght"], 10), "cells[0]", "lenght"),
    ("delay-length-zero", _set(["cells", 0, "length"], 0), "cells[0].length", ""),
    ("unknown-wire-end", _set(["wires", 2, "to"], "tuner"), "wires[2].to", '"tuner"'),
    ("wire-into-excite", _set(["wires", 0, "to"], "excite"), "wires[0].to", "excite"),
    ("port-out-of-range", _set(["wires", 2, "from"], "damp.3"), "wires[2].from", "port 3"),
    ("dimension-mismatch", _set(["wires", 2, "gain"], [[1, 2]]), "wires[2].gain", "1x2"),
    ("delay-free-loop", lambda d: d["wires"].append({"from": "tune", "to": "damp"}), "wires", "loop with no delay"),
    ("param-out-of-range", _set(["parameters", "decay", "value"], 1.5), "parameters.decay.value", "outside"),
    ("param-min-above-max", _set(["parameters", "bright", "min"], 2.0), "parameters.bright", "below max"),
    ("control-unknown-param", _set(["controls", 0, "parameter"], "brite"), "controls[0].parameter", "brite"),
    ("control-reserved-cc", _set(["controls", 0, "cc"], 64), "controls[0].cc", "sustain"),
    ("control-cc-range", _set(["controls", 0, "cc"], 200), "controls[0].cc", "200"),
    ("exp-curve-through-zero", _set(["controls", 0, "curve"], "exp"), "controls[0].curve", "above zero"),
    ("duplicate-cell-id", lambda d: d["cells"].append({"id": "loop", "kind": "delay", "length": 3}),
     "cells[3].id", "twice"),
    ("reserved-cell-id", _set(["cells", 0, "id"], "out"), "cells[0].id", ""),
    ("no-output", lambda d: d["wires"].pop(), "wires", "out"),
    ("tuner-off-loop", lambda d: d["cells"].append({"id": "stray", "kind": "allpass", "delay": "pitch-fraction"})
     or d["wires"].append({"from": "loop", "to": "stray"}), "cells[3].delay", "not on a loop"),
    ("allpass-coef-unstable", _set(["cells", 2], {"id": "tune", "kind": "allpass", "coef": 1.5}),
     "cells[2].coef", "inside (-1, 1)"),
    ("biquad-a0", lambda d: d["cells"].append({"id": "bq", "kind": "biquad", "b": [1, 0, 0], "a": [2, 0, 0]})
     or d["wires"].append({"from": "loop", "to": "bq"}), "cells[3].a[0]", "must be 1"),
    ("bad-excitation", _set(["excitation"], {"kind": "laser"}), "excitation.kind", ""),
    ("release-above-one", _set(["release"], {"decay": 1.2}), "release.decay", ""),
]


@pytest.mark.parametrize("case,fn,path,words", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_malformed_preset_names_the_path(case, fn, path, words):
    with pytest.raises(PresetError) as info:
        load_checked(mutate(fn))
    msg = str(info.value)
    assert msg.startswith(path), msg
    assert words in msg, msg


def test_at_least_twenty_distinct_malformed_cases():
    assert len(MALFORMED) >= 20


def test_bad_json_names_line_and_column(tmp_path):
    with pytest.raises(PresetError) as info:
        load_checked(_bad_json(tmp_path))
    assert "line 1 column" in str(info.value)
    assert str(tmp_path / "bad.json") in str(info.value)


def test_non_finite_numbers_are_refused(tmp_path):
    f = tmp_path / "nan.json"
    f.write_text(json.dumps(BASE).replace('"value": 0.99', '"value": NaN'))
    with pytest.raises(PresetError) as info:
        load_checked(f)
    assert "non-finite" in str(info.value)


def test_missing_file_is_a_preset_error(tmp_path):
    with pytest.raises(PresetError) as info:
        load_checked(tmp_path / "nope.json")
    assert "no such preset file" in str(info.value)


def test_schema_lists_exactly_the_registered_cell_kinds():
    """The JSON Schema and the spec table of cell kinds must agree (DESIGN §8)."""
    schema = json.loads(SCHEMA_PATH.read_text())
    kinds = set(schema["$defs"]["cell"]["properties"]["kind"]["enum"])
    assert kinds == set(CELL_KINDS)


def test_every_factory_preset_loads():
    paths = factory_presets()
    assert len(paths) >= 3
    for p in paths:
        preset = load_checked(p)
        assert preset.about, f"{p.name} needs an about line"
        assert any(c.source == "cc" for c in preset.controls), f"{p.name} maps no CC"


def test_save_is_atomic_and_round_trips(tmp_path):
    target = tmp_path / "mine.json"
    save_preset(BASE, target)
    assert json.loads(target.read_text()) == BASE
    assert not [f for f in os.listdir(tmp_path) if f.endswith(".tmp")]
    # An invalid document is refused and the old file is left as it was.
    bad = mutate(_set(["version"], 9))
    with pytest.raises(PresetError):
        save_preset(bad, target)
    assert json.loads(target.read_text()) == BASE


def test_with_values_refuses_out_of_range():
    p = load_checked(BASE)
    assert p.with_values({"bright": 0.25}).parameters["bright"].value == 0.25
    with pytest.raises(PresetError) as info:
        p.with_values({"bright": 3.0})
    assert "parameters.bright.value" in str(info.value)


def test_with_values_equals_parsing_the_changed_document():
    p = load_checked(BASE)
    doc = copy.deepcopy(BASE)
    doc["parameters"]["bright"]["value"] = 0.25
    assert p.with_values({"bright": 0.25}) == parse_preset(doc)

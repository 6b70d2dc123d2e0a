"""Preset fuzzing: every document either loads or is refused with a PresetError naming a JSON path.

Three generators (hypothesis), 2000 cases per run by default (env
SHEAFSYNTH_FUZZ_EXAMPLES for more), split 50 / 35 / 15 %:

* ``generated`` -- networks built from the cell kinds with random sizes,
  entries, wiring, parameters and controls, biased toward valid presets;
* ``mutated`` -- the engine tests' base preset, the factory presets and the
  engine tests' malformed cases, each put through 1-4 random edits (delete a
  key, replace any value by hostile JSON -- huge integers, 1e308, NaN,
  deep nesting, long strings --, add keys, duplicate or drop list items);
* ``text`` -- the JSON text of a preset cut, spliced and corrupted at the
  byte level (invalid UTF-8, non-finite literals, deep nesting), loaded both
  as text and as a file.

Every case validates (fast, each bounded by a time limit).  Compiling takes
about 0.7 s, so not every valid case is compiled: the valid cases are
deduplicated by a hash of their structure (cell kinds and shapes, wiring,
excitation, number of parameters) and a bounded sample of at most
``COMPILE_SAMPLE`` distinct structures per run, chosen in hash order, is
compiled with -Wall -Wextra -Werror and plays a short note whose output must
be finite and under the limiter ceiling.  Run alone, the compile test draws
its own valid cases first.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.program import LIMITER_CEILING
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.engine.preset import factory_presets
from tests.engine.preset.test_preset import BASE, MALFORMED, mutate
from tests.hardening.conftest import fuzz_examples

CASE_LIMIT_S = 30.0          # hang guard per case (typical case: a few ms)
COMPILE_SAMPLE = 40          # distinct valid structures compiled per run
COMPILE_LIMIT_S = 180.0      # hang guard per compile + render

TOTAL = fuzz_examples()
N_GENERATED = max(10, TOTAL * 50 // 100)
N_MUTATED = max(10, TOTAL * 35 // 100)
N_TEXT = max(10, TOTAL - N_GENERATED - N_MUTATED)

COUNTS: Counter = Counter()
VALID: dict[str, dict] = {}       # structure hash -> first valid document seen

FUZZ_SETTINGS = dict(deadline=None, derandomize=False, print_blob=True,
                     suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                            HealthCheck.filter_too_much, HealthCheck.large_base_example])

# ---------------------------------------------------------------- hostile values

HOSTILE_TEXT = ["", " ", "\x00", "*/", "/*", "#include <stdio.h>", "$(reboot)", "`id`", "\\", '"',
                "\u202e", "\ud7ff", "é" * 300, "a" * 5000, "excite", "out", "loop.0", "loop.99999",
                "pitch", "pitch-fraction", "period", "NaN", "Infinity", "1e999", "-0", "__proto__"]
HOSTILE_NUMBERS = [0, -0.0, 1, -1, 0.5, 1.5, 2, 127, 128, -129, 4096, 4097, 1048576, 1048577,
                   5e-324, 1e-45, 1e30, -1e30, 3.4e38, 3.5e38, 1e308, -1e308, 2 ** 31, 2 ** 63,
                   10 ** 30, 10 ** 400, float("nan"), float("inf"), float("-inf")]

scalars = st.one_of(
    st.none(), st.booleans(),
    st.integers(min_value=-(10 ** 40), max_value=10 ** 40),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from(HOSTILE_NUMBERS),
    st.text(max_size=24), st.sampled_from(HOSTILE_TEXT),
)


def _deep(depth: int, leaf):
    out = leaf
    for i in range(depth):
        out = [out] if i % 2 else {"k": out}
    return out


junk = st.one_of(
    st.recursive(scalars, lambda kids: st.lists(kids, max_size=4)
                 | st.dictionaries(st.text(max_size=8), kids, max_size=4), max_leaves=8),
    st.builds(_deep, st.integers(20, 300), scalars),
)

# ---------------------------------------------------------------- generated networks

PNAMES = ["decay", "bright", "tone", "p_3", "x-y"]
RESERVED_CC = {6, 38, 64, 100, 101, 120, 121, 123}


@st.composite
def entry(draw, params, scale=1.0, ok=True):
    """A matrix entry: mostly a small number, sometimes a parameter; hostile unless ``ok``."""
    k = draw(st.integers(0, 15 if ok else 19))
    if k < 11 or (k < 16 and not params):
        return draw(st.floats(-scale, scale, allow_nan=False))
    if k < 14:
        return draw(st.sampled_from(params))
    if k < 16:
        d = {"param": draw(st.sampled_from(params if ok else params + ["nope"]))}
        if draw(st.booleans()):
            d["scale"] = draw(st.floats(-scale, scale, allow_nan=False))
        if draw(st.booleans()):
            d["offset"] = draw(st.floats(-scale, scale, allow_nan=False))
        return d
    if k < 18:
        return draw(st.sampled_from([0, 1, -1, 0.999, 1e-30, 1e30, 3.4e38, "decay", "nope"]))
    return draw(scalars)


def matrix(params, rows, cols, scale, ok=True):
    return st.lists(st.lists(entry(params, scale, ok), min_size=cols, max_size=cols),
                    min_size=rows, max_size=rows)


@st.composite
def cell(draw, cid, params, ok=True, in_loop=False):
    """One cell of any kind but the pitch-fraction allpass (the string skeleton has it)."""
    kinds = ["delay", "statespace", "onepole", "biquad", "gain", "field", "allpass"]
    if ok and in_loop:
        kinds.remove("field")          # a cycle through a field is a coupling, not a tuning loop
    kind = draw(st.sampled_from(kinds))
    c = {"id": cid, "kind": kind}
    if kind == "delay":
        good = st.integers(1, 4000) if in_loop else st.one_of(st.just("pitch"), st.integers(1, 4000))
        c["length"] = draw(good if ok else st.one_of(good, st.integers(-3, 0),
                                                     st.sampled_from([1048576, 1048577, 2.5, "7"])))
    elif kind == "statespace":
        n = draw(st.integers(1, 3))
        i = 1 if ok else draw(st.integers(1, 2))
        o = 1 if ok else draw(st.integers(1, 2))
        c["A"] = draw(matrix(params, n, n, 0.6 / n, ok))
        c["B"] = draw(matrix(params, n, i, 1.0, ok))
        c["C"] = draw(matrix(params, o, n, 1.0, ok))
        c["D"] = draw(st.one_of(matrix(params, o, i, 0.0, ok), matrix(params, o, i, 0.5, ok)))
    elif kind == "onepole":
        if draw(st.booleans()):
            c["pole"] = draw(st.one_of(st.floats(-0.99, 0.99), entry(params, 0.9 if ok else 1.2, ok)))
        else:
            c["b"] = draw(st.lists(entry(params, 1.0, ok), min_size=1, max_size=2))
            c["a"] = [1, draw(st.floats(-0.99, 0.99))]
    elif kind == "biquad":
        c["b"] = draw(st.lists(entry(params, 1.0, ok), min_size=3, max_size=3))
        r = draw(st.floats(0.0, 0.99))
        th = draw(st.floats(0.0, 3.14))
        c["a"] = [1 if ok else draw(st.sampled_from([1, 1, 2])), -2 * r * math.cos(th), r * r]
    elif kind == "allpass":
        if draw(st.booleans()):
            c["delay"] = draw(st.floats(0.01, 100))
        else:
            c["coef"] = draw(st.one_of(st.floats(-0.99, 0.99), entry(params, 0.9 if ok else 1.1, ok)))
    elif kind == "gain":
        c["gain"] = draw(st.one_of(entry(params, 1.0, ok), matrix(params, 1, 1, 1.0, ok)))
    else:  # field
        if draw(st.booleans()):
            wraps = ["none", "torus", "cylinder", "mobius"] + ([] if ok else ["klein"])
            c["complex"] = {"grid": [draw(st.integers(2, 12)), draw(st.integers(2, 12))],
                            "wrap": draw(st.sampled_from(wraps))}
        else:
            c["complex"] = {"path": draw(st.integers(2, 40)), "wrap": draw(st.sampled_from(["none", "ring"]))}
        c["speed"] = draw(st.floats(0.0, 0.7))
        if draw(st.booleans()):
            c["loss"] = draw(st.floats(0.0, 0.01))
        if draw(st.booleans()):
            c["boundary"] = draw(st.sampled_from(["fixed", "free"] + ([] if ok else ["loose"])))
    if not ok and draw(st.integers(0, 10)) == 0:
        c[draw(st.sampled_from(["lenght", "about", "gain", "A"]))] = draw(junk)
    return c


@st.composite
def generated(draw):
    """A network preset; 60 % drawn from valid choices only, 40 % from hostile ones too."""
    ok = draw(st.integers(0, 9)) < 6
    params = {}
    for name in draw(st.lists(st.sampled_from(PNAMES), max_size=3, unique=True)):
        lo = draw(st.floats(-1.0, 1.0))
        hi = lo + draw(st.floats(0.01, 2.0) if ok else st.floats(-0.1, 2.0))
        value = draw(st.floats(lo, hi) if ok else st.one_of(st.just((lo + hi) / 2), st.floats(-2.0, 3.0)))
        p = {"value": value, "min": lo, "max": hi}
        if draw(st.booleans()):
            p["ramp_ms"] = draw(st.floats(0.1, 100) if ok else st.sampled_from([0, -1, 10001, 5]))
        params[name] = p
    pnames = list(params)
    doc = {"format": "sheafsynth-preset", "version": 1, "name": draw(st.text(min_size=1, max_size=30)),
           "parameters": params}
    cells, wires = [], []
    if draw(st.booleans()):
        # a plucked-string loop with one random cell inside it
        cells.append({"id": "loop", "kind": "delay", "length": "pitch"})
        cells.append(draw(cell("mid", pnames, ok, in_loop=True)))
        cells.append({"id": "tune", "kind": "allpass", "delay": "pitch-fraction"})
        wires += [{"from": "excite", "to": "loop"},
                  {"from": "loop", "to": "mid", "gain": draw(entry(pnames, 0.99, ok))},
                  {"from": "mid", "to": "tune", "gain": draw(st.floats(0.3, 1.0))},
                  {"from": "tune", "to": "loop"},
                  {"from": "loop", "to": "out", "gain": draw(st.floats(0.05, 1.0))}]
    else:
        n = draw(st.integers(1, 5))
        for i in range(n):
            cells.append(draw(cell(f"c{i}", pnames, ok)))
        wires.append({"from": "excite", "to": "c0"})
        for i in range(n - 1):
            wires.append({"from": f"c{i}", "to": f"c{i + 1}", "gain": draw(entry(pnames, 1.0, ok))})
        wires.append({"from": f"c{n - 1}", "to": "out", "gain": draw(st.floats(0.05, 1.0))})
        for _ in range(draw(st.integers(0, 2))):       # feedback and stray wires
            ends = [c["id"] for c in cells] + ([] if ok else ["excite", "out", "c0.1", "nowhere"])
            w = {"from": draw(st.sampled_from(ends)), "to": draw(st.sampled_from(ends))}
            if draw(st.booleans()):
                w["gain"] = draw(entry(pnames, 0.9, ok))
            wires.append(w)
    doc["cells"], doc["wires"] = cells, wires
    if draw(st.booleans()):
        doc["polyphony"] = draw(st.integers(1, 32) if ok else st.sampled_from([0, 4096, 4097, 1.5]))
    if draw(st.booleans()):
        a, b = draw(st.integers(0, 127)), draw(st.integers(0, 127))
        doc["notes"] = sorted([a, b]) if ok else [a, b]
    if draw(st.booleans()):
        ex = {"kind": draw(st.sampled_from(["noise", "impulse"] + ([] if ok else ["laser"])))}
        if draw(st.booleans()):
            ex["length"] = draw(st.one_of(st.just("period"), st.integers(1 if ok else -1, 5000)))
        if draw(st.booleans()):
            ex["gain"] = draw(st.floats(0, 16 if ok else 20))
        doc["excitation"] = ex
    controls, used = [], set()
    for _ in range(draw(st.integers(0, 3))):
        c = {}
        src = draw(st.sampled_from(["cc", "cc", "pitchbend", "velocity", "pressure"] + ([] if ok else [None])))
        if src == "cc" or src is None:
            cc = draw(st.integers(0, 127 if ok else 130))
            if ok and (cc in RESERVED_CC or cc in used):
                continue
            used.add(cc)
            c["cc"] = cc
        if src is not None and (src != "cc" or draw(st.booleans())):
            c["source"] = src
        if src != "pitchbend":
            if ok and not pnames:
                continue
            c["parameter"] = draw(st.sampled_from(pnames if ok else pnames + ["nope"]))
            lo = params.get(c["parameter"], {}).get("min", -1)
            curves = (["linear"] + (["exp"] if lo > 0 else [])) if ok else ["linear", "exp", "log"]
            if draw(st.booleans()):
                c["curve"] = draw(st.sampled_from(curves))
        else:
            c["range_semitones"] = draw(st.floats(0, 48 if ok else 50))
        controls.append(c)
    if controls:
        doc["controls"] = controls
    if draw(st.booleans()):
        doc["release"] = {"decay": draw(st.floats(0.01, 1.0) if ok else st.floats(-0.1, 1.1))}
    if not ok and draw(st.integers(0, 10)) == 0:
        doc["about"] = draw(st.one_of(st.text(max_size=100), junk))
    return doc


# ---------------------------------------------------------------- mutations

def _seeds() -> list[dict]:
    seeds = [copy.deepcopy(BASE)]
    for p in factory_presets():
        seeds.append(json.loads(Path(p).read_text(encoding="utf-8")))
    for _case, fn, _path, _words in MALFORMED:
        seeds.append(mutate(fn))
    return seeds


SEEDS = _seeds()


def _slots(doc):
    """Every (container, key) pair of the document, depth first."""
    out, stack = [], [doc]
    while stack:
        node = stack.pop()
        if isinstance(node, dict):
            for k, v in node.items():
                out.append((node, k))
                stack.append(v)
        elif isinstance(node, list):
            for i, v in enumerate(node):
                out.append((node, i))
                stack.append(v)
    return out


@st.composite
def mutated(draw):
    doc = copy.deepcopy(draw(st.sampled_from(SEEDS)))
    for _ in range(draw(st.integers(1, 4))):
        slots = _slots(doc)
        if not slots:
            break
        container, key = slots[draw(st.integers(0, len(slots) - 1))]
        op = draw(st.sampled_from(["replace", "replace", "delete", "add", "dup", "wrap", "number", "swap"]))
        if op == "replace":
            container[key] = draw(junk)
        elif op == "delete":
            del container[key]
        elif op == "add":
            if isinstance(container, dict):
                container[draw(st.sampled_from(HOSTILE_TEXT + ["id", "kind", "gain", "at", "param"]))] = draw(junk)
            else:
                container.insert(key, draw(junk))
        elif op == "dup":
            if isinstance(container, list):
                container.insert(key, copy.deepcopy(container[key]))
            else:
                container[str(key) + "2"] = copy.deepcopy(container[key])
        elif op == "wrap":
            container[key] = [container[key]] if draw(st.booleans()) else {"param": container[key]}
        elif op == "number":
            container[key] = draw(st.sampled_from(HOSTILE_NUMBERS))
        else:  # swap with another slot's value
            c2, k2 = slots[draw(st.integers(0, len(slots) - 1))]
            if c2 is not container or k2 != key:
                a, b = container[key], c2[k2]
                if not _contains(a, b) and not _contains(b, a):
                    container[key], c2[k2] = b, a
    return doc


def _contains(outer, inner) -> bool:
    stack = [outer]
    while stack:
        node = stack.pop()
        if node is inner:
            return True
        if isinstance(node, dict):
            stack.extend(node.values())
        elif isinstance(node, list):
            stack.extend(node)
    return False


# ---------------------------------------------------------------- text corruption

@st.composite
def corrupted_text(draw) -> bytes:
    doc = draw(st.sampled_from(SEEDS))
    text = json.dumps(doc, indent=draw(st.sampled_from([None, 2]))).encode("utf-8")
    op = draw(st.sampled_from(["cut", "splice", "flip", "literal", "deep", "bom", "dupkey", "latin1"]))
    n = len(text)
    i = draw(st.integers(0, n))
    if op == "cut":
        text = text[:i]
    elif op == "splice":
        j = draw(st.integers(i, n))
        text = text[:i] + draw(st.binary(max_size=12)) + text[j:]
    elif op == "flip":
        k = min(i, n - 1)
        text = text[:k] + bytes([text[k] ^ (1 << draw(st.integers(0, 7)))]) + text[k + 1:]
    elif op == "literal":
        lit = draw(st.sampled_from([b"NaN", b"Infinity", b"-Infinity", b"1e999", b"-1e999", b"1" * 500,
                                    b"0." + b"0" * 400 + b"1", b"null", b"true", b'"\\ud800"']))
        text = text.replace(b"0.5", lit, 1) if b"0.5" in text else text.replace(b"1,", lit + b",", 1)
    elif op == "deep":
        depth = draw(st.integers(30, 100000))
        text = text[:-1] + b', "about": ' + b"[" * depth + b"]" * depth + b"}"
    elif op == "bom":
        text = b"\xef\xbb\xbf" + text
    elif op == "dupkey":
        text = text[:-1] + b', "name": "again", "cells": []}'
    else:
        text = text.replace(b'"name": "', '"name": "\u00e9'.encode("latin-1"), 1)
    return text


# ---------------------------------------------------------------- the properties

def _structure_hash(doc: dict) -> str:
    def shape(v):
        if isinstance(v, list):
            return [len(v)] + ([len(v[0])] if v and isinstance(v[0], list) else [])
        return type(v).__name__

    cells = []
    for c in doc["cells"]:
        cells.append([c["kind"]] + sorted(f"{k}:{shape(v) if k not in ('length', 'delay', 'complex') else v}"
                                          for k, v in c.items() if k not in ("id", "about")))
    ids = {c["id"]: i for i, c in enumerate(doc["cells"])}
    wires = sorted(json.dumps([ids.get(w["from"].split(".")[0], w["from"]), ids.get(w["to"].split(".")[0], w["to"]),
                               shape(w.get("gain", 1))]) for w in doc["wires"])
    key = json.dumps([cells, wires, doc.get("excitation", {}).get("kind"), len(doc.get("parameters", {}))],
                     sort_keys=True, default=str)
    return hashlib.sha256(key.encode()).hexdigest()


def _check_one(doc, check_preset_error, time_limit, source: str):
    COUNTS["cases"] += 1
    COUNTS[source] += 1
    with time_limit(CASE_LIMIT_S, f"validating a {source} preset"):
        try:
            preset = load_checked(doc)
        except PresetError as e:
            check_preset_error(e, doc if isinstance(doc, dict) else None)
            COUNTS["refused"] += 1
            return None
    COUNTS["valid"] += 1
    h = _structure_hash(preset.raw)
    VALID.setdefault(h, copy.deepcopy(preset.raw))
    return preset


@settings(max_examples=N_GENERATED, **FUZZ_SETTINGS)
@given(doc=generated())
def test_generated_presets_load_or_name_a_path(doc, check_preset_error, time_limit):
    _check_one(doc, check_preset_error, time_limit, "generated")


@settings(max_examples=N_MUTATED, **FUZZ_SETTINGS)
@given(doc=mutated())
def test_mutated_presets_load_or_name_a_path(doc, check_preset_error, time_limit):
    _check_one(doc, check_preset_error, time_limit, "mutated")


@settings(max_examples=N_TEXT, **FUZZ_SETTINGS)
@given(data=corrupted_text())
def test_corrupted_text_loads_or_names_a_path(data, check_preset_error, time_limit, tmp_path_factory):
    target = Path(tmp_path_factory.getbasetemp()) / "fuzz-preset.json"
    target.write_bytes(data)
    COUNTS["cases"] += 1
    COUNTS["text"] += 1
    with time_limit(CASE_LIMIT_S, "loading corrupted preset text"):
        try:
            doc = json.loads(data.decode("utf-8"))
        except (ValueError, RecursionError):
            doc = None
        for source in ([target] + ([data.decode("utf-8")] if data.lstrip().startswith(b"{") and _utf8(data) else [])):
            try:
                load_checked(source)
                COUNTS["valid"] += 1
            except PresetError as e:
                check_preset_error(e, doc if isinstance(doc, dict) else None, sources=(str(target), "<text>"))
                COUNTS["refused"] += 1


def _utf8(data: bytes) -> bool:
    try:
        data.decode("utf-8")
        return True
    except UnicodeDecodeError:
        return False


def test_pathological_documents_are_refused_quickly(check_preset_error, time_limit):
    """Documents found by this fuzzer that once escaped as tracebacks or hung."""
    cases = []
    d = copy.deepcopy(BASE)
    d["parameters"]["decay"]["value"] = 10 ** 400          # no float can hold it
    cases.append((d, "parameters.decay.value"))
    d = copy.deepcopy(BASE)
    d["parameters"]["decay"].update({"min": -1e308 * 10, "max": 1e308 * 10})   # +-inf from 1e400 in JSON
    cases.append((d, "parameters.decay."))
    d = copy.deepcopy(BASE)
    d["wires"][4]["gain"] = 1e39                            # beyond a 32-bit float
    cases.append((d, "wires[4].gain"))
    d = copy.deepcopy(BASE)
    d["polyphony"] = 4096
    d["cells"][0] = {"id": "loop", "kind": "delay", "length": 1048576}
    d["cells"].pop(2)
    d["wires"][2] = {"from": "damp", "to": "loop"}
    d["wires"].pop(3)
    cases.append((d, "polyphony"))                          # 16 GiB of delay lines
    d = copy.deepcopy(BASE)
    d["cells"].append({"id": "f", "kind": "field", "complex": {"grid": [3000, 3000]}, "speed": 0.3})
    d["wires"].append({"from": "loop", "to": "f"})
    cases.append((d, "cells[3].complex.grid"))              # a 9-million-vertex field
    text = '{"format": "sheafsynth-preset", "version": 1, "about": ' + "[" * 100000 + "]" * 100000 + "}"
    cases.append((text, "<text>"))                          # deeper than the JSON parser's stack
    for doc, where in cases:
        with time_limit(20.0, f"refusing a document ({where})"):
            with pytest.raises(PresetError) as info:
                load_checked(doc)
        check_preset_error(info.value, doc if isinstance(doc, dict) else None)
        assert info.value.path.startswith(where), str(info.value)


def _fill_valid_sample(check_preset_error, time_limit) -> None:
    """Run alone, draw valid cases first (the generated fuzz test with a small budget)."""
    if VALID:
        return
    inner = settings(max_examples=200, **FUZZ_SETTINGS)(given(doc=generated())(
        lambda doc: _check_one(doc, check_preset_error, time_limit, "generated")))
    inner()


@pytest.mark.slow
def test_valid_presets_compile_and_play_a_finite_note(check_preset_error, time_limit):
    _fill_valid_sample(check_preset_error, time_limit)
    from sheafsynth.engine.instrument import Instrument

    chosen = sorted(VALID)[:COMPILE_SAMPLE]
    assert chosen, "the fuzzers produced no valid preset at all"
    for h in chosen:
        doc = VALID[h]
        with time_limit(COMPILE_LIMIT_S, f"compiling preset structure {h[:12]}"):
            inst = Instrument(doc, max_block=256, strict=True)
            lo, hi = inst.preset.notes
            note = min(hi, max(lo, 60))
            inst.note_on(note, 100)
            a = inst.render(4800)
            inst.note_off(note)
            b = inst.render(2400)
        out = np.concatenate([a, b])
        assert np.all(np.isfinite(out)), f"non-finite output from {json.dumps(doc)[:2000]}"
        assert float(np.max(np.abs(out))) <= LIMITER_CEILING * (1 + 1e-6), json.dumps(doc)[:2000]
        COUNTS["compiled"] += 1
    print(f"\nfuzz: {dict(COUNTS)}; {len(VALID)} distinct valid structures, {COUNTS['compiled']} compiled")


def test_fuzz_ran_at_least_the_configured_number_of_cases():
    if not (COUNTS["generated"] and COUNTS["mutated"] and COUNTS["text"]):
        pytest.skip("the fuzz tests did not all run in this session")
    assert COUNTS["generated"] + COUNTS["mutated"] + COUNTS["text"] >= TOTAL
    assert COUNTS["valid"] > 0 and COUNTS["refused"] > 0

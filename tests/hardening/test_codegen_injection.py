"""Code injection: no preset text reaches the generated C or the compiler's command line.

Every text field (name, about, units, parameter and cell abouts, wire
abouts) holds C, preprocessor and shell syntax; every identifier field
(parameter names, cell ids) holds names that collide with C keywords, libc
functions, the kernel's own exported symbols and its generated locals.

The strongest form of the property is checked: the C source of a hostile
preset is *identical* to the source of the same network with every text
replaced by "x" and every name by a neutral one (same order), so no byte of
preset text can be in it.  Compiling three hostile presets of one network
runs the compiler once (same source, same cached module), and the argv,
working directory and output name of that run contain no preset text.
"""

from __future__ import annotations

import copy
import random
import subprocess

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sheafsynth.engine.backends.c import build
from sheafsynth.engine.backends.c.emit import generate
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.preset import load_preset

FRAGMENTS = [
    # C
    "*/", "/*", "//", '"', "'", "\\", ";", "}", "{", "int main(void){return system(\"id\");}",
    "__attribute__((constructor)) static void pwn(void){}", "asm(\"int3\");", "0x7fffffff", "\\x41\\101",
    # preprocessor
    "#include </etc/passwd>", "#define float double", "#pragma GCC poison float", "??=define X",
    "\\\n#error injected", "_Pragma(\"GCC error \\\"x\\\"\")", "#line 1 \"evil.c\"", "#undef SSK_POLY",
    # shell and compiler options
    "$(touch /tmp/sheafsynth-pwned)", "`id`", "; rm -rf ~", "&& curl x | sh", "> /dev/null", "-o /tmp/x.so",
    "-fplugin=/tmp/x.so", "-Wl,-rpath,/tmp", "--version", "'$HOME'", "%s%n%x",
    # odd text
    "\u202e", "\u00e9t\u00e9", "\t", "\r\n", "\x00",
]
IDENTS = ["system", "main", "__asm__", "_Pragma", "include", "define", "rm-rf", "exit-1", "printf",
          "sheafsynth_render", "sheafsynth_init", "ssk_state", "ssk_tune", "x0", "x1", "u1_0", "s1_0", "c0",
          "float", "int", "static", "NULL", "SSK_POLY", "pos", "out", "rng", "memset", "_exit", "environ"]


def _text(rng: random.Random, max_len: int) -> str:
    parts = [rng.choice(FRAGMENTS) for _ in range(rng.randint(1, 6))]
    return (f"zq{rng.randrange(10 ** 9):x} " + " ".join(parts))[:max_len]


def hostile_doc(rng: random.Random) -> dict:
    """A string network whose every text and name is hostile (drawn from ``rng``)."""
    p_decay, p_bright, c_loop, c_damp, c_tune, c_plate = rng.sample([i for i in IDENTS if i != "out"], 6)
    t = lambda n: _text(rng, n)  # noqa: E731
    doc = {
        "format": "sheafsynth-preset", "version": 1, "name": t(200), "about": t(4000),
        "parameters": {
            p_decay: {"value": 0.99, "min": 0.9, "max": 0.999, "unit": t(32), "about": t(400)},
            p_bright: {"value": 0.5, "min": 0.0, "max": 1.0, "unit": t(32), "about": t(400)},
        },
        "cells": [
            {"id": c_loop, "kind": "delay", "length": "pitch", "about": t(4000)},
            {"id": c_damp, "kind": "statespace", "A": [[0]], "B": [[1]], "C": [[p_bright]],
             "D": [[{"param": p_bright, "scale": -1, "offset": 1}]], "about": t(4000)},
            {"id": c_tune, "kind": "allpass", "delay": "pitch-fraction", "about": t(4000)},
        ],
        "wires": [
            {"from": "excite", "to": c_loop, "about": t(4000)},
            {"from": c_loop, "to": c_damp, "gain": p_decay, "about": t(4000)},
            {"from": c_damp, "to": c_tune},
            {"from": c_tune, "to": c_loop},
            {"from": c_loop, "to": "out", "gain": 0.5, "about": t(4000)},
        ],
        "controls": [{"cc": 74, "parameter": p_bright}, {"cc": 1, "parameter": p_decay, "curve": "exp"}],
    }
    if rng.random() < 0.5:
        doc["cells"].append({"id": c_plate, "kind": "field", "complex": {"grid": [4, 5]}, "speed": 0.4,
                             "loss": 0.001, "about": t(4000)})
        doc["wires"].append({"from": c_loop, "to": c_plate, "gain": 0.05, "about": t(4000)})
        doc["wires"].append({"from": c_plate, "to": "out", "gain": 0.2})
    return doc


hostile_preset = st.randoms(use_true_random=False).map(hostile_doc)


def texts_of(doc) -> list[str]:
    """Every string in the document (keys too) that came from the generator, not the format."""
    out, stack = [], [doc]
    while stack:
        node = stack.pop()
        if isinstance(node, dict):
            for k, v in node.items():
                out.append(k)
                stack.append(v)
        elif isinstance(node, list):
            stack.extend(node)
        elif isinstance(node, str):
            out.append(node)
    fixed = {"format", "version", "name", "about", "parameters", "value", "min", "max", "unit", "cells",
             "id", "kind", "length", "A", "B", "C", "D", "delay", "wires", "from", "to", "gain", "controls",
             "cc", "parameter", "curve", "param", "scale", "offset", "complex", "grid", "speed", "loss",
             "sheafsynth-preset", "pitch", "pitch-fraction", "statespace", "allpass", "field", "exp",
             "excite", "out"}
    return [t for t in out if t not in fixed]


def neutral(doc: dict) -> dict:
    """The same network: texts -> "x", names -> n000, n001, ... in the same sort order."""
    names = sorted(set(doc["parameters"]) | {c["id"] for c in doc["cells"]})
    new = {n: f"n{i:03d}" for i, n in enumerate(names)}
    d = copy.deepcopy(doc)
    d["name"], d["about"] = "x", "x"
    d["parameters"] = {new[k]: {**v, "unit": "x", "about": "x"} for k, v in doc["parameters"].items()}

    def ren(e):
        if isinstance(e, str) and e in new:
            return new[e]
        if isinstance(e, dict) and "param" in e:
            return {**e, "param": new[e["param"]]}
        if isinstance(e, list):
            return [ren(x) for x in e]
        return e

    for c in d["cells"]:
        c["id"] = new[c["id"]]
        if "about" in c:
            c["about"] = "x"
        for k in ("A", "B", "C", "D"):
            if k in c:
                c[k] = ren(c[k])
    for w in d["wires"]:
        w["from"], w["to"] = new.get(w["from"], w["from"]), new.get(w["to"], w["to"])
        if "gain" in w:
            w["gain"] = ren(w["gain"])
        if "about" in w:
            w["about"] = "x"
    for c in d["controls"]:
        c["parameter"] = new[c["parameter"]]
    return d


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(doc=hostile_preset)
def test_generated_c_is_the_same_as_for_neutral_text(doc):
    src = generate(lower(load_preset(doc)))
    plain = generate(lower(load_preset(neutral(doc))))
    assert src == plain, "preset text or names changed the generated C"
    for t in texts_of(doc):
        if t.startswith("zq") or len(t) >= 12:
            assert t not in src, f"preset text {t[:60]!r} is in the generated C"
    for frag in FRAGMENTS:
        if len(frag) >= 4 and frag not in plain:
            assert frag not in src, f"fragment {frag!r} is in the generated C"


def test_compiler_command_line_holds_no_preset_text(monkeypatch, tmp_path):
    monkeypatch.setenv("SHEAFSYNTH_CACHE_DIR", str(tmp_path / "cache"))
    calls = []
    real_run = subprocess.run

    def spy(argv, *args, **kwargs):
        calls.append((list(argv), str(kwargs.get("cwd", ""))))
        return real_run(argv, *args, **kwargs)

    monkeypatch.setattr(build.subprocess, "run", spy)
    rng = random.Random(7)
    docs = []
    for _ in range(3):
        d = hostile_doc(rng)
        # a damping value no other test uses: this network is new to the process, so it compiles
        d["cells"][1]["A"] = [[0.00731]]
        d["cells"] = d["cells"][:3]
        d["wires"] = d["wires"][:5]
        docs.append(d)
    before = build.compile_count()
    insts = [Instrument(d, strict=True) for d in docs]
    assert build.compile_count() == before + 1, "texts changed the binary: the compiler ran more than once"
    assert len({i.module.path for i in insts}) == 1
    compiles = [(argv, cwd) for argv, cwd in calls if "-o" in argv]
    assert len(compiles) == 1
    argv, cwd = compiles[0]
    texts = [t for d in docs for t in texts_of(d)]
    for t in texts:
        probe = t if len(t) < 40 else t[:40]
        if t.startswith("zq") or len(t) >= 12:
            for arg in argv + [cwd, str(insts[0].module.path)]:
                assert probe not in arg, f"preset text {probe!r} is on the compiler command line: {arg!r}"
    for frag in ("$(", "`", "-fplugin", "-Wl,-rpath", "/etc/passwd", "rm -rf"):
        assert not any(frag in a for a in argv), frag
    for inst in insts:
        inst.note_on(60, 100)
        out = inst.render(2400)
        assert abs(out).max() > 0.0

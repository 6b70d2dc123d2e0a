"""The stability guard never hangs on fuzzed variants of the factory presets.

Each variant is a factory preset put through 1-3 edits that keep it loadable
more often than not (a wire's gain removed, a number scaled by 0.5-1.5,
a parameter range widened); variants the loader refuses are skipped (the
loader itself is fuzzed in test_preset_fuzz.py).  Every guard call must end
decided (warnings, or UnstableError) or with NotDecided at its deadline,
inside a SIGALRM hang bound.  The deadline here is 1 s instead of the
guard's 7 s: the same code path, a tenth of the time.

Sizing: measured 8 x 8 variants in 25 s on the 2-core CI machine (about
0.4 s a variant), so 300 per preset would take about 15 minutes; the
default is 20 per preset (about a minute) and SHEAFSYNTH_GUARD_FUZZ=300
runs the full count.
"""

from __future__ import annotations

import copy
import json
import os

import numpy as np
import pytest

from sheafsynth.engine.analysis import report
from sheafsynth.engine.errors import NotDecided
from sheafsynth.engine.errors import PresetError, UnstableError
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.engine.locations import FACTORY_DIR

def _per_preset() -> int:
    raw = os.environ.get("SHEAFSYNTH_GUARD_FUZZ", "20") or "20"
    if not raw.isdigit() or int(raw) < 1:
        raise pytest.UsageError(f"SHEAFSYNTH_GUARD_FUZZ must be a whole number of variants per preset, got {raw!r}")
    return int(raw)


PER_PRESET = _per_preset()
FUZZ_LIMIT_S = 1.0        # the deadline handed to the guard
HANG_BOUND_S = 60.0       # SIGALRM bound on one guard call: a hang guard, not a speed test
FACTORY = sorted(p.name for p in FACTORY_DIR.glob("*.json"))


def _numbers(node, out):
    """Every (container, key) whose value is a plain number, depth first."""
    items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else []
    for k, v in items:
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            out.append((node, k))
        else:
            _numbers(v, out)
    return out


def _variant(doc: dict, rng: np.random.Generator) -> dict:
    doc = copy.deepcopy(doc)
    for _ in range(int(rng.integers(1, 4))):
        op = int(rng.integers(0, 3))
        wires = [w for w in doc.get("wires", []) if "gain" in w]
        if op == 0 and wires:
            del wires[int(rng.integers(0, len(wires)))]["gain"]
        elif op == 1:
            slots = _numbers(doc, [])
            if slots:
                c, k = slots[int(rng.integers(0, len(slots)))]
                c[k] = float(c[k]) * float(rng.uniform(0.5, 1.5))
        else:
            params = list(doc.get("parameters", {}).values())
            if params:
                p = params[int(rng.integers(0, len(params)))]
                span = float(p["max"]) - float(p["min"])
                p["max"] = float(p["max"]) + float(rng.uniform(0.0, 0.5)) * span
    return doc


@pytest.mark.slow
@pytest.mark.parametrize("name", FACTORY)
def test_guard_ends_on_fuzzed_variants(name, tmp_path, monkeypatch, time_limit):
    monkeypatch.setenv("SHEAFSYNTH_CACHE_DIR", str(tmp_path / "cache"))
    base = json.loads((FACTORY_DIR / name).read_text())
    rng = np.random.default_rng(sum(name.encode()))
    outcomes = {"stable": 0, "refused": 0, "not decided": 0, "not loadable": 0}
    for i in range(PER_PRESET):
        path = tmp_path / f"v{i}.json"
        path.write_text(json.dumps(_variant(base, rng)))
        try:
            preset = load_checked(path)
        except PresetError:
            outcomes["not loadable"] += 1
            continue
        with time_limit(HANG_BOUND_S, f"guard on variant {i} of {name}"):
            try:
                warnings = report.guard(preset, time_limit_s=FUZZ_LIMIT_S)
            except NotDecided as e:
                assert e.limit_s == FUZZ_LIMIT_S and "--allow-unstable" in str(e)
                outcomes["not decided"] += 1
            except UnstableError as e:
                assert str(e)
                outcomes["refused"] += 1
            else:
                assert all(isinstance(w, str) for w in warnings)
                outcomes["stable"] += 1
    assert sum(outcomes.values()) == PER_PRESET, outcomes

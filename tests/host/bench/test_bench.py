"""``sheafsynth bench --quick --json``: it runs and its report is well formed.

No timed assertions (DEVELOPERS.md): speed goals are reported by the bench,
never checked here.  Only the shape and the types of the report are.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

from sheafsynth.host.bench.context import PLAIN_PRESET
from sheafsynth.host.bench.report import GOALS, KEYS, format_table
from sheafsynth.host.bench.stats import interleave, solve_half, spread

ROOT = Path(__file__).resolve().parents[3]


def _number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    """One quick run in a child process, as a user runs it (the kernel cache is the test session's)."""
    out = tmp_path_factory.mktemp("bench") / "report.json"
    proc = subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "bench", "--quick", "--json", "--out", str(out)],
                          capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "Traceback" not in proc.stderr
    printed = json.loads(proc.stdout)
    saved = json.loads(out.read_text(encoding="utf-8"))
    assert printed == saved
    return printed


def test_every_key_is_there(report):
    for key in KEYS:
        assert key in report, key
    for key in ("goals", "details", "notes", "mode", "reps", "elapsed_s"):
        assert key in report, key
    assert report["mode"] == "quick"


def test_values_have_sane_types(report):
    notes = report["notes"]
    for key in KEYS:
        if key in ("machine", "voices_at_half_core"):
            continue
        v = report[key]
        # a number, or null together with the reason in "notes"
        assert _number(v) or (v is None and isinstance(notes.get(key), str)), (key, v)
        if _number(v):
            assert v >= 0.0, key
    voices = report["voices_at_half_core"]
    assert isinstance(voices, dict) and PLAIN_PRESET in voices
    for name, n in voices.items():
        assert isinstance(name, str) and (n is None or (isinstance(n, int) and n >= 0)), (name, n)


def test_machine_is_named(report):
    m = report["machine"]
    assert isinstance(m["cpu"], str) and m["cpu"]
    assert isinstance(m["cores"], int) and m["cores"] >= 1
    assert isinstance(m["compiler"], str) and m["compiler"]
    assert "-O3" in m["flags"]


def test_goals_and_spreads_are_reported(report):
    goals = report["goals"]
    for key in GOALS:
        g = goals[key]
        assert isinstance(g["goal"], str) and g["goal"][:2] in ("<=", ">=")
        assert g["met"] in (True, False, None)
    spread = report["details"]["generated_vs_handwritten"]["ratio"]
    for k in ("median", "q1", "q3", "min", "max", "n"):
        assert k in spread
    assert spread["n"] >= 2


def test_same_arithmetic_as_the_hand_written_loops(report):
    """The yardsticks compute what the kernels compute (outputs compared sample by sample)."""
    d = report["details"]
    assert d["generated_vs_handwritten"]["max_abs_diff_8_voices"] <= 1e-6
    if report["field_vs_handwritten"] is not None:
        assert d["field_vs_handwritten"]["max_abs_diff"] <= 1e-6
    if report["speedup_vs_lfilter"] is not None:
        assert d["speedup_vs_lfilter"]["max_abs_diff"] <= 1e-5


def test_table_renders(report):
    text = format_table(report)
    assert "generated / hand-written" in text and "voices at half a core" in text


def test_bad_output_path_is_one_line_error(tmp_path):
    missing = tmp_path / "no-such-dir" / "r.json"
    proc = subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "bench", "--quick", "--json", "--out", str(missing)],
                          capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and len(proc.stderr.strip().splitlines()) == 1


def test_spread_and_solver_helpers():
    s = spread([3.0, 1.0, 2.0])
    assert s["median"] == 2.0 and s["min"] == 1.0 and s["max"] == 3.0 and s["n"] == 3
    assert spread([])["median"] is None
    # load 0.25 at 100 voices, 0.75 at 300: half a core at 200
    assert solve_half([(100, 0.25), (300, 0.75)]) == pytest.approx(200.0)
    order = []
    interleave({"a": lambda: order.append("a") or 0.0, "b": lambda: order.append("b") or 0.0}, 2)
    assert sorted(order) == ["a", "a", "b", "b"] and order[:2] != order[2:]

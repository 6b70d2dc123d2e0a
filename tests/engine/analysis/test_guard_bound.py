"""The stability guard is bounded in time, shares check's stored report, and checks at the render rate.

Sources: a time limit passed down as a deadline (checked at safe points) is
common practice (no source); the spectral radius facts the guard relies on
are those of tests/engine/analysis/test_check_report.py.  No elapsed time is
asserted anywhere: a subprocess timeout only bounds a hang, and the tests
assert on what the guard reports.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from sheafsynth.engine.analysis import report
from sheafsynth.engine.analysis.deadline import GUARD_TIME_LIMIT_S, Deadline
from sheafsynth.engine.errors import NotDecided
from sheafsynth.engine.errors import UnstableError
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.preset import load_preset
from sheafsynth.host import cli
from sheafsynth.host import guard as host_guard

HANG_BOUND_S = 120.0      # a hang guard for the subprocess, not a speed test


def _edited_bridge_trio(tmp_path):
    """bridge-trio with the first wire's gain removed (the edit that made render hang)."""
    doc = json.loads((FACTORY_DIR / "bridge-trio.json").read_text())
    wire = next(w for w in doc["wires"] if "gain" in w and w["from"] != "excite")
    del wire["gain"]
    path = tmp_path / "bridge-trio-edited.json"
    path.write_text(json.dumps(doc))
    return path


def test_deadline_stops_at_its_time():
    # common practice (no source): a deadline passes once its clock reaches start + limit
    now = [100.0]
    d = Deadline(2.0, clock=lambda: now[0])
    d.step("first step")
    now[0] = 101.9
    d.check()
    now[0] = 102.0
    with pytest.raises(NotDecided) as exc:
        d.check()
    assert exc.value.limit_s == 2.0 and exc.value.step == "first step"
    assert Deadline(None).remaining_s() is None


@pytest.mark.slow
def test_edited_bridge_trio_render_ends_decided_or_not_decided_in_time(tmp_path):
    path = _edited_bridge_trio(tmp_path)
    env = dict(os.environ, SHEAFSYNTH_CACHE_DIR=str(tmp_path / "cache"))
    proc = subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "render", str(path),
                           "--out", str(tmp_path / "x.wav"), "--seconds", "0.2"],
                          capture_output=True, text=True, timeout=HANG_BOUND_S, env=env, cwd=tmp_path)
    err = proc.stderr.strip().splitlines()
    assert "Traceback" not in proc.stderr
    if proc.returncode == 0:
        assert (tmp_path / "x.wav").exists()
    else:
        # refused with one plain line: either a decided "not stable" or the bounded "not decided"
        last = err[-1]
        assert proc.returncode in (1, 2), proc.stderr
        if "neither proven nor refuted" in last:
            assert f"within {GUARD_TIME_LIMIT_S:g} s" in last
            assert "--time-limit" in last and "--allow-unstable" in last
            assert "stopped at:" in last
        else:
            assert "unstable" in last or "marginal" in last, last


def test_guard_stops_at_its_deadline_on_the_edited_bridge_trio(tmp_path):
    preset = load_preset(_edited_bridge_trio(tmp_path))
    report._UNDECIDED.clear()
    try:
        warnings = report.guard(preset, rate=48000.0, time_limit_s=0.5)
    except NotDecided as e:
        assert e.limit_s == 0.5                     # it stopped at the deadline it was given
        assert "--allow-unstable" in str(e) and "--time-limit" in str(e)
        # and with --allow-unstable the same outcome is a warning, at once (remembered)
        lines = report.guard(preset, allow_unstable=True, rate=48000.0, time_limit_s=0.5)
        assert any("not known" in line for line in lines)
    except UnstableError:
        pass                                        # decided: refused
    else:
        assert isinstance(warnings, list)           # decided: stable


def test_guard_reuses_checks_stored_report(tmp_path, monkeypatch):
    monkeypatch.setenv("SHEAFSYNTH_CACHE_DIR", str(tmp_path / "cache"))
    preset = load_preset(FACTORY_DIR / "porch-pluck.json")
    full = report.check(preset, rate=48000)         # an int rate: the same key as 48000.0
    calls = []

    def no_new_analysis(*args, **kwargs):
        calls.append(args)
        raise AssertionError("the guard analysed again instead of reusing check's report")

    monkeypatch.setattr(report, "frozen", no_new_analysis)
    monkeypatch.setattr(report, "certify_network", no_new_analysis)
    warnings = report.guard(preset, rate=48000.0)
    assert calls == []
    assert warnings == full["warnings"]
    assert report.is_checked(preset, rate=48000.0)
    assert not report.is_checked(preset, rate=96000.0)


def test_render_at_96k_runs_the_guard_at_96k(tmp_path, monkeypatch):
    seen = []

    def spy(preset, allow_unstable=False, rate=48000.0, time_limit_s=0.0, progress=None):
        seen.append((preset.name, rate, preset.parameters))
        raise UnstableError("stopped by the test's spy", "stability")

    monkeypatch.setattr(host_guard, "guard", spy)
    status = cli.main(["render", "porch-pluck", "--rate", "96000", "--out", str(tmp_path / "x.wav")])
    assert status == 2                               # the spy's refusal, as a user would see it
    assert [(n, r) for n, r, _ in seen] == [("porch-pluck", 96000.0)]


def test_render_set_value_is_what_the_guard_checks(tmp_path, monkeypatch):
    preset = load_preset(FACTORY_DIR / "porch-pluck.json")
    name, spec = next(iter(preset.parameters.items()))
    value = spec.lo + 0.25 * (spec.hi - spec.lo)
    seen = []

    def spy(preset, allow_unstable=False, rate=48000.0, time_limit_s=0.0, progress=None):
        seen.append(preset.parameters[name].value)
        raise UnstableError("stopped by the test's spy", "stability")

    monkeypatch.setattr(host_guard, "guard", spy)
    cli.main(["render", "porch-pluck", "--set", f"{name}={value!r}", "--out", str(tmp_path / "x.wav")])
    assert seen == [pytest.approx(value)]

"""``sheafsynth new NAME --kind|--from``: a starting preset that passes the check, written safely."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys

import pytest

from sheafsynth.engine.analysis.report import check
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.host.commands.new import KINDS


def _run(user_dir, *args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, SHEAFSYNTH_USER_DIR=str(user_dir))
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "new", *args], capture_output=True,
                          text=True, timeout=300, env=env)


@pytest.mark.slow
@pytest.mark.parametrize("kind", sorted(KINDS))
def test_a_new_preset_of_every_kind_passes_the_check_and_is_in_tune(tmp_path, kind):
    r = _run(tmp_path, f"my-{kind}", "--kind", kind)
    assert r.returncode == 0, r.stderr
    path = tmp_path / f"my-{kind}.json"
    doc = json.loads(path.read_text(encoding="utf-8"))
    assert doc["version"] == 2 and doc["name"] == f"my-{kind}"
    # every part explains itself
    assert doc["about"] and all(c.get("about") for c in doc["cells"])
    assert all(p.get("about") for p in doc["parameters"].values())
    report = check(load_checked(path), use_cache=False, time_limit_s=600)
    assert report["stable"] and report["certified"] is not False, report
    # The tuned design rings at the played note: MIDI tuning, A4 = 440 Hz at note 69
    # (MIDI 1.0 specification, note numbers; ISO 16 for A4 = 440 Hz).
    note = report["mode_note"]
    want = 440.0 * 2.0 ** ((note - 69) / 12.0)
    fund = [m for m in report["modes"] if m["fundamental"]]
    assert fund, report["modes"]
    cents = 1200.0 * math.log2(fund[0]["freq_hz"] / want)
    assert abs(cents) < 10.0, (kind, note, fund[0]["freq_hz"], want)


def test_a_copy_from_a_factory_preset_is_version2_and_loads(tmp_path):
    r = _run(tmp_path, "my copy", "--from", "porch-pluck")
    assert r.returncode == 0, r.stderr
    p = load_checked(tmp_path / "my copy.json")
    assert p.name == "my copy" and p.about.startswith("Started from porch-pluck.")
    assert json.loads((tmp_path / "my copy.json").read_text(encoding="utf-8"))["version"] == 2


def test_an_existing_file_is_refused_and_left_byte_identical(tmp_path):
    target = tmp_path / "taken.json"
    original = b'{"not": "a preset, and must survive"}\n'
    target.write_bytes(original)
    r = _run(tmp_path, "taken", "--kind", "string")
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "already exists" in r.stderr and "Traceback" not in r.stderr
    assert target.read_bytes() == original
    assert sorted(x.name for x in tmp_path.iterdir()) == ["taken.json"]     # no temp file left


@pytest.mark.parametrize("name", ["", "../escape", "a/b", "_under-first", "x" * 65, "porch-pluck"])
def test_a_bad_or_factory_name_gets_one_line_and_exit_2(tmp_path, name):
    r = _run(tmp_path, name, "--kind", "drum")
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "name" in r.stderr and "Traceback" not in r.stderr
    assert list(tmp_path.iterdir()) == []


def test_an_unknown_source_preset_gets_one_line(tmp_path):
    r = _run(tmp_path, "fine", "--from", "no-such-preset-here")
    assert r.returncode == 2 and r.stderr.count("\n") == 1
    assert list(tmp_path.iterdir()) == []

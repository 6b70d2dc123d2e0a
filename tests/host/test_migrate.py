"""``sheafsynth migrate FILE``: version 1 -> 2 in place, original kept, same sound at 48 kHz."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np

from sheafsynth.engine.instrument import Instrument, render_notes
from sheafsynth.engine.preset import load_preset
from tests.golden.phrases import V1_DIR


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", *args], capture_output=True, text=True,
                          timeout=300)


def _take(source) -> np.ndarray:
    inst = Instrument(load_preset(source), rate=48000, max_block=256, seed=5)
    return render_notes(inst, [(0.0, 50, 100, 0.5)], 0.8)


def test_a_version1_file_becomes_version2_and_keeps_its_sound(tmp_path):
    src = V1_DIR / "cedar-box.json"
    target = tmp_path / "cedar-box.json"
    shutil.copy(src, target)
    r = _run("migrate", str(target))
    assert r.returncode == 0, r.stderr
    assert "version 1 to 2" in r.stdout
    doc = json.loads(target.read_text())
    assert doc["version"] == 2 and doc["design_rate"] == 48000
    keep = tmp_path / "cedar-box.v1.json"
    assert keep.read_bytes() == src.read_bytes()                 # the original, byte for byte
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
    assert np.array_equal(_take(target), _take(src))             # sample for sample at 48 kHz
    again = _run("migrate", str(target))
    assert again.returncode == 0 and "already format version 2" in again.stdout


def test_migrate_refuses_without_touching_anything(tmp_path):
    target = tmp_path / "porch-pluck.json"
    shutil.copy(V1_DIR / "porch-pluck.json", target)
    (tmp_path / "porch-pluck.v1.json").write_text("an older backup\n")
    before = target.read_bytes()
    r = _run("migrate", str(target))
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "already exists" in r.stderr
    assert target.read_bytes() == before

    newer = tmp_path / "newer.json"
    doc = json.loads(before)
    doc["version"] = 3
    newer.write_text(json.dumps(doc))
    r = _run("migrate", str(newer))
    assert r.returncode == 2 and "version 3" in r.stderr and "Traceback" not in r.stderr

    broken = tmp_path / "broken.json"
    broken.write_text('{"format": "sheafsynth-preset", "version": 1,')
    r = _run("migrate", str(broken))
    assert r.returncode == 2 and "broken.json" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "broken.v1.json").exists() and not (tmp_path / "newer.v3.json").exists()

"""The package installs like any Python package and runs from any folder.

A wheel is built from this checkout, installed (not editable) into a fresh
virtual environment, and the installed ``sheafsynth`` command renders, checks
and runs the demo from an unrelated folder.  Site-packages must then hold the
one ``sheafsynth`` namespace and nothing generic (no top-level ``engine`` or
``host``).  Packaging facts follow the Python Packaging User Guide (wheel
layout, console scripts) and PEP 420 (implicit namespace packages).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import sysconfig
import tomllib
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


def _run(cmd, **kw):
    kw.setdefault("timeout", 900)     # a bound on a hang, not a speed check
    r = subprocess.run(cmd, capture_output=True, text=True, stdin=subprocess.DEVNULL, **kw)
    assert r.returncode == 0, f"{cmd} exited {r.returncode}:\n{r.stdout[-3000:]}\n{r.stderr[-3000:]}"
    return r


def test_every_package_folder_is_listed_in_pyproject():
    """Each folder of engine/ and host/ with an __init__.py is a listed package (else a wheel drops it)."""
    listed = set(tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    on_disk = {"sheafsynth." + ".".join(p.parent.relative_to(REPO).parts)
               for top in ("engine", "host") for p in (REPO / top).rglob("__init__.py")}
    assert on_disk <= listed, f"missing from pyproject packages: {sorted(on_disk - listed)}"
    assert {p for p in listed if p.startswith(("sheafsynth.engine", "sheafsynth.host"))} <= on_disk


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), str(REPO)],
         cwd=str(out))
    (whl,) = out.glob("sheafsynth-*.whl")
    return whl


def test_wheel_ships_one_namespace_with_its_data(wheel):
    names = zipfile.ZipFile(wheel).namelist()
    tops = {n.split("/")[0] for n in names if not n.split("/")[0].endswith((".dist-info", ".data"))}
    assert tops == {"sheafsynth"}, tops
    for needed in ("sheafsynth/csrc/ss_abi.h", "sheafsynth/csrc/host_rt.c", "sheafsynth/presets/porch-pluck.json",
                   "sheafsynth/engine/preset/schema/preset-v1.json", "sheafsynth/engine/preset/schema/preset-v2.json",
                   "sheafsynth/engine/analysis/schema/check-report.json"):
        assert needed in names, f"{needed} is not in the wheel"
    assert "sheafsynth/__init__.py" not in names      # PEP 420 namespace: nothing of ours at the top


@pytest.mark.slow
def test_installed_wheel_runs_from_another_folder(wheel, tmp_path):
    venv = tmp_path / "venv"
    _run([sys.executable, "-m", "venv", str(venv)])
    py = venv / "bin" / "python"
    _run([str(py), "-m", "pip", "install", "-q", "--no-deps", "--no-index", str(wheel)])
    site = Path(_run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"]).stdout.strip())
    # The dependencies come from this interpreter's site-packages through a path entry; a path entry's own
    # .pth files are not run (site module docs), so an editable install of this checkout stays out of sight.
    (site / "sheafsynth-test-deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")

    assert not (site / "engine").exists() and not (site / "host").exists()
    assert not (site / "sheafsynth" / "__init__.py").exists()
    assert {p.name for p in (site / "sheafsynth").iterdir()} >= {"engine", "host", "csrc", "presets"}

    work = tmp_path / "elsewhere"
    work.mkdir()
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH",)}
    env["SHEAFSYNTH_CACHE_DIR"] = str(tmp_path / "cache")
    env["SHEAFSYNTH_USER_DIR"] = str(tmp_path / "user")
    where = _run([str(py), "-c", "import sheafsynth.engine, sheafsynth.host.cli as c; print(sheafsynth.engine.__file__);"
                  "print(c.__file__)"], cwd=str(work), env=env).stdout.split()
    assert all(Path(w).is_relative_to(site) for w in where), where

    exe = str(venv / "bin" / "sheafsynth")
    _run([exe, "render", "porch-pluck", "--note", "60", "--seconds", "1", "--out", "note.wav"], cwd=str(work), env=env)
    assert (work / "note.wav").stat().st_size > 44 + 48000 * 3 * 0.9
    report = json.loads(_run([exe, "check", "porch-pluck", "--json"], cwd=str(work), env=env).stdout)
    assert report["stable"] is True
    _run([exe, "demo", "--out-dir", "demo"], cwd=str(work), env=env)
    assert len(list((work / "demo").glob("*.wav"))) == len(list((REPO / "presets").glob("*.json")))

"""``sheafsynth export --lv2``: refusals, one-line errors, atomic bundles, strict build, Turtle escaping.

Each bad input gets one line on stderr and a non-zero status, and leaves
nothing half-written: no bundle, no temporary folder, an older bundle of
the same name untouched.  Turtle escaping is judged by lilv's own parser
(lv2info prints the name it read back).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path

import pytest

from sheafsynth.engine.preset.load import factory_presets
from sheafsynth.host.cli import EXIT_BAD_INPUT, EXIT_BUILD, main

#: A generous bound for the stability check: its verdict must not depend on how busy the machine is.
SLOW_OK = ("--time-limit", "300")


def _loop_preset(tmp_path: Path, gain: tuple[float, float, float], name: str, unit: str = "gain") -> Path:
    """A 32-sample delay fed back on itself: a loop gain above 1 grows without bound (radius g^(1/32))."""
    value, lo, hi = gain
    doc = {"format": "sheafsynth-preset", "version": 1, "name": name, "about": "an export test loop",
           "polyphony": 2,
           "parameters": {"g": {"value": value, "min": lo, "max": hi, "unit": unit}},
           "cells": [{"id": "loop", "kind": "delay", "length": 32}],
           "wires": [{"from": "excite", "to": "loop"}, {"from": "loop", "to": "loop", "gain": "g"},
                     {"from": "loop", "to": "out", "gain": 0.5}],
           "excitation": {"kind": "noise", "length": "period"}}
    path = tmp_path / "loop.json"
    path.write_text(json.dumps(doc), encoding="utf-8")
    return path


def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    errors = [ln for ln in err if ln.startswith("sheafsynth:")]
    assert len(errors) == 1, err
    return errors[0]


def _logging_compiler(tmp_path: Path) -> tuple[Path, Path]:
    """A CC that logs its arguments, then runs the system compiler (or fails on request)."""
    log = tmp_path / "cc.log"
    cc = tmp_path / "logcc"
    real = shutil.which("cc") or shutil.which("gcc")
    cc.write_text(f'#!/bin/sh\necho "$@" >> "{log}"\nif [ -e "{tmp_path}/fail" ]; then echo "error: refused on '
                  f'purpose" >&2; exit 1; fi\nexec "{real}" "$@"\n', encoding="utf-8")
    cc.chmod(0o755)
    return cc, log


def test_unknown_preset_is_one_line(tmp_path, capsys):
    out = tmp_path / "bundles"
    assert main(["export", "no-such-preset-here", "--lv2", str(out), "--rates", "48000"]) == EXIT_BAD_INPUT
    assert "no-such-preset-here" in _one_line(capsys)
    assert not out.exists()


@pytest.mark.parametrize("option, value", [("--rates", "48000,22050"), ("--time-limit", "-1")])
def test_bad_options_are_one_line(tmp_path, capsys, option, value):
    assert main(["export", str(factory_presets()[0]), "--lv2", str(tmp_path), option, value]) == EXIT_BAD_INPUT
    assert value.split(",")[-1] in _one_line(capsys)
    assert list(tmp_path.iterdir()) == []


def test_unwritable_folder_is_one_line(tmp_path, capsys):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    # a folder below a regular file cannot be made, not even by root
    rc = main(["export", str(_loop_preset(tmp_path, (0.5, 0.2, 0.6), "quiet loop")), "--lv2",
               str(blocker / "sub"), "--rates", "48000", *SLOW_OK])
    assert rc == EXIT_BUILD
    assert str(blocker / "sub") in _one_line(capsys)
    assert blocker.read_text() == "not a folder"


def test_unstable_preset_is_refused_unless_allowed(tmp_path, capsys):
    preset = _loop_preset(tmp_path, (1.5, 1.2, 1.6), "runaway loop")
    out = tmp_path / "bundles"
    assert main(["export", str(preset), "--lv2", str(out), "--rates", "48000", *SLOW_OK]) == EXIT_BAD_INPUT
    assert "unstable" in _one_line(capsys)
    assert not out.exists()
    assert main(["export", str(preset), "--lv2", str(out), "--rates", "48000", "--allow-unstable"]) == 0
    assert sorted(p.name for p in (out / "runaway-loop.lv2").iterdir()) == \
        ["manifest.ttl", "runaway-loop.so", "runaway-loop.ttl"]


def test_strict_build_failed_compile_and_atomic_replace(tmp_path, capsys, monkeypatch):
    cc, log = _logging_compiler(tmp_path)
    monkeypatch.setenv("CC", str(cc))
    preset = _loop_preset(tmp_path, (0.5, 0.2, 0.6), "quiet loop")
    out = tmp_path / "bundles"
    assert main(["export", str(preset), "--lv2", str(out), "--rates", "48000", *SLOW_OK]) == 0
    lines = log.read_text().splitlines()
    wrapper = [ln for ln in lines if "ss_lv2.c" in ln]
    assert len(wrapper) == 1
    compiles = [ln.split() for ln in lines if " -c " in f" {ln} "]
    assert len(compiles) == 2                                # the kernel and the wrapper
    for argv in compiles:
        assert {"-Wall", "-Wextra", "-Werror"} <= set(argv)
    bundle = out / "quiet-loop.lv2"
    before = {p.name: p.read_bytes() for p in bundle.iterdir()}

    # A failing compiler: one line, status 4, the old bundle untouched, no temporary folder left.
    capsys.readouterr()
    (tmp_path / "fail").write_text("")
    again = ["export", str(preset), "--lv2", str(out), "--rates", "48000", "--set", "g=0.3", *SLOW_OK]
    assert main(again) == EXIT_BUILD
    line = _one_line(capsys)
    assert "refused on purpose" in line and "kernel at 48000 Hz" in line
    assert [p.name for p in out.iterdir()] == ["quiet-loop.lv2"]
    assert {p.name: p.read_bytes() for p in bundle.iterdir()} == before

    # A working compiler again: the bundle is replaced whole (the new default is in its description).
    (tmp_path / "fail").unlink()
    assert main(again) == 0
    assert [p.name for p in out.iterdir()] == ["quiet-loop.lv2"]
    ttl = (bundle / "quiet-loop.ttl").read_text()
    assert "lv2:default 0.3 ;" in ttl and "lv2:default 0.5 ;" not in ttl


def test_turtle_labels_are_escaped(tmp_path):
    if shutil.which("lv2info") is None:
        pytest.skip("lv2info (lilv-utils) is not installed; .ci/run installs it")
    name = 'Quote "q" back\\slash\ttab é'
    unit = 'odd "unit" \\'
    preset = _loop_preset(tmp_path, (0.5, 0.2, 0.6), name, unit)
    out = tmp_path / "bundles"
    assert main(["export", str(preset), "--lv2", str(out), "--rates", "48000", *SLOW_OK]) == 0
    proc = subprocess.run(["lv2info", "urn:sheafsynth:lv2:quote-q-back-slash-tab"], capture_output=True,
                          text=True, timeout=60, env=dict(os.environ, LV2_PATH=str(out)))
    assert proc.returncode == 0, proc.stderr
    # lilv's Turtle reader gives back exactly the text we escaped
    assert f"Name:              sheafsynth {name}\n" in proc.stdout

"""Program numbers shown from 1; program changes in a rendered MIDI file are reported, not dropped silently."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import mido

from sheafsynth.engine.preset.load import factory_presets


def _cli(user_dir, *args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, SHEAFSYNTH_USER_DIR=str(user_dir))
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", *args], capture_output=True, text=True,
                          timeout=300, env=env, stdin=subprocess.DEVNULL)


def test_presets_are_numbered_from_1_and_json_gives_the_midi_byte(tmp_path):
    # A Program Change carries a data byte 0-127; programs are numbered 1-128 for people
    # (General MIDI 1 specification, MMA 1991, "Program numbers 1-128"; MIDI 1.0 Detailed Specification).
    names = sorted(p.stem for p in factory_presets())
    r = _cli(tmp_path, "presets", "--json")
    assert r.returncode == 0, r.stderr
    listed = json.loads(r.stdout)
    assert [e["name"] for e in listed] == names
    assert [e["number"] for e in listed] == list(range(1, len(names) + 1))
    assert [e["program"] for e in listed] == [n - 1 for n in range(1, len(names) + 1)]
    r = _cli(tmp_path, "presets")
    rows = [ln.split() for ln in r.stdout.splitlines() if ln.split() and ln.split()[0].isdigit()]
    assert [(int(x[0]), x[1]) for x in rows] == list(zip(range(1, len(names) + 1), names))


def test_program_changes_in_a_rendered_midi_file_are_reported(tmp_path):
    mid = mido.MidiFile(type=0)
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    tr.append(mido.Message("program_change", program=4, time=0))
    tr.append(mido.Message("note_on", note=60, velocity=100, time=0))
    tr.append(mido.Message("program_change", program=0, time=120))
    tr.append(mido.Message("note_off", note=60, velocity=0, time=240))
    tr.append(mido.Message("program_change", program=4, time=0))
    path = tmp_path / "changes.mid"
    mid.save(path)
    count = sum(1 for m in mido.MidiFile(path) if m.type == "program_change")   # mido reads back what we wrote
    r = _cli(tmp_path, "render", "porch-pluck", "--midi", str(path), "--out", str(tmp_path / "x.wav"))
    assert r.returncode == 0, r.stderr
    line = next(ln for ln in r.stderr.splitlines() if "program change" in ln)
    assert f"ignored {count} program change(s)" in line and "(programs 1, 5)" in line
    assert (tmp_path / "x.wav").exists()

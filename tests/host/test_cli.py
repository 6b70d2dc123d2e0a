"""The command line: render, MIDI files, inspect, presets, demo, errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import mido
import numpy as np
import pytest
import soundfile as sf

import sheafsynth.host.commands as pkg
from sheafsynth.host.cli import COMMANDS, main
from tests.measure import cents, fundamental


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", *args], capture_output=True, text=True,
                          cwd=cwd, timeout=900)


def test_render_note_writes_a_wav(tmp_path):
    out = tmp_path / "note.wav"
    assert main(["render", "porch-pluck", "--note", "57", "--velocity", "100", "--seconds", "1",
                 "--out", str(out)]) == 0
    x, rate = sf.read(out)
    assert rate == 48000 and len(x) == 48000
    f = fundamental(x[4800:36000], rate, 220.0)
    assert abs(cents(f, 220.0)) < 0.5          # MIDI note 57 = A3 = 220 Hz (MIDI numbering, ISO 16)


@pytest.mark.parametrize("rate", [44100, 96000])
def test_render_other_rates_stay_in_tune(tmp_path, rate):
    out = tmp_path / "r.wav"
    assert main(["render", "lantern-harp", "--note", "69", "--rate", str(rate), "--seconds", "1",
                 "--out", str(out)]) == 0
    x, r = sf.read(out)
    assert r == rate
    assert abs(cents(fundamental(x[r // 10: int(r * 0.7)], r, 440.0), 440.0)) < 0.5


def _smf(path, midi_type: int):
    """A small Standard MIDI File: a note, sustain pedal, a bend, a mapped CC (SMF 1.0 via mido)."""
    mid = mido.MidiFile(type=midi_type, ticks_per_beat=480)
    tempo = mido.bpm2tempo(120)
    t0 = mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=tempo)])
    notes = mido.MidiTrack() if midi_type == 1 else t0
    notes += [mido.Message("note_on", note=60, velocity=100, time=0),
              mido.Message("control_change", control=64, value=127, time=240),
              mido.Message("note_off", note=60, velocity=0, time=240),
              mido.Message("control_change", control=74, value=10, time=120),
              mido.Message("pitchwheel", pitch=4096, time=120),
              mido.Message("control_change", control=64, value=0, time=480)]
    mid.tracks.append(t0)
    if midi_type == 1:
        mid.tracks.append(notes)
    mid.save(str(path))
    return path


@pytest.mark.parametrize("midi_type", [0, 1])
def test_render_midi_file(tmp_path, midi_type):
    mid = _smf(tmp_path / f"take{midi_type}.mid", midi_type)
    out = tmp_path / "take.wav"
    assert main(["render", "lantern-harp", "--midi", str(mid), "--out", str(out)]) == 0
    x, rate = sf.read(out)
    assert len(x) > rate * 1.2          # 1.25 s of events plus a release tail
    assert np.isfinite(x).all() and np.abs(x).max() > 0.01
    # the pedal held the note past its note-off (t = 0.5 s): still sounding at 0.9 s
    assert np.abs(x[int(0.85 * rate):int(0.95 * rate)]).max() > 1e-3
    # half-way bend (pitch 4096 of 8192 at +-2 semitones = +1 semitone) from t = 0.875 s
    seg = x[int(0.95 * rate):int(1.2 * rate)]
    want = 261.6255653005986 * 2 ** (1 / 12)
    assert abs(cents(fundamental(seg, rate, want), want)) < 3.0


def test_render_is_deterministic(tmp_path):
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    for p in (a, b):
        assert main(["render", "cedar-box", "--note", "50", "--seconds", "0.5", "--seed", "3", "--out", str(p)]) == 0
    assert np.array_equal(sf.read(a)[0], sf.read(b)[0])


def test_set_outside_range_is_refused(tmp_path, capsys):
    rc = main(["render", "lantern-harp", "--set", "tone=0.9", "--out", str(tmp_path / "x.wav")])
    err = capsys.readouterr().err
    assert rc == 2 and "parameters.tone" in err and "outside" in err
    assert not (tmp_path / "x.wav").exists()


def test_bad_preset_exit_2_with_path_and_no_traceback(tmp_path):
    bad = tmp_path / "bad.json"
    doc = json.load(open("presets/porch-pluck.json"))
    doc["wires"][1]["gain"] = "decya"
    bad.write_text(json.dumps(doc))
    r = run("render", str(bad), "--out", str(tmp_path / "x.wav"))
    assert r.returncode == 2
    assert 'wires[1].gain: unknown parameter "decya"' in r.stderr
    assert "Traceback" not in r.stderr


def test_unknown_preset_name_lists_known_ones():
    r = run("render", "no-such-instrument")
    assert r.returncode == 2 and "porch-pluck" in r.stderr and "Traceback" not in r.stderr


def test_bad_midi_file_is_a_clear_error(tmp_path):
    f = tmp_path / "broken.mid"
    f.write_bytes(b"MThd\x00\x00\x00\x06garbage")
    r = run("render", "porch-pluck", "--midi", str(f), "--out", str(tmp_path / "x.wav"))
    assert r.returncode == 2 and "broken.mid" in r.stderr and "Traceback" not in r.stderr


def test_inspect_shows_stalks_and_restriction_maps(capsys):
    assert main(["inspect", "lantern-harp"]) == 0
    out = capsys.readouterr().out
    assert "stalk 2" in out and "output [D C]" in out and "1 - tone" in out and "moves: damp" in out


def test_presets_lists_factory_and_user(user_dir, capsys):
    user_dir.mkdir(parents=True)
    (user_dir / "broken.json").write_text("{nope")
    assert main(["presets"]) == 0
    out = capsys.readouterr().out
    for name in ("porch-pluck", "lantern-harp", "cedar-box"):
        assert name in out
    assert "broken" in out and "unusable" in out
    assert (user_dir / "broken.json").exists()     # reported, never deleted


def test_demo_renders_every_factory_preset(tmp_path):
    from sheafsynth.engine.preset import factory_presets

    r = run("demo", "--out-dir", str(tmp_path / "demo"))
    assert r.returncode == 0, r.stderr
    assert "Caution" in r.stdout
    for p in factory_presets():
        x, rate = sf.read(tmp_path / "demo" / f"{p.stem}.wav")
        assert np.isfinite(x).all() and 0.01 < np.abs(x).max() <= 0.8913


def test_every_command_module_is_in_the_table_by_name():
    """host/commands/<name>.py is the command <name>, and cli.COMMANDS lists each one once
    (a command module that fails to import must break the CLI, not vanish from it)."""
    modules = {p.stem for p in Path(pkg.__file__).parent.glob("*.py")} - {"__init__", "shared"}
    names = [c.name for c in COMMANDS]
    assert sorted(names) == sorted(modules) and len(set(names)) == len(names)


def plain_loop_file(tmp_path) -> Path:
    """A delay of 100 samples in feedback with gain 0.99 (partials at k·48000/100 Hz)."""
    doc = {"format": "sheafsynth-preset", "version": 1, "name": "plain-loop", "polyphony": 2,
           "cells": [{"id": "line", "kind": "delay", "length": 100}],
           "wires": [{"from": "excite", "to": "line"}, {"from": "line", "to": "line", "gain": 0.99},
                     {"from": "line", "to": "out"}],
           "excitation": {"kind": "impulse"}}
    path = tmp_path / "plain-loop.json"
    path.write_text(json.dumps(doc))
    return path


def test_check_modes_sets_how_many_partials_are_listed(tmp_path, capsys):
    """A cyclic shift of N samples with gain g has its poles at g^(1/N)·e^(2πik/N):
    the lowest partial is fs/N = 480 Hz, every partial a harmonic of it."""
    path = plain_loop_file(tmp_path)
    assert main(["check", str(path), "--json", "--modes", "5", "--no-cache"]) == 0
    ms = json.loads(capsys.readouterr().out)["modes"]
    assert len(ms) == 5 and ms[0]["freq_hz"] == pytest.approx(480.0, rel=1e-9) and ms[0]["fundamental"]
    assert all(abs(m["cents_from_harmonic"]) < 1e-6 and m["amplitude_db"] is not None for m in ms)
    assert main(["check", str(path), "--modes", "3", "--no-cache"]) == 0
    out = capsys.readouterr().out
    assert "ampl dB" in out and "energy dB" in out and "T60 s" in out
    assert "480.000   B4" in out


@pytest.mark.parametrize("bad", ["0", "65", "many"])
def test_check_modes_out_of_range_is_one_line(tmp_path, capsys, bad):
    assert main(["check", str(plain_loop_file(tmp_path)), "--modes", bad]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "--modes" in err and "1 to 64" in err

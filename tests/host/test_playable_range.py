"""Playable range and key-to-sound latency, offline.

A preset declares the notes it plays (``notes``: lowest, highest MIDI note).
``render --note`` outside that range is refused with exit status 2 and one
line naming the range; a MIDI file render skips such notes and says how
many and which; the translator (shared with live play) drops and counts
them.  The latency figures ``play`` reports are checked here against their
definition: one block of event delay (buffer / rate) plus the output
latency PortAudio reports.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import mido
import numpy as np
import pytest
import soundfile as sf

from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.preset import load_preset
from sheafsynth.host.controls import MidiTranslator
from sheafsynth.host.live.report import latency_ms, latency_text
from sheafsynth.host.live.status import StatusInfo, format_status

REPO = Path(__file__).resolve().parents[2]
PRESET = "crate-bar"          # declares notes 33-62


def cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    """``python -m sheafsynth.host.cli ARGS`` as a user runs it (exit status, stdout, stderr)."""
    env = dict(os.environ)
    env.pop("SHEAFSYNTH_DEBUG", None)
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=600)


def midi_file(path: Path, chords: list[list[int]]) -> Path:
    """A type-0 Standard MIDI File (mido): each chord's notes start together and last 0.2 s, velocity 100."""
    mid = mido.MidiFile(type=0, ticks_per_beat=480)        # 120 bpm default tempo: 192 ticks = 0.2 s
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    for chord in chords:
        for n in chord:
            tr.append(mido.Message("note_on", note=n, velocity=100, time=0))
        for k, n in enumerate(chord):
            tr.append(mido.Message("note_off", note=n, velocity=0, time=192 if k == 0 else 0))
    mid.save(str(path))
    return path


# ---------------------------------------------------------------- render --note

def test_render_note_outside_the_range_exits_2_naming_the_range(tmp_path):
    preset = load_preset(FACTORY_DIR / f"{PRESET}.json")
    lo, hi = preset.notes
    r = cli("render", PRESET, "--note", str(hi + 22), "--out", str(tmp_path / "x.wav"), cwd=tmp_path)
    assert r.returncode == 2, r.stderr                 # exit status 2: bad input (the CLI's rule)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr                   # one line, no traceback
    assert f"--note {hi + 22}" in lines[0] and f"{lo}-{hi}" in lines[0], lines[0]
    assert not (tmp_path / "x.wav").exists()


def test_render_note_at_the_range_ends_plays(tmp_path):
    preset = load_preset(FACTORY_DIR / f"{PRESET}.json")
    lo, hi = preset.notes
    for note in (lo, hi):
        out = tmp_path / f"{note}.wav"
        r = cli("render", PRESET, "--note", str(note), "--seconds", "0.3", "--out", str(out), cwd=tmp_path)
        assert r.returncode == 0, r.stderr
        x, fs = sf.read(str(out))
        assert fs == 48000 and len(x) == int(0.3 * 48000) and np.max(np.abs(x)) > 1e-3


# ---------------------------------------------------------------- render --midi

def test_midi_render_skips_out_of_range_notes_and_says_which(tmp_path):
    """Out-of-range notes played together with in-range ones: the file renders sample for sample
    as the same file without them, and stderr names how many were skipped and which."""
    preset = load_preset(FACTORY_DIR / f"{PRESET}.json")
    lo, hi = preset.notes
    mid = (lo + hi) // 2
    mixed = midi_file(tmp_path / "mixed.mid", [[lo, hi + 22], [mid], [hi, lo - 5, hi + 22]])
    clean = midi_file(tmp_path / "clean.mid", [[lo], [mid], [hi]])
    r = cli("render", PRESET, "--midi", str(mixed), "--out", str(tmp_path / "mixed.wav"), cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if "skipped" in ln]
    assert len(lines) == 1, r.stderr
    assert "skipped 3 note(s)" in lines[0] and f"{lo}-{hi}" in lines[0], lines[0]
    assert lines[0].endswith(f": {lo - 5}, {hi + 22}"), lines[0]
    r = cli("render", PRESET, "--midi", str(clean), "--out", str(tmp_path / "clean.wav"), cwd=tmp_path)
    assert r.returncode == 0 and "skipped" not in r.stderr, r.stderr
    a, _ = sf.read(str(tmp_path / "mixed.wav"), dtype="float32")
    b, _ = sf.read(str(tmp_path / "clean.wav"), dtype="float32")
    assert np.max(np.abs(b)) > 1e-3
    assert a.shape == b.shape and np.array_equal(a, b), "the in-range notes did not render as without the others"


# ---------------------------------------------------------------- the translator

def test_translator_drops_and_counts_out_of_range_note_ons():
    """Note-on with velocity 0 is a note-off (MIDI 1.0 Detailed Specification, MMA): it passes, as do note-offs."""
    preset = load_preset(FACTORY_DIR / f"{PRESET}.json")
    lo, hi = preset.notes
    tr = MidiTranslator(preset, lower(preset).param_index)
    assert tr.translate(mido.Message("note_on", note=hi + 1, velocity=90)) == []
    assert tr.translate(mido.Message("note_on", note=lo - 1, velocity=90)) == []
    assert tr.translate(mido.Message("note_on", note=hi + 1, velocity=90)) == []
    assert tr.counters.out_of_range == 3 and tr.counters.out_of_range_notes == {lo - 1, hi + 1}
    assert tr.counters.ignored == 0                  # counted apart from unknown messages
    got = tr.translate(mido.Message("note_on", note=hi, velocity=90))
    assert [e[1:3] for e in got if e[1] == V.EV_NOTE_ON] == [(V.EV_NOTE_ON, hi)]
    # velocity 0 passes as it came (the kernel ends the note, as for a note-off)
    assert [e[1:4] for e in tr.translate(mido.Message("note_on", note=hi + 1, velocity=0))] == [
        (V.EV_NOTE_ON, hi + 1, 0)]
    assert [e[1] for e in tr.translate(mido.Message("note_off", note=hi + 1))] == [V.EV_NOTE_OFF]
    assert tr.counters.out_of_range == 3


# ---------------------------------------------------------------- latency figures

@pytest.mark.parametrize("buffer, rate, output_s", [(128, 48000.0, 0.0053), (256, 44100.0, 0.0116),
                                                    (64, 96000.0, 0.0)])
def test_key_to_sound_is_one_block_plus_the_output_latency(buffer, rate, output_s):
    """Event delay: one block (csrc/host_rt.c places events one block after arrival); the output
    latency is the stream's (PortAudio Pa_GetStreamInfo outputLatency); ms = 1000 s."""
    lat = latency_ms(buffer, rate, output_s)
    assert set(lat) == {"event_delay_ms", "output_ms", "key_to_sound_ms"}
    assert lat["event_delay_ms"] == pytest.approx(1000.0 * buffer / rate)
    assert lat["output_ms"] == pytest.approx(1000.0 * output_s)
    assert lat["key_to_sound_ms"] == pytest.approx(lat["event_delay_ms"] + lat["output_ms"])
    assert f"{lat['key_to_sound_ms']:.1f} ms" in latency_text(lat)


def test_latency_without_a_stream_is_unknown_not_zero():
    lat = latency_ms(128, 48000.0, None)
    assert lat["output_ms"] is None and lat["key_to_sound_ms"] is None
    assert "did not report" in latency_text(lat)


def test_status_line_shows_latency_and_out_of_range_notes():
    line = format_status(StatusInfo("crate-bar", None, 1, 8, 0.1, 0.2, 0, 0.5, "", "virtual port 'x'",
                                    latency_ms=8.0, out_of_range=2))
    assert "latency 8.0 ms" in line and "2 note(s) out of range" in line
    quiet = format_status(StatusInfo("crate-bar", None, 1, 8, 0.1, 0.2, 0, 0.5, "", "x"))
    assert "out of range" not in quiet and "latency" not in quiet

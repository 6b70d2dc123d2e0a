"""``sheafsynth demo``: the demo phrase through every factory preset, to WAV files (no sound card needed).

The phrase is (start s, note, velocity, length s) tuples, written as a type 0
Standard MIDI File at 120 BPM and rendered like any MIDI file.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import mido

from sheafsynth.engine.preset import factory_presets, load_preset
from sheafsynth.host.commands.shared import CAUTION, Command, offline_instrument
from sheafsynth.host.offline.render import DEMO_PHRASE, peak_dbfs, render_midi, write_wav

__all__ = ["COMMAND", "write_demo_midi"]


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out-dir", default="sheafsynth-demo", help="folder for the WAV files (default ./sheafsynth-demo)")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 88200, 96000, 192000))
    p.add_argument("--seed", type=int, default=0)


def _run(args: argparse.Namespace) -> int:
    out_dir = Path(args.out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    midi_path = out_dir / "demo-phrase.mid"
    write_demo_midi(midi_path, DEMO_PHRASE)
    print(CAUTION)
    print(f"demo phrase: {midi_path}")
    args.no_limiter = False
    for path in factory_presets():
        preset = load_preset(path)
        inst = offline_instrument(args, preset, knobs_move=False)   # the phrase has notes only
        audio, _ = render_midi(inst, midi_path)
        wav = write_wav(out_dir / f"{path.stem}.wav", audio, inst.rate)
        print(f"  {wav}  {len(audio) / inst.rate:5.2f} s  peak {peak_dbfs(audio):6.1f} dBFS  "
              f"{'(compiled)' if not inst.cached else '(cached kernel)'}")
    return 0


def write_demo_midi(path: Path, phrase) -> None:
    """Write ``phrase`` ((start s, note, velocity, length s), ...) as a type 0 MIDI file at 120 BPM."""
    ticks = 480
    tempo = mido.bpm2tempo(120)
    evs = []
    for start, note, vel, dur in phrase:
        evs.append((start, 1, mido.Message("note_on", note=note, velocity=vel)))
        evs.append((start + dur, 0, mido.Message("note_off", note=note, velocity=0)))
    evs.sort(key=lambda e: (e[0], e[1]))
    track = mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=tempo)])
    last = 0
    for t, _, msg in evs:
        tick = int(round(mido.second2tick(t, ticks, tempo)))
        track.append(msg.copy(time=tick - last))
        last = tick
    mid = mido.MidiFile(type=0, ticks_per_beat=ticks)
    mid.tracks.append(track)
    mid.save(str(path))


COMMAND = Command("demo", "render the demo phrase through every factory preset (no sound card needed)", _add, _run)

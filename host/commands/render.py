"""``sheafsynth render``: one note or a Standard MIDI File to WAV, offline.

Lengths in s, rates in Hz, peaks in dBFS.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from sheafsynth.engine.errors import InputError
from sheafsynth.engine.preset import Preset
from sheafsynth.host.commands.shared import Command, load_preset_arg, offline_instrument, warn_if_unstable
from sheafsynth.host.offline.render import peak_dbfs, render_midi, render_note, write_wav

__all__ = ["COMMAND"]


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--note", type=int, default=None,
                     help="MIDI note to play, inside the preset's playable range "
                          "(default 60, or the middle of the range when 60 is outside it)")
    src.add_argument("--midi", metavar="FILE.mid", help="render a Standard MIDI File (type 0 or 1)")
    p.add_argument("--velocity", type=int, default=100, help="note velocity 1-127 (default 100)")
    p.add_argument("--seconds", type=float, default=2.0,
                   help="length of a single note render (s): the note is held for the first 75 %%, then released")
    p.add_argument("--out", metavar="FILE.wav", help="output WAV file")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 88200, 96000, 192000), help="sample rate (Hz)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="set a parameter (repeatable)")
    p.add_argument("--seed", type=int, default=0, help="noise seed (same seed, same file)")
    p.add_argument("--channel", type=int, default=None, help="MIDI channel 1-16 to take from --midi (default all)")
    p.add_argument("--float", action="store_true", help="write 32-bit float WAV instead of 24-bit PCM")
    p.add_argument("--no-limiter", action="store_true", help="turn the output safety limiter off (not advised)")
    p.add_argument("--allow-unstable", action="store_true", help="render even if the preset is not stable")


def _note(asked: int | None, preset: Preset) -> int:
    """The MIDI note to render: ``asked`` if it lies in the preset's playable range (InputError if not);
    unasked, 60, or the middle of the range when 60 is outside it."""
    lo, hi = preset.notes
    if asked is None:
        return 60 if lo <= 60 <= hi else (lo + hi) // 2
    if not 0 <= asked <= 127:
        raise InputError(f"--note {asked}: MIDI notes are 0-127")
    if not lo <= asked <= hi:
        raise InputError(f"--note {asked}: outside {preset.name}'s playable range {lo}-{hi} "
                         f"(the preset's \"notes\")")
    return asked


def _run(args: argparse.Namespace) -> int:
    preset = load_preset_arg(args.preset, args.set)
    if args.channel is not None and not 1 <= args.channel <= 16:
        raise InputError(f"--channel {args.channel}: MIDI channels are 1-16")
    note = None
    if not args.midi:                       # bad input is refused before the stability guard runs
        note = _note(args.note, preset)
        if not 1 <= args.velocity <= 127:
            raise InputError(f"--velocity {args.velocity}: velocities are 1-127")
        if not 0 < args.seconds <= 600:
            raise InputError(f"--seconds {args.seconds:g}: expected 0 < seconds <= 600")
    warn_if_unstable(args, preset)
    inst = offline_instrument(args, preset)
    stem = Path(preset.source).stem if preset.source.endswith(".json") else "render"
    stats: dict = {}
    if note is None:
        audio, stats = render_midi(inst, args.midi, channel=None if args.channel is None else args.channel - 1)
        out = args.out or f"{stem}-{Path(args.midi).stem}.wav"
    else:
        audio = render_note(inst, note, args.velocity, args.seconds)
        out = args.out or f"{stem}-{note}.wav"
    if stats.get("notes_out_of_range"):
        which = ", ".join(str(n) for n in stats["notes_out_of_range_which"])
        lo, hi = preset.notes
        print(f"sheafsynth: skipped {stats['notes_out_of_range']} note(s) outside {preset.name}'s playable "
              f"range {lo}-{hi}: {which}", file=sys.stderr)
    if stats.get("program_changes_ignored"):
        shown = ", ".join(str(b + 1) for b in stats["program_changes_which"])
        print(f"sheafsynth: ignored {stats['program_changes_ignored']} program change(s) in {args.midi} "
              f"(programs {shown}): a render plays {preset.name} only", file=sys.stderr)
    path = write_wav(out, audio, inst.rate, "FLOAT" if args.float else "PCM_24")
    c = inst.counters
    print(f"wrote {path} ({len(audio) / inst.rate:.2f} s, peak {peak_dbfs(audio):.1f} dBFS"
          + (f", {c['guard_resets']} voice(s) reset by the guard" if c["guard_resets"] else "")
          + (f", {stats['midi_ignored']} MIDI message(s) ignored" if stats.get("midi_ignored") else "") + ")")
    return 0


COMMAND = Command("render", "render a note or a MIDI file to WAV", _add, _run)

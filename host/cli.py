"""The ``sheafsynth`` command line.

Each subcommand is one entry in ``COMMANDS``: a name, a one-line help, a
function that adds its arguments and a function that runs it.  ``main`` is
the single choke point for errors: a SheafsynthError becomes one line on
stderr and an exit status (2 bad input, 3 audio device, 4 build), never a
traceback (set SHEAFSYNTH_DEBUG=1 to see one).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from sheafsynth.engine.errors import AudioError, BuildError, InputError, PresetError, SheafsynthError

CAUTION = ("Caution: physical models can ring, self-oscillate or build up at frequencies the ear "
           "barely hears. Keep the limiter on, start at low volume, protect hearing and speakers.")

EXIT_BAD_INPUT, EXIT_AUDIO, EXIT_BUILD = 2, 3, 4


def _parse_set(items: list[str]) -> dict[str, float]:
    out: dict[str, float] = {}
    for item in items or []:
        name, eq, value = item.partition("=")
        if not eq or not name:
            raise InputError(f"--set {item!r}: expected NAME=VALUE")
        try:
            out[name] = float(value)
        except ValueError:
            raise InputError(f"--set {item!r}: {value!r} is not a number") from None
    return out


def _load(preset_arg: str, sets: list[str] | None = None):
    from sheafsynth.host import bank

    preset = bank.load(preset_arg)
    values = _parse_set(sets)
    if values:
        preset = preset.with_values(values)
    return preset


def _instrument(args, preset, knobs_move: bool = True):
    """An Instrument with the ramp times the stability certificate asks for.

    ``knobs_move=False`` (a take with no controller messages, like the demo
    phrase) needs no ramp limits: no parameter moves while a note sounds.
    """
    from sheafsynth.engine.analysis.report import ramp_limits
    from sheafsynth.engine.instrument import Instrument

    if getattr(args, "no_limiter", False):
        print("warning: the output limiter is OFF. " + CAUTION, file=sys.stderr)
    ramps = ramp_limits(preset, args.rate) if knobs_move else {}
    return Instrument(preset, rate=args.rate, max_block=512, seed=args.seed,
                      limiter=not getattr(args, "no_limiter", False), min_ramp_s=ramps)


def _guard(args, preset) -> None:
    """Refuse presets that are not frozen-stable unless --allow-unstable; print warnings."""
    from sheafsynth.engine.analysis.report import guard

    for line in guard(preset, allow_unstable=getattr(args, "allow_unstable", False)):
        print(f"warning: {line}", file=sys.stderr)


# ---------------------------------------------------------------- render

def _add_render(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--note", type=int, default=None, help="MIDI note to play (0-127; default 60)")
    src.add_argument("--midi", metavar="FILE.mid", help="render a Standard MIDI File (type 0 or 1)")
    p.add_argument("--velocity", type=int, default=100, help="note velocity 1-127 (default 100)")
    p.add_argument("--seconds", type=float, default=2.0, help="length of a single note render (s)")
    p.add_argument("--out", metavar="FILE.wav", help="output WAV file")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 96000), help="sample rate (Hz)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="set a parameter (repeatable)")
    p.add_argument("--seed", type=int, default=0, help="noise seed (same seed, same file)")
    p.add_argument("--channel", type=int, default=None, help="MIDI channel 1-16 to take from --midi (default all)")
    p.add_argument("--float", action="store_true", help="write 32-bit float WAV instead of 24-bit PCM")
    p.add_argument("--no-limiter", action="store_true", help="turn the output safety limiter off (not advised)")
    p.add_argument("--allow-unstable", action="store_true", help="render even if the preset is not stable")


def _run_render(args) -> int:
    from sheafsynth.host.offline.render import render_midi, render_note, write_wav, _peak_dbfs

    preset = _load(args.preset, args.set)
    _guard(args, preset)
    if args.channel is not None and not 1 <= args.channel <= 16:
        raise InputError(f"--channel {args.channel}: MIDI channels are 1-16")
    inst = _instrument(args, preset)
    stem = Path(preset.source).stem if preset.source.endswith(".json") else "render"
    if args.midi:
        audio, stats = render_midi(inst, args.midi, channel=None if args.channel is None else args.channel - 1)
        out = args.out or f"{stem}-{Path(args.midi).stem}.wav"
    else:
        note = 60 if args.note is None else args.note
        if not 0 <= note <= 127:
            raise InputError(f"--note {note}: MIDI notes are 0-127")
        if not 1 <= args.velocity <= 127:
            raise InputError(f"--velocity {args.velocity}: velocities are 1-127")
        if not 0 < args.seconds <= 600:
            raise InputError(f"--seconds {args.seconds:g}: expected 0 < seconds <= 600")
        audio = render_note(inst, note, args.velocity, args.seconds)
        out = args.out or f"{stem}-{note}.wav"
        stats = {}
    path = write_wav(out, audio, inst.rate, "FLOAT" if args.float else "PCM_24")
    c = inst.counters
    print(f"wrote {path} ({len(audio) / inst.rate:.2f} s, peak {_peak_dbfs(audio):.1f} dBFS"
          + (f", {c['guard_resets']} voice(s) reset by the guard" if c["guard_resets"] else "")
          + (f", {stats['midi_ignored']} MIDI message(s) ignored" if stats.get("midi_ignored") else "") + ")")
    return 0


# ---------------------------------------------------------------- inspect

def _add_inspect(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET")
    p.add_argument("--rate", type=int, default=48000)


def _run_inspect(args) -> int:
    from sheafsynth.host.commands.inspect import describe

    print(describe(_load(args.preset), float(args.rate)))
    return 0


# ---------------------------------------------------------------- presets

def _add_presets(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="machine-readable listing")


def _run_presets(args) -> int:
    from sheafsynth.host import bank

    items = bank.entries()
    if args.json:
        print(json.dumps([{"program": i, "name": e.name, "origin": e.origin, "about": e.about,
                           "path": str(e.path), "error": e.error} for i, e in enumerate(items)], indent=2))
        return 0
    width = max((len(e.name) for e in items), default=4)
    for i, e in enumerate(items):
        text = f"unusable: {e.error}" if e.error else e.about
        print(f"{i:>3}  {e.name:<{width}}  {e.origin:<7}  {text}")
    print(f"user presets folder: {bank.user_dir()}")
    return 0


# ---------------------------------------------------------------- demo

def _add_demo(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out-dir", default="sheafsynth-demo", help="folder for the WAV files (default ./sheafsynth-demo)")
    p.add_argument("--rate", type=int, default=48000, choices=(44100, 48000, 96000))
    p.add_argument("--seed", type=int, default=0)


def _run_demo(args) -> int:
    import mido

    from sheafsynth.engine.preset import factory_presets, load_preset

    from sheafsynth.host.offline.render import DEMO_PHRASE, _peak_dbfs, render_midi, write_wav

    out_dir = Path(args.out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    midi_path = out_dir / "demo-phrase.mid"
    _write_demo_midi(midi_path, DEMO_PHRASE, mido)
    print(CAUTION)
    print(f"demo phrase: {midi_path}")
    args.no_limiter = False
    for path in factory_presets():
        preset = load_preset(path)
        inst = _instrument(args, preset, knobs_move=False)   # the phrase has notes only
        audio, _ = render_midi(inst, midi_path)
        wav = write_wav(out_dir / f"{path.stem}.wav", audio, inst.rate)
        print(f"  {wav}  {len(audio) / inst.rate:5.2f} s  peak {_peak_dbfs(audio):6.1f} dBFS  "
              f"{'(compiled)' if not inst.cached else '(cached kernel)'}")
    return 0


def _write_demo_midi(path: Path, phrase, mido) -> None:
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


# ---------------------------------------------------------------- table

COMMANDS: list[tuple[str, str, object, object]] = [
    ("render", "render a note or a MIDI file to WAV", _add_render, _run_render),
    ("inspect", "show a preset's cells, stalks and restriction maps", _add_inspect, _run_inspect),
    ("presets", "list factory and user presets", _add_presets, _run_presets),
    ("demo", "render the demo phrase through every factory preset (no sound card needed)", _add_demo, _run_demo),
]


def _register_optional() -> None:
    """Subcommands that live in their own modules (added when present)."""
    for modname in ("sheafsynth.host.live.play", "sheafsynth.host.commands.check", "sheafsynth.host.bench.run",
                    "sheafsynth.host.commands.jitter"):
        try:
            mod = __import__(modname, fromlist=["COMMAND"])
        except ImportError as e:
            if e.name and e.name.startswith("sheafsynth.host."):
                continue
            raise
        for cmd in getattr(mod, "COMMANDS", []):
            if cmd[0] not in {c[0] for c in COMMANDS}:
                COMMANDS.append(cmd)


def build_parser() -> argparse.ArgumentParser:
    _register_optional()
    parser = argparse.ArgumentParser(
        prog="sheafsynth",
        description="Physical-model instruments as sheaf filter networks: check, compile, play, render.",
        epilog=CAUTION)
    from sheafsynth.engine import __version__

    parser.add_argument("--version", action="version", version=f"sheafsynth {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, help_text, add, run in COMMANDS:
        p = sub.add_parser(name, help=help_text, description=help_text)
        add(p)
        p.set_defaults(_run=run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        return int(args._run(args) or 0)
    except (PresetError, InputError) as e:
        print(f"sheafsynth: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except AudioError as e:
        print(f"sheafsynth: audio: {e}", file=sys.stderr)
        return EXIT_AUDIO
    except BuildError as e:
        print(f"sheafsynth: build: {e}", file=sys.stderr)
        return EXIT_BUILD
    except SheafsynthError as e:
        print(f"sheafsynth: {e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("sheafsynth: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:      # output piped into a program that stopped reading
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 0
    except Exception as e:  # the last line of defence: no traceback for users
        if os.environ.get("SHEAFSYNTH_DEBUG"):
            raise
        print(f"sheafsynth: internal error: {type(e).__name__}: {e} "
              "(please report it; SHEAFSYNTH_DEBUG=1 shows the details)", file=sys.stderr)
        return 70


if __name__ == "__main__":
    sys.exit(main())

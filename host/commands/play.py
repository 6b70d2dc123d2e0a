"""``sheafsynth play``: its arguments and start-up; the session itself is host.live.session.

Rates in Hz, buffers in frames, times in s.
"""

from __future__ import annotations

import argparse

from sheafsynth.host.commands.shared import Command, parse_set, warn_limiter_off
from sheafsynth.host.live.options import PlayOptions
from sheafsynth.host.live.session import LiveHost

__all__ = ["COMMAND", "options_from_args"]


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--midi-in", metavar="NAME", help="MIDI input to read: any port whose name contains NAME")
    src.add_argument("--virtual-midi", metavar="NAME", help="open a MIDI input port of our own called NAME")
    p.add_argument("--midi-api", choices=("alsa", "jack", "coremidi", "winmm"), default=None,
                   help="MIDI system (default: JACK MIDI with JACK audio, else the platform's own)")
    p.add_argument("--device", metavar="NAME", help="audio output: index or part of the name (see `sheafsynth ports`)")
    p.add_argument("--rate", type=int, default=None, help="sample rate in Hz (default: the device's, else 48000)")
    p.add_argument("--buffer", type=int, default=128,
                   help="frames per audio block (default 128); the output opens at buffer / rate latency "
                        "and key to sound is one block more (shown at start-up)")
    p.add_argument("--channel", type=int, default=None, help="MIDI channel 1-16 to listen to (default: all)")
    p.add_argument("--seconds", type=float, default=None, help="stop by itself after this many seconds")
    p.add_argument("--record", metavar="FILE.wav", help="record exactly what goes to the output")
    p.add_argument("--report", metavar="FILE.json", help="write counters (callbacks, xruns, load, MIDI) on exit")
    p.add_argument("--learn", metavar="PARAM", help="bind the next moved knob (CC) to parameter PARAM")
    p.add_argument("--bank-dir", metavar="DIR", help="folder of user presets (default: the user data folder)")
    p.add_argument("--save-as", metavar="NAME", help="on exit, save current values and knob map as user preset NAME")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="start a parameter at VALUE (repeatable)")
    p.add_argument("--seed", type=int, default=0, help="noise seed")
    p.add_argument("--no-limiter", action="store_true", help="turn the output safety limiter off (not advised)")
    p.add_argument("--allow-unstable", action="store_true", help="play even if the preset is not stable")
    p.add_argument("--no-timing-log", action="store_true",
                   help="leave the per-message MIDI arrival log and audio-clock anchors out of --report "
                        "(counters only; for long sessions)")
    p.add_argument("--stall-probe", action="store_true",
                   help="watch how promptly the machine wakes real-time threads, and tell in --report "
                        "which xruns its stalls explain")
    p.add_argument("--shallow-idle", action="store_true",
                   help="while playing, keep the CPUs out of slow idle states (Linux /dev/cpu_dma_latency; "
                        "needs the right to open it; costs power)")


def options_from_args(args: argparse.Namespace) -> PlayOptions:
    """The play options the parsed arguments give (not yet checked)."""
    return PlayOptions(preset=args.preset, midi_in=args.midi_in, virtual_midi=args.virtual_midi,
                       midi_api=args.midi_api, device=args.device, rate=args.rate, buffer=args.buffer,
                       channel=args.channel, seconds=args.seconds, record=args.record, report=args.report,
                       learn=args.learn, bank_dir=args.bank_dir, save_as=args.save_as,
                       allow_unstable=args.allow_unstable, no_limiter=args.no_limiter,
                       sets=parse_set(args.set), seed=args.seed, stall_probe=args.stall_probe,
                       shallow_idle=args.shallow_idle, timing_log=not args.no_timing_log)


def _run(args: argparse.Namespace) -> int:
    opts = options_from_args(args)
    if opts.no_limiter:
        warn_limiter_off()
    host = LiveHost(opts)
    host.prepare()
    host.run()
    return 0


COMMAND = Command("play", "play a preset live from a MIDI controller or a virtual MIDI port", _add, _run)

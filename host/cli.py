"""The ``sheafsynth`` command line: the command table and the one error choke point.

Each subcommand lives in its own module under host/commands/ and exposes one
:class:`~sheafsynth.host.commands.shared.Command` (name, one-line help,
argument adder, runner); ``COMMANDS`` lists them.  ``main`` is
the single choke point for errors: a SheafsynthError becomes one line on
stderr and an exit status (2 bad input, 3 audio device, 4 build), never a
traceback (set SHEAFSYNTH_DEBUG=1 to see one).
"""

from __future__ import annotations

import argparse
import os
import sys

from sheafsynth.engine import __version__
from sheafsynth.engine.errors import AudioError, BuildError, InputError, PresetError, SheafsynthError
from sheafsynth.host.commands import (bake, bench, check, demo, export, inspect, jitter, migrate, new, play, ports,
                                      presets, render, sweep)
from sheafsynth.host.commands.shared import CAUTION, Command

__all__ = ["COMMANDS", "EXIT_BAD_INPUT", "EXIT_AUDIO", "EXIT_BUILD", "build_parser", "main"]

EXIT_BAD_INPUT, EXIT_AUDIO, EXIT_BUILD = 2, 3, 4

# The command table, in the order ``sheafsynth --help`` lists it.  Every
# module is imported above: a broken install fails loudly here, never by a
# command going missing.
COMMANDS: tuple[Command, ...] = (
    render.COMMAND, inspect.COMMAND, presets.COMMAND, demo.COMMAND, play.COMMAND, ports.COMMAND,
    check.COMMAND, new.COMMAND, migrate.COMMAND, bench.COMMAND, jitter.COMMAND, bake.COMMAND, export.COMMAND,
    sweep.COMMAND,
)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with one subparser a command."""
    parser = argparse.ArgumentParser(
        prog="sheafsynth",
        description="Physical-model instruments as sheaf filter networks: check, compile, play, render.",
        epilog=CAUTION)
    parser.add_argument("--version", action="version", version=f"sheafsynth {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for cmd in COMMANDS:
        p = sub.add_parser(cmd.name, help=cmd.help, description=cmd.help)
        cmd.add_arguments(p)
        p.set_defaults(run_command=cmd.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run one command; the single place errors become an exit status (module doc)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    run = getattr(args, "run_command", None)
    if run is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        return int(run(args) or 0)
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

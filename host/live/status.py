"""The live status line and single-key commands of ``sheafsynth play``.

Both are for a person at a terminal: the status line is drawn only when
stdout is a TTY, keys are read only when stdin is one.  Nothing here runs
on the audio or MIDI thread.
"""

from __future__ import annotations

import math
import os
import shutil
import sys
from dataclasses import dataclass
from typing import Any

__all__ = ["StatusInfo", "format_status", "dbfs", "StatusLine", "Keyboard", "KEY_HELP"]

KEY_HELP = "keys: s save preset · l learn (next parameter) · q quit"


def dbfs(x: float) -> float:
    """Linear full-scale amplitude -> dBFS (-inf for silence)."""
    return 20.0 * math.log10(x) if x > 0 else -math.inf


@dataclass
class StatusInfo:
    """What the status line shows; load is callback time / block period."""

    preset: str
    program: int | None
    voices: int
    polyphony: int
    load: float
    load_p999: float
    xruns: int
    peak: float
    last_control: str
    midi: str
    learn: str | None = None
    latency_ms: float | None = None     # key to sound: one block of event delay + the output latency, ms
    out_of_range: int = 0               # note-ons ignored: outside the preset's playable range


def format_status(s: StatusInfo) -> str:
    """One line, most important first."""
    prog = f"#{s.program} " if s.program is not None else ""
    pk = dbfs(s.peak)
    peak = " -inf" if pk == -math.inf else f"{pk:5.1f}"
    load = f"{100 * s.load:3.0f}%" if math.isfinite(s.load) else "  -"
    p999 = f"{100 * s.load_p999:.0f}%" if math.isfinite(s.load_p999) else "-"
    parts = [f"{prog}{s.preset}",
             f"voices {s.voices:2d}/{s.polyphony}",
             f"DSP {load} (p99.9 {p999})",
             f"xruns {s.xruns}",
             f"peak {peak} dBFS",
             f"MIDI {s.midi}"]
    if s.latency_ms is not None:
        parts.insert(4, f"latency {s.latency_ms:.1f} ms")
    if s.out_of_range:
        parts.append(f"{s.out_of_range} note(s) out of range")
    if s.learn:
        parts.append(f"LEARN {s.learn}: move a knob")
    if s.last_control:
        parts.append(s.last_control)
    return " | ".join(parts)


class StatusLine:
    """Redraws one terminal line in place; does nothing unless the stream is a TTY."""

    def __init__(self, stream=None, enabled: bool | None = None):
        self.stream = stream or sys.stdout
        if enabled is None:
            try:
                enabled = self.stream.isatty()
            except (AttributeError, ValueError):
                enabled = False
        self.enabled = bool(enabled)
        self._shown = False

    def show(self, text: str) -> None:
        """Redraw the one status line (main thread; nothing when not a terminal)."""
        if not self.enabled:
            return
        width = max(20, shutil.get_terminal_size((100, 24)).columns - 1)
        self.stream.write("\r\x1b[2K" + text[:width])
        self.stream.flush()
        self._shown = True

    def say(self, text: str) -> None:
        """A line of its own above the status line (or plain, without a TTY)."""
        if self.enabled and self._shown:
            self.stream.write("\r\x1b[2K")
        self.stream.write(text + "\n")
        self.stream.flush()

    def clear(self) -> None:
        """Erase the status line."""
        if self.enabled and self._shown:
            self.stream.write("\r\x1b[2K")
            self.stream.flush()
            self._shown = False


class Keyboard:
    """Single key presses from a terminal without Enter (POSIX), as a context manager.

    Ctrl-C still interrupts.  Inactive (``read`` returns "") unless stdin is a TTY.
    """

    def __init__(self, stream=None, enabled: bool | None = None):
        self.stream = stream or sys.stdin
        if enabled is None:
            try:
                enabled = self.stream.isatty() and os.name == "posix"
            except (AttributeError, ValueError):
                enabled = False
        self.enabled = bool(enabled)
        self._saved: list[Any] | None = None      # termios attributes to restore

    def __enter__(self) -> "Keyboard":
        if self.enabled:
            import termios  # POSIX-only modules: imported only where a terminal is enabled
            import tty

            fd = self.stream.fileno()
            try:
                self._saved = termios.tcgetattr(fd)
                tty.setcbreak(fd)
            except termios.error:
                self.enabled = False
        return self

    def __exit__(self, *exc) -> None:
        if self._saved is not None:
            import termios  # POSIX-only

            termios.tcsetattr(self.stream.fileno(), termios.TCSADRAIN, self._saved)
            self._saved = None

    def read(self) -> str:
        """Keys pressed since the last call ("" when none)."""
        if not self.enabled:
            return ""
        import select  # POSIX select on a terminal; only when keys are read

        fd = self.stream.fileno()
        keys = []
        while select.select([fd], [], [], 0)[0]:
            ch = os.read(fd, 1)
            if not ch:
                break
            keys.append(ch.decode("latin-1"))
        return "".join(keys)

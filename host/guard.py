"""The stability guard as render and play run it: the engine's bounded guard plus a progress line.

engine.analysis.report.guard answers within engine.analysis.deadline.GUARD_TIME_LIMIT_S
seconds and prints nothing.  When it has not answered after ``PROGRESS_AFTER_S``
(1 s), :func:`run_guard` prints one line on stderr saying what is being checked,
at which rate (Hz), which step it is in and how long it may take, so a user
never stares at a silent terminal.  Runs on the main thread before any audio
stream starts (the line comes from a timer thread; nothing here touches audio).
"""

from __future__ import annotations

import sys
import threading
from typing import TextIO

from sheafsynth.engine.analysis.deadline import GUARD_TIME_LIMIT_S
from sheafsynth.engine.analysis.report import guard
from sheafsynth.engine.preset import Preset

__all__ = ["PROGRESS_AFTER_S", "run_guard"]

#: Seconds the guard may run before the progress line is shown.
PROGRESS_AFTER_S = 1.0


def run_guard(preset: Preset, rate: float, allow_unstable: bool, *, stream: TextIO | None = None,
              time_limit_s: float = GUARD_TIME_LIMIT_S) -> list[str]:
    """engine.analysis.report.guard for ``preset`` at ``rate`` Hz, with a progress line after 1 s.

    Returns the guard's warnings; raises what it raises (UnstableError,
    NotDecided with the way forward in its message).  ``stream`` defaults
    to sys.stderr.
    """
    out = stream if stream is not None else sys.stderr
    step = ["starting"]
    lock = threading.Lock()

    def heard(text: str) -> None:
        with lock:
            step[0] = text

    def tell() -> None:
        with lock:
            now = step[0]
        print(f"checking the stability of {preset.name} at {float(rate):g} Hz ({now}; at most "
              f"{time_limit_s:g} s; `sheafsynth check` stores the answer for next time) ...", file=out, flush=True)

    timer = threading.Timer(PROGRESS_AFTER_S, tell)
    timer.daemon = True
    timer.start()
    try:
        return guard(preset, allow_unstable=allow_unstable, rate=rate, time_limit_s=time_limit_s, progress=heard)
    finally:
        timer.cancel()

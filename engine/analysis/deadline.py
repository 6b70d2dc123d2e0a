"""A time limit handed down to the expensive steps of the stability analysis.

The guard that runs before ``render`` and ``play`` must answer within a
bounded time (``GUARD_TIME_LIMIT_S``).  Instead of a thread killed from
outside, one :class:`Deadline` is passed down to every step that can take
long (the corner scans, the certificate routes, the eigen-solves); each
calls :meth:`Deadline.check` at its own safe points -- between corners,
between bisection steps, and inside the shift-invert eigen-solver's
operator -- and :class:`NotDecided` unwinds the analysis cleanly when the
time is up.  A report that is not decided is never cached.

The engine prints nothing: ``progress`` (optional) receives a short text
naming the step about to run, so a host can tell a waiting user what is
going on.  Times are wall-clock seconds (``time.monotonic``).
"""

from __future__ import annotations

import time
from typing import Callable

from sheafsynth.engine.errors import AnalysisError, NotDecided

__all__ = ["GUARD_TIME_LIMIT_S", "CHECK_TIME_LIMIT_S", "Deadline"]

#: Time (s) the guard of render and play may spend before it answers "not decided" (with
#: start-up and lowering, the whole command answers within 10 s on a 2-core machine).
GUARD_TIME_LIMIT_S = 7.0
#: Default time (s) ``sheafsynth check`` may spend (generous; ``--time-limit`` changes it).
CHECK_TIME_LIMIT_S = 1800.0



class Deadline:
    """A point in time after which :meth:`check` raises :class:`NotDecided`.

    ``limit_s`` None means no limit (``check`` only records the step).
    ``progress(text)`` is called at every :meth:`step` with the step's
    description; it must be quick and must not raise.
    """

    def __init__(self, limit_s: float | None = None, progress: Callable[[str], None] | None = None,
                 clock: Callable[[], float] = time.monotonic):
        if limit_s is not None and not limit_s > 0:
            raise AnalysisError(f"time limit {limit_s!r}: expected a positive number of seconds")
        self.limit_s = limit_s
        self._clock = clock
        self._end = None if limit_s is None else clock() + float(limit_s)
        self._progress = progress
        self.current = "starting"

    def step(self, what: str) -> None:
        """Enter a step described by ``what`` (tells ``progress``), then :meth:`check`."""
        self.current = what
        if self._progress is not None:
            self._progress(what)
        self.check()

    def check(self) -> None:
        """Raise :class:`NotDecided` once the deadline has passed; otherwise return at once."""
        if self._end is not None and self._clock() >= self._end:
            raise NotDecided(float(self.limit_s or 0.0), self.current)

    def remaining_s(self) -> float | None:
        """Seconds left (never below 0), or None without a limit."""
        return None if self._end is None else max(0.0, self._end - self._clock())

"""Shared pieces of the hardening tests: time limits, error-path checks, a live host.

Fixtures (all session scoped, so hypothesis tests may use them):

* ``check_preset_error`` -- asserts a PresetError names a JSON path that
  exists in the document (or the file / text it came from);
* ``time_limit`` -- a context manager failing a case that runs longer than
  its bound (SIGALRM; a hang guard, not a speed test);
* ``live`` -- starts ``sheafsynth play`` on the JACK dummy server and sends
  it MIDI through a JACK MIDI port (python-rtmidi's JACK API).

Environment switches: SHEAFSYNTH_FUZZ_EXAMPLES (presets per fuzz run,
default 2000), SHEAFSYNTH_SOAK_SECONDS (soak length, default 60; 600 for the
long soak).
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import threading

import pytest

from tests.live import LIVE_BLOCK, LIVE_RATE, PlayProcess


def _env_number(name: str, default: float, floor: float, kind: type = float):
    """``kind(os.environ[name])`` (``default`` when unset or not a number), at least ``floor``."""
    try:
        value = kind(os.environ.get(name, str(default)))
    except ValueError:
        value = kind(default)
    return max(kind(floor), value)


def fuzz_examples() -> int:
    """Number of presets one fuzz run checks (env SHEAFSYNTH_FUZZ_EXAMPLES, default 2000)."""
    return int(_env_number("SHEAFSYNTH_FUZZ_EXAMPLES", 2000, 20, int))


def soak_seconds() -> float:
    """Soak length in s (env SHEAFSYNTH_SOAK_SECONDS, default 60)."""
    return float(_env_number("SHEAFSYNTH_SOAK_SECONDS", 60.0, 15.0))


# ---------------------------------------------------------------- time limits

class CaseTimeout(AssertionError):
    """A case ran past its time bound (the thing under test hangs)."""


@contextlib.contextmanager
def _time_limit(seconds: float, what: str = "case"):
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def fire(signum, frame):
        raise CaseTimeout(f"{what} did not finish within {seconds:g} s")

    old = signal.signal(signal.SIGALRM, fire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


@pytest.fixture(scope="session")
def time_limit():
    return _time_limit


# ---------------------------------------------------------------- error paths

_SEGMENT = re.compile(r"^(\.[^.\[]+|\[\d+\])?$")


def _resolve(doc, path: str) -> str:
    """Walk ``path`` (``cells[2].C[0][0]``) into ``doc``; returns the part that did not resolve."""
    node, rest = doc, path
    while rest:
        if isinstance(node, list):
            m = re.match(r"^\[(\d+)\]", rest)
            if not m or int(m.group(1)) >= len(node):
                return rest
            node, rest = node[int(m.group(1))], rest[m.end():]
        elif isinstance(node, dict):
            body = rest[1:] if rest.startswith(".") else rest
            if rest is path and rest.startswith("."):
                return rest
            best = None
            for k in node:
                k = str(k)
                if body.startswith(k) and (len(body) == len(k) or body[len(k)] in ".[") \
                        and (best is None or len(k) > len(best)):
                    best = k
            if best is None:
                if "" in node and isinstance(node[""], (dict, list)):
                    node = node[""]          # an empty key leaves no mark in a dotted path
                    continue
                return rest
            node = {str(k): v for k, v in node.items()}[best]
            rest = body[len(best):]
        else:
            return rest
    return ""


def _check_preset_error(exc, doc=None, sources: tuple[str, ...] = ()) -> None:
    """``exc`` is a PresetError whose message starts with a path that locates the fault.

    The path is "(top level)", one of ``sources`` (a file name or "<text>"),
    or a JSON path whose every step but the last exists in ``doc``.
    """
    from sheafsynth.engine.errors import PresetError

    assert isinstance(exc, PresetError), f"{type(exc).__name__} escaped: {exc}"
    path = exc.path
    assert path, f"PresetError without a path: {exc}"
    assert str(exc).startswith(path + ": "), str(exc)
    assert exc.problem.strip(), f"PresetError with an empty message at {path}"
    if path == "(top level)" or path in sources or path in ("<text>", "<memory>"):
        return
    if doc is None or not isinstance(doc, dict):
        return
    rest = _resolve(doc, path)
    if rest and rest[0] not in ".[":
        rest = "." + rest
    assert _SEGMENT.match(rest), f"error path {path!r} does not locate anything in the preset ({str(exc)[:200]})"


@pytest.fixture(scope="session")
def check_preset_error():
    return _check_preset_error


# ---------------------------------------------------------------- live host

class Live:
    """The live helpers: ``Play`` (a ``sheafsynth play`` process); MIDI goes in through
    tests.live.send_timeline."""

    Play = PlayProcess
    rate = LIVE_RATE
    block = LIVE_BLOCK


@pytest.fixture
def live(jack_server):
    """The live helpers (needs the JACK server): ``live.Play(...)``."""
    return Live

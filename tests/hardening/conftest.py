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
import json
import os
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from tests.conftest import LIVE_PLAY_FLAGS

REPO = Path(__file__).resolve().parents[2]
LIVE_RATE = 48000
LIVE_BLOCK = 128


def fuzz_examples() -> int:
    """Number of presets one fuzz run checks (env SHEAFSYNTH_FUZZ_EXAMPLES, default 2000)."""
    try:
        n = int(os.environ.get("SHEAFSYNTH_FUZZ_EXAMPLES", "2000"))
    except ValueError:
        n = 2000
    return max(20, n)


def soak_seconds() -> float:
    """Soak length in s (env SHEAFSYNTH_SOAK_SECONDS, default 60)."""
    try:
        s = float(os.environ.get("SHEAFSYNTH_SOAK_SECONDS", "60"))
    except ValueError:
        s = 60.0
    return max(15.0, s)


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
    from engine.errors import PresetError

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

class PlayProcess:
    """A running ``sheafsynth play`` on the JACK dummy server (stdout/stderr captured)."""

    def __init__(self, tmp: Path, preset: str, seconds: float, *, extra=(), env=None,
                 record: bool = True, virtual: str | None = "sshard-in"):
        self.report_path = tmp / "report.json"
        self.wav_path = tmp / "out.wav" if record else None
        cmd = [sys.executable, "-m", "host.cli", "play", preset, "--device", "JACK",
               "--rate", str(LIVE_RATE), "--buffer", str(LIVE_BLOCK), "--seconds", str(seconds),
               "--report", str(self.report_path), *LIVE_PLAY_FLAGS, *extra]
        if virtual:
            cmd += ["--virtual-midi", virtual]
        if record:
            cmd += ["--record", str(self.wav_path)]
        full_env = dict(os.environ, JACK_NO_START_SERVER="1", PYTHONUNBUFFERED="1")
        full_env.update(env or {})
        self.proc = subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     stdin=subprocess.DEVNULL, text=True, env=full_env)
        self.out: list[str] = []
        self.err: list[str] = []
        self.ready = threading.Event()
        self._pumps = [threading.Thread(target=self._pump, args=(self.proc.stdout, self.out, True), daemon=True),
                       threading.Thread(target=self._pump, args=(self.proc.stderr, self.err, False), daemon=True)]
        for t in self._pumps:
            t.start()

    def _pump(self, stream, lines, watch):
        for line in stream:
            lines.append(line.rstrip("\n"))
            if watch and line.startswith("playing "):
                self.ready.set()

    def wait_ready(self, timeout: float = 300.0) -> None:
        deadline = time.monotonic() + timeout
        while not self.ready.wait(0.1):
            if self.proc.poll() is not None or time.monotonic() > deadline:
                self.kill()
                pytest.fail(f"sheafsynth play did not start (rc {self.proc.poll()}):\n" + self.log())
        time.sleep(0.2)

    def rss_kib(self) -> int | None:
        """Resident set size of the play process (KiB), from /proc; None once it has ended."""
        try:
            with open(f"/proc/{self.proc.pid}/status", encoding="ascii") as fh:
                for line in fh:
                    if line.startswith("VmRSS:"):
                        return int(line.split()[1])
        except OSError:
            return None
        return None

    def wait(self, timeout: float = 120.0) -> int:
        try:
            rc = self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.kill()
            pytest.fail("sheafsynth play did not stop by itself:\n" + self.log())
        for t in self._pumps:
            t.join(5)
        return rc

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)

    def log(self) -> str:
        return "stdout:\n" + "\n".join(self.out[-40:]) + "\nstderr:\n" + "\n".join(self.err[-40:])

    def report(self) -> dict:
        return json.loads(self.report_path.read_text())

    def recording(self):
        import numpy as np
        import soundfile

        x, fs = soundfile.read(str(self.wav_path), dtype="float32", always_2d=True)
        assert fs == LIVE_RATE
        return np.asarray(x)


class MidiSender:
    """A JACK MIDI output (python-rtmidi) connected to the port whose name contains ``target``."""

    def __init__(self, target: str, client: str = "sshard-send"):
        import rtmidi

        self.mo = rtmidi.MidiOut(rtapi=rtmidi.API_UNIX_JACK, name=client)
        deadline = time.monotonic() + 30
        while True:
            names = self.mo.get_ports()
            hits = [i for i, n in enumerate(names) if target in n]
            if hits:
                break
            if time.monotonic() > deadline:
                pytest.fail(f"no JACK MIDI port {target!r} appeared (ports: {names})")
            time.sleep(0.05)
        self.mo.open_port(hits[0])
        time.sleep(0.6)          # the connection takes a few JACK cycles to carry events

    def send(self, data) -> None:
        self.mo.send_message(list(data))

    def play(self, timeline) -> None:
        """Send (seconds from now, bytes) items on time (late items go at once)."""
        t0 = time.monotonic() + 0.05
        for t, data in timeline:
            delay = t0 + t - time.monotonic()
            if delay > 0.0005:
                time.sleep(delay)
            self.send(data)

    def close(self) -> None:
        time.sleep(0.3)          # let the last messages leave in the next JACK cycles
        self.mo.close_port()
        self.mo.delete()


class Live:
    Play = PlayProcess
    Sender = MidiSender
    rate = LIVE_RATE
    block = LIVE_BLOCK


@pytest.fixture
def live(jack_server):
    """The live helpers (needs the JACK server): ``live.Play(...)``, ``live.Sender(...)``."""
    return Live

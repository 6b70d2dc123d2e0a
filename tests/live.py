"""A live host for tests: ``sheafsynth play`` on the JACK dummy server, and a JACK MIDI sender.

Used by tests/host (live play) and tests/hardening (soak, hostile MIDI,
faults).  Every launch passes tests.conftest.LIVE_PLAY_FLAGS.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from tests.conftest import LIVE_PLAY_FLAGS

REPO = Path(__file__).resolve().parents[1]
LIVE_RATE = 48000
LIVE_BLOCK = 128


class PlayProcess:
    """A running ``sheafsynth play`` on the JACK dummy server (stdout/stderr captured)."""

    def __init__(self, tmp: Path, preset: str, seconds: float, *, extra=(), env=None,
                 record: bool = True, virtual: str | None = "sshard-in"):
        self.report_path = tmp / "report.json"
        self.wav_path = tmp / "out.wav" if record else None
        cmd = [sys.executable, "-m", "sheafsynth.host.cli", "play", preset, "--device", "JACK",
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
        """The --record file as float32 (frames, channels)."""
        import numpy as np
        import soundfile

        x, fs = soundfile.read(str(self.wav_path), dtype="float32", always_2d=True)
        assert fs == LIVE_RATE
        return np.asarray(x)

    def results(self):
        """(report, first recorded channel as float64)."""
        import numpy as np

        return self.report(), self.recording()[:, 0].astype(np.float64)


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

    def send(self, data) -> int:
        """Send one message now; returns CLOCK_MONOTONIC ns just after."""
        self.mo.send_message(list(data))
        return time.monotonic_ns()

    def play(self, timeline) -> float:
        """Send (seconds from now, bytes) items on time, in time order (late items go at once);
        returns the monotonic start (s) the times count from."""
        t0 = time.monotonic() + 0.05
        for t, data in sorted(timeline, key=lambda e: e[0]):
            delay = t0 + t - time.monotonic()
            if delay > 0.0005:
                time.sleep(delay)
            self.send(data)
        return t0

    def close(self) -> None:
        time.sleep(0.3)          # let the last messages leave in the next JACK cycles
        self.mo.close_port()
        self.mo.delete()


def send_timeline(target: str, timeline, client: str = "sshard-send") -> float:
    """Connect a MidiSender to ``target``, play ``timeline`` ((s, bytes) items) on time and close it;
    returns the monotonic start (s) the times count from."""
    sender = MidiSender(target, client)
    try:
        return sender.play(timeline)
    finally:
        sender.close()


def jack_midi_sources(client: str) -> list[str]:
    """The JACK MIDI output ports listed now, seen through a throw-away input client named ``client``."""
    import rtmidi

    mi = rtmidi.MidiIn(rtapi=rtmidi.API_UNIX_JACK, name=client)
    try:
        return mi.get_ports()
    finally:
        mi.delete()


def wait_port_gone(name: str, client: str, timeout: float = 10.0) -> None:
    """Wait until no JACK MIDI port whose name contains ``name`` is listed (fails after ``timeout`` s)."""
    deadline = time.monotonic() + timeout
    while any(name in n for n in jack_midi_sources(client)):
        assert time.monotonic() < deadline, f"the killed source's port {name!r} did not go away"
        time.sleep(0.05)

"""Faults: a runaway voice, an audio device that fails or vanishes, a MIDI port that vanishes.

* Runaway guard: a string whose loop gain is 1.5 grows without bound; the
  kernel's guard resets the voice in the block where it crosses the guard
  level, counts it, and the output never passes the limiter ceiling (with
  the limiter off, never the guard level).  Through ``render`` and ``play``
  with ``--allow-unstable`` too.
* Audio: opening a device that does not exist, or a JACK server that is not
  running, raises AudioError / exits with status 3 and a one-line message;
  a JACK server killed mid-performance ends ``play`` with status 3 and a
  message saying the device stopped.
* MIDI: the source port vanishes three times during a stream of notes and
  comes back; the host keeps playing and reconnects each time.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from sheafsynth.engine.errors import AudioError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir.program import GUARD_LIMIT, LIMITER_CEILING
from tests.live import REPO, wait_port_gone

RATE = 48000
BLOCK = 256


def unstable_doc(gain: float = 1.5) -> dict:
    """A tuned string loop with a fixed loop gain ``gain`` (1.5: it grows 1.5x per period)."""
    return {
        "format": "sheafsynth-preset", "version": 1, "name": "runaway", "notes": [48, 72],
        "cells": [{"id": "loop", "kind": "delay", "length": "pitch"},
                  {"id": "tune", "kind": "allpass", "delay": "pitch-fraction"}],
        "wires": [{"from": "excite", "to": "loop"}, {"from": "loop", "to": "tune", "gain": gain},
                  {"from": "tune", "to": "loop"}, {"from": "loop", "to": "out", "gain": 0.5}],
    }


def _blocks(inst: Instrument, n: int):
    outs, resets = [], []
    for _ in range(n):
        outs.append(inst.process(BLOCK).copy())
        resets.append(inst.counters["guard_resets"])
    return outs, resets


@pytest.mark.parametrize("gain", [1.5, 1e6])
def test_runaway_voice_is_reset_within_one_block_and_output_stays_under_the_ceiling(gain):
    inst = Instrument(unstable_doc(gain), rate=RATE, max_block=BLOCK, strict=True)
    inst.note_on(60, 127)
    outs, resets = _blocks(inst, 200)
    out = np.concatenate(outs)
    assert np.all(np.isfinite(out))
    assert float(np.max(np.abs(out))) <= LIMITER_CEILING * (1 + 1e-6)
    assert resets[-1] >= 1, "the guard never fired"
    k = resets.index(resets[-1]) if resets[-1] == 1 else resets.index(1)
    assert inst.counters["voices_active"] == 0 and all(s == "free" for s, _ in inst.voices())
    # a new note sounds again, runs away again and is counted again
    inst.note_on(64, 100)
    outs2, resets2 = _blocks(inst, 200)
    assert float(np.max(np.abs(outs2[0]))) > 0.0
    assert resets2[-1] == resets[-1] + 1
    assert np.all(np.isfinite(np.concatenate(outs2)))
    assert k >= 0


def test_without_the_limiter_the_guard_alone_bounds_the_output():
    """Limiter off: no sample beyond the guard level; the block before the reset was close to it."""
    inst = Instrument(unstable_doc(1.5), rate=RATE, max_block=BLOCK, limiter=False, strict=True)
    inst.note_on(60, 127)
    outs, resets = _blocks(inst, 200)
    peaks = [float(np.max(np.abs(o))) for o in outs]
    assert all(np.isfinite(p) and p <= GUARD_LIMIT for p in peaks)
    k = resets.index(1)
    period = RATE / 261.6256                     # note 60 = C4 (MIDI numbering, ISO 16 A4 = 440 Hz)
    per_block = 1.5 ** (BLOCK / period)          # growth of the loop over one block
    assert peaks[k - 1] > GUARD_LIMIT / (4 * per_block), (k, peaks[k - 3:k + 1])
    assert peaks[k] <= peaks[k - 1] * per_block * 4  # the block of the reset holds no runaway samples
    assert max(peaks[k + 1:]) == 0.0             # and nothing after it


def _cli(*args, env=None, timeout=600):
    full = dict(os.environ, JACK_NO_START_SERVER="1")
    full.update(env or {})
    return subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", *args], cwd=REPO, env=full, capture_output=True,
                          text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def test_render_with_allow_unstable_is_guarded(tmp_path):
    import soundfile

    src = tmp_path / "runaway.json"
    src.write_text(json.dumps(unstable_doc()))
    wav = tmp_path / "runaway.wav"
    r = _cli("render", str(src), "--allow-unstable", "--seconds", "1", "--out", str(wav), "--float")
    assert r.returncode == 0, r.stderr
    assert "reset by the guard" in r.stdout, r.stdout
    x, fs = soundfile.read(str(wav), dtype="float32")
    assert np.all(np.isfinite(x)) and float(np.max(np.abs(x))) <= LIMITER_CEILING * (1 + 1e-6)


def test_audio_device_that_does_not_exist_raises_audio_error():
    from sheafsynth.host.live.audio import AudioOutput

    out = AudioOutput(device="no-such-device-sshard", rate=48000, blocksize=128)
    with pytest.raises(AudioError) as info:
        out.open()
    assert "no-such-device-sshard" in str(info.value)
    assert not out.is_open


# ---------------------------------------------------------------- live

def _private_jackd(name: str, tmp_path):
    if shutil.which("jackd") is None:
        pytest.skip("jackd is not installed")
    log = open(tmp_path / f"{name}.log", "wb")
    proc = subprocess.Popen(["jackd", "-n", name, "--no-realtime", "-d", "dummy", "-r", "48000", "-p", "128"],
                            stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                            env=dict(os.environ, JACK_NO_START_SERVER="1"))
    env = dict(os.environ, JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1")
    deadline = time.monotonic() + 20
    while True:
        r = subprocess.run(["jack_wait", "-c"], env=env, capture_output=True, text=True, timeout=10)
        if r.stdout.strip() == "running":
            return proc
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            pytest.fail("private jackd did not start: " + (tmp_path / f"{name}.log").read_text(errors="replace"))
        time.sleep(0.2)


@pytest.mark.live
def test_no_jack_server_exits_3(jack_server, tmp_path):
    r = _cli("play", "porch-pluck", "--device", "JACK", "--seconds", "2", "--bank-dir", str(tmp_path),
             env={"JACK_DEFAULT_SERVER": "sshard-no-such-server"})
    assert r.returncode == 3, r.stdout + r.stderr
    last = r.stderr.strip().splitlines()[-1]
    assert last.startswith("sheafsynth: audio:") and "Traceback" not in r.stderr, r.stderr


@pytest.mark.live
@pytest.mark.slow
def test_audio_server_killed_mid_performance_exits_3(live, tmp_path):
    server = _private_jackd("sshard-vanish", tmp_path)
    try:
        play = live.Play(tmp_path, "porch-pluck", 60, env={"JACK_DEFAULT_SERVER": "sshard-vanish"},
                         extra=["--bank-dir", str(tmp_path)], record=False, virtual="sshard-vanish-in")
        play.wait_ready()
        time.sleep(1.0)
        server.send_signal(signal.SIGKILL)
        server.wait(10)
        rc = play.wait(timeout=60)
    finally:
        if server.poll() is None:
            server.kill()
            server.wait(10)
    assert rc == 3, play.log()
    err = "\n".join(play.err)
    assert "Traceback" not in err
    assert any(ln.startswith("sheafsynth: audio:") for ln in play.err), play.log()


SOURCE_SCRIPT = r"""
import sys, time, rtmidi
mo = rtmidi.MidiOut(rtapi=rtmidi.API_UNIX_JACK, name="sshard-src-client")
mo.open_virtual_port("sshard-src")
print("ready", flush=True)
n = 40
while True:                       # a note every 20 ms until killed
    mo.send_message([0x90, n, 90]); time.sleep(0.01)
    mo.send_message([0x80, n, 0]); time.sleep(0.01)
    n = 40 + (n - 39) % 40
"""


@pytest.mark.live
@pytest.mark.slow
def test_midi_port_vanishing_mid_stream_three_times_is_survived(live, tmp_path):
    def start_source():
        p = subprocess.Popen([sys.executable, "-c", SOURCE_SCRIPT], stdout=subprocess.PIPE, text=True,
                             stdin=subprocess.DEVNULL, env=dict(os.environ, JACK_NO_START_SERVER="1"))
        assert p.stdout.readline().strip() == "ready"
        return p

    src = start_source()
    play = live.Play(tmp_path, "porch-pluck", 12.0, extra=["--midi-in", "sshard-src", "--bank-dir", str(tmp_path)],
                     virtual=None)
    try:
        play.wait_ready()
        for _ in range(3):
            time.sleep(1.0)
            src.send_signal(signal.SIGKILL)
            src.wait(10)
            wait_port_gone("sshard-src", "sshard-watch")
            time.sleep(0.4)
            assert play.proc.poll() is None, "the host stopped when its MIDI source vanished"
            src = start_source()
            time.sleep(0.6)
        rc = play.wait()
    finally:
        if src.poll() is None:
            src.kill()
            src.wait(10)
    assert rc == 0, play.log()
    rep = play.report()
    assert rep["midi"]["lost"] == 3 and rep["midi"]["reconnects"] == 3, rep["midi"]
    assert rep["nonfinite_samples"] == 0 and rep["kernel_errors"] == 0
    assert rep["callbacks"] >= 0.9 * rep["seconds"] * live.rate / live.block
    x = play.recording()[:, 0]
    tail = x[-int(1.5 * live.rate):]
    assert float(np.sqrt(np.mean(tail ** 2))) > 1e-4, "no sound after the last reconnect"

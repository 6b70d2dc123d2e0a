"""Test-wide fixtures: a private kernel cache and user folder per session, the JACK dummy server."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time

import pytest

_CACHE = tempfile.mkdtemp(prefix="sheafsynth-test-cache-")
os.environ.setdefault("SHEAFSYNTH_CACHE_DIR", _CACHE)


@pytest.fixture
def user_dir(tmp_path, monkeypatch):
    """A private user preset folder."""
    d = tmp_path / "user-presets"
    monkeypatch.setenv("SHEAFSYNTH_USER_DIR", str(d))
    return d


def _jack_running(env) -> bool:
    """True if a JACK server answers (jack_wait -c prints "running"; it exits 0 either way)."""
    probe = ["jack_wait", "-c"] if shutil.which("jack_wait") else ["jack_lsp"]
    try:
        r = subprocess.run(probe, env=env, capture_output=True, text=True,
                           timeout=10, stdin=subprocess.DEVNULL)
    except (OSError, subprocess.SubprocessError):
        return False
    if probe[0] == "jack_wait":
        return r.stdout.strip() == "running"
    return r.returncode == 0


@pytest.fixture(scope="session")
def jack_server(tmp_path_factory):
    """A running JACK server: the one already up, else a dummy-backend one we start.

    Skips only when jackd is not installed.  Yields the sample rate in Hz
    that the tests should use.
    """
    if shutil.which("jackd") is None:
        pytest.skip("jackd is not installed (Debian: apt-get install jackd2); live audio tests need it")
    # A JACK client must never start a server behind our back.
    os.environ["JACK_NO_START_SERVER"] = "1"
    env = dict(os.environ)
    proc = None
    if not _jack_running(env):
        log = tmp_path_factory.mktemp("jack") / "jackd.log"
        with open(log, "wb") as fh:
            proc = subprocess.Popen(
                ["jackd", "--no-realtime", "-d", "dummy", "-r", "48000", "-p", "128"],
                stdout=fh, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env)
        deadline = time.monotonic() + 15
        while not _jack_running(env):
            if proc.poll() is not None or time.monotonic() > deadline:
                proc.kill()
                pytest.fail("could not start jackd (dummy backend):\n" + log.read_text(errors="replace"))
            time.sleep(0.2)
    if "sounddevice" in sys.modules:
        # PortAudio lists a JACK server only if it was up when PortAudio started.
        from host.audio import rescan_devices
        rescan_devices()
    yield 48000
    if proc is not None:
        if "sounddevice" in sys.modules:
            # Close PortAudio while its JACK client can still reach the server.
            import sounddevice
            while sounddevice._initialized:
                sounddevice._terminate()
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture
def jack_device(jack_server):
    """The JACK output device as PortAudio lists it (an AudioDevice)."""
    from host.audio import list_audio_devices
    devs = [d for d in list_audio_devices() if "JACK" in d.hostapi]
    if not devs:
        pytest.fail("JACK server is running but PortAudio lists no JACK output device; "
                    "libportaudio2 must be built with JACK support")
    return devs[0]


def realtime_criteria(rep: dict, limit_p999: float = 0.5) -> None:
    """Apply the real-time acceptance criteria (zero xruns, p99.9 callback time).

    JACK's dummy backend runs without real-time priority here, so a busy
    machine can make it miss cycles that are none of the host's doing.  With
    SHEAFSYNTH_STRICT_TIMING=1 a miss fails the test; otherwise it is
    recorded as an expected failure carrying the figures, so a shared
    machine's load cannot hide every other result.  Call it after the
    checks that do not depend on timing.
    """
    xruns = rep.get("xruns", 0)
    p999 = rep.get("load_p999")
    ok = xruns == 0 and p999 is not None and p999 < limit_p999
    if ok:
        return
    load = os.getloadavg()[0]
    text = (f"real-time criteria missed: {xruns} xruns, p99.9 callback {p999} of the period "
            f"(load average {load:.1f} on {os.cpu_count()} cores)")
    if os.environ.get("SHEAFSYNTH_STRICT_TIMING") == "1":
        pytest.fail(text)
    pytest.xfail(text + "; set SHEAFSYNTH_STRICT_TIMING=1 to make this a failure")

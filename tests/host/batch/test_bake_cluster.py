"""A real cluster: a ``dask scheduler`` and two ``dask worker`` processes on localhost; one worker is killed
mid-bake and the set still comes out sample for sample as rendered in this process."""

from __future__ import annotations

import hashlib
import os
import signal
import socket
import subprocess
import sys
import time
from contextlib import nullcontext

import numpy as np
import pytest
from distributed import Client

from sheafsynth.engine.preset.load import factory_presets, load_preset
from sheafsynth.host import cli
from sheafsynth.host.batch.bakeset import bake_set, plan_takes, samples_sha256
from sheafsynth.host.batch.takes import Take, TakeSettings, render_take

pytestmark = pytest.mark.slow

PRESET = "porch-pluck"
SETTINGS = TakeSettings(rate=48000, seconds_max=1.5, hold_s=1.0, loudness=None, seed=7)
WAIT_S = 120.0      # generous bound on every wait for a condition


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _start(*args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "dask", *args], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)


def _stop(p: subprocess.Popen) -> None:
    if p.poll() is None:
        try:
            os.killpg(p.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    p.wait(timeout=WAIT_S)


@pytest.fixture(scope="module")
def cluster():
    """(scheduler address, {worker name: process}) of a scheduler and two single-thread workers."""
    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    procs = [_start("scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard")]
    workers = {}
    try:
        for name in ("w1", "w2"):
            workers[name] = _start("worker", addr, "--name", name, "--nthreads", "1", "--no-nanny",
                                   "--no-dashboard", "--host", "127.0.0.1")
            procs.append(workers[name])
        with Client(addr, timeout=WAIT_S, set_as_default=False) as c:
            c.wait_for_workers(2, timeout=WAIT_S)
        yield addr, workers
    finally:
        for p in reversed(procs):
            _stop(p)


def _preset():
    return load_preset(next(p for p in factory_presets() if p.stem == PRESET))


def _sha(audio: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(audio, dtype="<f4").tobytes()).hexdigest()


def test_bake_survives_a_worker_killed_mid_job(cluster, tmp_path):
    addr, workers = cluster
    preset = _preset()
    takes = plan_takes([48, 55, 60, 67], [60, 120], 2)
    # the truth: every take rendered here, in this process, one after another
    want = {t.file: _sha(render_take(preset, t, SETTINGS)["audio"]) for t in takes}
    killed: dict = {}
    with Client(addr, timeout=WAIT_S, set_as_default=False) as client:
        names = {a: w["name"] for a, w in client.scheduler_info()["workers"].items()}

        def kill_a_busy_worker(entry: dict) -> None:
            if killed:
                return
            busy = {a: len(keys) for a, keys in client.processing().items() if keys}
            victim = max(busy, key=lambda a: busy[a]) if busy else next(iter(names))
            killed.update(name=names[victim], busy=busy.get(victim, 0), landed=1)
            os.killpg(workers[names[victim]].pid, signal.SIGKILL)
            workers[names[victim]].wait(timeout=WAIT_S)

        result = bake_set(lambda: nullcontext(client), preset, takes, SETTINGS, tmp_path, subtype="FLOAT",
                          on_take=kill_a_busy_worker)
        deadline = time.monotonic() + WAIT_S
        while len(client.scheduler_info()["workers"]) != 1 and time.monotonic() < deadline:
            time.sleep(0.1)
        assert len(client.scheduler_info()["workers"]) == 1
    assert killed and killed["busy"] >= 1, killed      # the worker died with work in hand
    assert result["rendered"] == len(takes)
    files = {t["file"]: t["sha256"] for t in result["map"]["takes"]}
    assert files == want
    for name, sha in want.items():
        assert samples_sha256(tmp_path / name) == sha


def test_bake_command_through_scheduler(cluster, tmp_path, capsys):
    addr, workers = cluster
    alive = [w for w in workers.values() if w.poll() is None]
    assert alive
    rc = cli.main(["bake", PRESET, "--out", str(tmp_path), "--notes", "50,62", "--velocities", "90",
                   "--seconds-max", "1.5", "--hold", "1.0", "--seed", "7", "--float", "--scheduler", addr])
    assert rc == 0, capsys.readouterr().err
    for note in (50, 62):
        t = Take(note, 90, 0)
        assert samples_sha256(tmp_path / t.file) == _sha(render_take(_preset(), t, SETTINGS)["audio"])

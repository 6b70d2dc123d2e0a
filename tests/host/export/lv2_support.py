"""Helpers of the LV2 export tests: build the lilv test host, export a bundle, play a script.

The test host (lv2_test_host.c, beside this file) is compiled with the
system's lilv (pkg-config lilv-0).  ``expected_audio`` plays the same
script through ``engine.instrument.Instrument``: MIDI bytes are parsed by
mido (a reference MIDI library) and turned into kernel events by the live
host's own translator (host.controls.MidiTranslator: playable range,
bend, pedals, the preset's controller bindings and curves), the kernel
blocks are split the way the plugin splits a run (at most LV2_MAX_BLOCK
frames each), and a changed control port is one parameter event at the
start of the run, as the plugin's documentation states.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import mido
import numpy as np

from sheafsynth.engine.backends.lv2.bundle import LV2_MAX_BLOCK
from sheafsynth.engine.instrument import Instrument
from sheafsynth.host.controls import MidiTranslator

__all__ = ["HOST_SOURCE", "build_host", "run_host", "expected_audio", "script_text"]

HOST_SOURCE = Path(__file__).with_name("lv2_test_host.c")


def build_host(dest: Path) -> Path | None:
    """Compile the test host into ``dest``; None when lilv's development files are missing."""
    if shutil.which("pkg-config") is None:
        return None
    flags = subprocess.run(["pkg-config", "--cflags", "--libs", "lilv-0"], capture_output=True, text=True)
    if flags.returncode != 0:
        return None
    exe = dest / "lv2_test_host"
    subprocess.run(["cc", "-std=c11", "-Wall", "-Wextra", "-Werror", "-O1", str(HOST_SOURCE), "-o", str(exe)]
                   + flags.stdout.split(), check=True, capture_output=True, timeout=120)
    return exe


def script_text(runs: list[int], midi: list[tuple[int, int, int, int]],
                ports: list[tuple[int, str, float]]) -> str:
    """The host's script: run lengths (frames), MIDI (frame, 3 bytes), port values (frame, symbol, value)."""
    # an atom sequence holds its events in time order (LV2 atom: Sequence), so the script does too
    lines = [f"midi {t} {a} {b} {c}" for t, a, b, c in sorted(midi, key=lambda m: m[0])]
    lines += [f"port {t} {s} {v!r}" for t, s, v in ports]
    lines += [f"run {n}" for n in runs]
    return "\n".join(lines) + "\n"


def run_host(host: Path, lv2_path: Path, uri: str, rate: int, script: str, work: Path, *,
             save: Path | None = None, restore: Path | None = None) -> subprocess.CompletedProcess:
    """Run the test host; the audio lands in ``work/out.raw`` (float32)."""
    (work / "script.txt").write_text(script, encoding="utf-8")
    argv = [str(host), "--uri", uri, "--rate", str(rate), "--script", str(work / "script.txt"),
            "--out", str(work / "out.raw")]
    if save is not None:
        argv += ["--save", str(save)]
    if restore is not None:
        argv += ["--restore", str(restore)]
    env = dict(os.environ, LV2_PATH=str(lv2_path))
    return subprocess.run(argv, capture_output=True, text=True, env=env, timeout=300)


def expected_audio(inst: Instrument, runs: list[int], midi: list[tuple[int, int, int, int]],
                   ports: list[tuple[int, str, float]], names: dict[str, str],
                   first_values: dict[str, float] | None = None) -> np.ndarray:
    """What the plugin must play: the same script through ``inst`` (see the module doc).

    ``names`` maps port symbols to parameter names; ``first_values`` are the
    port values the first run starts from (set without a ramp), None after
    a state restore (the restored values stand).
    """
    translator = MidiTranslator(inst.preset, inst.program.param_index)
    total = sum(runs)
    out = np.zeros(total, dtype=np.float32)
    last = dict(first_values) if first_values is not None else None
    if first_values is not None:
        for name, v in first_values.items():
            inst.set_now(name, v)
    port_now = dict(last or {})
    pending = sorted(ports)
    pos = 0
    for n in runs:
        while pending and pending[0][0] <= pos:
            _, sym, v = pending.pop(0)
            port_now[names[sym]] = v
        if n == 0:
            continue
        for name, v in port_now.items():
            if last is not None and last.get(name) != v:
                p = inst.parameters[inst.param_index(name)]
                inst.control(name, min(max(v, p.lo), p.hi), 0)
        last = dict(port_now)
        a = pos
        while a < pos + n:
            m = min(LV2_MAX_BLOCK, pos + n - a)
            for t, s, d1, d2 in midi:
                if a <= t < a + m:
                    data = [s, d1] if 0xC0 <= s < 0xE0 else [s, d1, d2]    # two-byte messages
                    for ev in translator.translate(mido.Message.from_bytes(data), t - a):
                        inst.push_event(*ev)
            inst.process(m, out[a:a + m])
            a += m
        pos += n
    return out

"""Fixed renders of every factory preset, hashed, to show that a change keeps the sound.

Two sets: the factory presets (``hashes.json``) and copies of the factory
presets as they were in format version 1 (``v1/``, ``hashes-v1.json``,
recorded before version 2 existed): a version 1 file migrates on load and
must still render at 48 kHz sample for sample as it did.

Two takes per preset at 48 kHz with seed 7: one note (the middle of the
preset's note range, held 1 s, 0.5 s of tail) and a MIDI phrase with pitch
bend, sustain pedal and a sweep of every mapped controller, rendered through
the offline MIDI path.  ``python -m tests.golden.phrases --record`` rewrites
``hashes.json`` (the factory set only: ``hashes-v1.json`` is never
re-recorded); do that only for a change that is meant to alter the sound,
and say so in the commit.
"""

from __future__ import annotations

import hashlib
import json
import platform
import subprocess
import sys
import tempfile
from pathlib import Path

import mido
import numpy as np

HASHES = Path(__file__).with_name("hashes.json")
HASHES_V1 = Path(__file__).with_name("hashes-v1.json")
V1_DIR = Path(__file__).with_name("v1")
RATE = 48000
SEED = 7
FRAME = 2048   # samples per RMS fingerprint frame


def _imports():
    from sheafsynth.engine.instrument import Instrument
    from sheafsynth.engine.preset import factory_presets, load_preset
    from sheafsynth.host.offline.render import render_midi, render_note
    return Instrument, factory_presets, load_preset, render_midi, render_note


def phrase_file(preset, path: Path) -> Path:
    """A type-0 MIDI file: two notes, a bend up and back, sustain, every mapped CC swept."""
    mid = mido.MidiFile(type=0, ticks_per_beat=480)
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    lo, hi = preset.notes
    n1 = (lo + hi) // 2
    n2 = min(hi, n1 + 7)
    ccs = [c.cc for c in preset.controls if c.cc is not None]
    ev = [(0, mido.Message("note_on", note=n1, velocity=100)),
          (120, mido.Message("control_change", control=64, value=127)),
          (240, mido.Message("note_on", note=n2, velocity=70))]
    for k in range(0, 128, 8):
        ev.append((300 + 6 * k, mido.Message("pitchwheel", pitch=int(k / 127 * 8191))))
        for cc in ccs:
            ev.append((300 + 6 * k, mido.Message("control_change", control=cc, value=127 - k)))
    ev += [(1100, mido.Message("pitchwheel", pitch=0)),
           (1200, mido.Message("note_off", note=n1, velocity=0)),
           (1300, mido.Message("note_off", note=n2, velocity=0)),
           (1500, mido.Message("control_change", control=64, value=0))]
    ev.sort(key=lambda e: e[0])
    now = 0
    for t, msg in ev:
        tr.append(msg.copy(time=t - now))
        now = t
    mid.save(str(path))
    return path


def _fingerprint(x: np.ndarray) -> list[float]:
    n = len(x) // FRAME
    frames = x[: n * FRAME].astype(np.float64).reshape(n, FRAME)
    return [round(float(v), 6) for v in np.sqrt(np.mean(frames ** 2, axis=1))]


def v1_presets() -> list[Path]:
    """The version 1 copies of the factory presets (kept as they were)."""
    return sorted(V1_DIR.glob("*.json"))


def render_all(paths: list[Path] | None = None) -> dict:
    """Both takes of every preset in ``paths`` (default: the factory presets)."""
    Instrument, factory_presets, load_preset, render_midi, render_note = _imports()
    out: dict = {}
    with tempfile.TemporaryDirectory() as tmp:
        for path in (factory_presets() if paths is None else paths):
            preset = load_preset(path)
            name = path.stem
            lo, hi = preset.notes
            inst = Instrument(preset, rate=RATE, max_block=256, seed=SEED)
            note = render_note(inst, (lo + hi) // 2, 100, 1.5, hold=1.0)
            inst = Instrument(preset, rate=RATE, max_block=256, seed=SEED)
            phrase, _ = render_midi(inst, phrase_file(preset, Path(tmp) / f"{name}.mid"), tail_max_s=1.0)
            out[name] = {take: {"sha256": hashlib.sha256(np.ascontiguousarray(a, np.float32).tobytes()).hexdigest(),
                                "samples": int(len(a)), "rms": _fingerprint(a)}
                         for take, a in (("note", note), ("phrase", phrase))}
    return out


def machine() -> dict:
    """What the exact hashes depend on: the kernels are built with -march=native."""
    cc = subprocess.run(["cc", "--version"], capture_output=True, text=True).stdout.splitlines()[:1]
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cc": cc[0] if cc else "", "cpu": cpu, "machine": platform.machine()}


if __name__ == "__main__":
    if "--record" in sys.argv:
        HASHES.write_text(json.dumps({"machine": machine(), "takes": render_all()}, indent=1) + "\n")
        print(f"wrote {HASHES}")
    else:
        print(json.dumps({k: {t: v[t]["sha256"][:16] for t in v} for k, v in render_all().items()}, indent=1))

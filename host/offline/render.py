"""Offline rendering: single notes, MIDI files and the demo phrase, to WAV.

Rendering goes through the very block loop live play uses (Instrument.
process, one kernel call per block) and the same MIDI translator, so a take
rendered offline sounds like the same take played live.  Noise is seeded:
the same inputs give the same file.
"""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

import mido
import numpy as np
import soundfile as sf

from sheafsynth.engine.errors import InputError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.host.controls import MidiTranslator

__all__ = ["BLOCK", "TAIL_MAX_S", "DEMO_PHRASE", "write_wav", "peak_dbfs", "render_note", "midi_events",
           "render_midi"]

BLOCK = 256          # frames per kernel call, samples
TAIL_MAX_S = 8.0     # longest tail rendered after the last MIDI event, s


def write_wav(path: str | Path, audio: np.ndarray, rate: float, subtype: str = "PCM_24") -> Path:
    """Write mono float audio at ``rate`` Hz to WAV atomically (temp file, rename)."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix="." + target.name + ".", suffix=".wav", dir=target.parent)
    os.close(fd)
    umask = os.umask(0)
    os.umask(umask)
    try:
        os.chmod(tmp, 0o666 & ~umask)
        sf.write(tmp, audio, int(rate), subtype=subtype, format="WAV")
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target


def peak_dbfs(x: np.ndarray) -> float:
    """Peak level of ``x`` in dBFS (-inf for silence)."""
    p = float(np.max(np.abs(x))) if len(x) else 0.0
    return 20.0 * np.log10(p) if p > 0 else float("-inf")


def render_note(inst: Instrument, note: int, velocity: int, seconds: float, hold: float | None = None) -> np.ndarray:
    """One note held for ``hold`` s (default: all but the last quarter), then released."""
    total = int(round(seconds * inst.rate))
    hold_n = int(round((hold if hold is not None else seconds * 0.75) * inst.rate))
    out = np.empty(total, dtype=np.float32)
    inst.note_on(note, velocity, 0)
    i = 0
    while i < total:
        n = min(BLOCK, total - i)
        if i <= hold_n < i + n:
            inst.note_off(note, hold_n - i)
        inst.process(n, out[i:i + n])
        i += n
    return out


def _progress(total_s: float):
    """A rich progress bar for long renders on a terminal, else None."""
    if total_s < 20.0 or not sys.stderr.isatty():
        return None
    # lazy: rich is needed only for long renders on a terminal (start-up time)
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(TextColumn("rendering"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                    TimeRemainingColumn(), transient=True)


def midi_events(path: str | Path):
    """(time_s, mido.Message) for every channel message of a Standard MIDI File."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such MIDI file")
    try:
        mid = mido.MidiFile(str(p))
    except (OSError, EOFError, ValueError, KeyError, IndexError) as e:
        raise InputError(f"{p}: not a readable Standard MIDI File ({e})") from None
    if mid.type == 2:
        raise InputError(f"{p}: MIDI file type 2 (independent sequences) is not supported; use type 0 or 1")
    t = 0.0
    out = []
    try:
        for msg in mid:      # merged tracks, tempo map applied, delta times in seconds
            t += msg.time
            if not msg.is_meta and msg.type != "sysex":
                out.append((t, msg))
    except (ValueError, KeyError, IndexError, EOFError) as e:
        raise InputError(f"{p}: damaged MIDI data ({e})") from None
    return out


def render_midi(inst: Instrument, path: str | Path, *, channel: int | None = None,
                tail_max_s: float = TAIL_MAX_S) -> tuple[np.ndarray, dict]:
    """Render a MIDI file; after the last event every note is released and the tail rendered.

    Returns (mono float32 audio at ``inst.rate`` Hz, stats): "midi_messages" and "midi_ignored"
    counted by the translator, "notes_out_of_range" (note-ons skipped: outside the preset's
    playable range ``preset.notes``) and "notes_out_of_range_which" (those notes, sorted),
    "program_changes_ignored" (program changes on the rendered channel: a render plays one preset,
    so they change nothing) and "program_changes_which" (their MIDI data bytes 0-127, sorted, unique).
    """
    events = midi_events(path)
    programs: list[int] = []
    tr = MidiTranslator(inst.preset, inst.program.param_index, channel=channel, on_program=programs.append)
    rate = inst.rate
    end = events[-1][0] if events else 0.0
    total = int(np.ceil(end * rate)) + 1
    chunks: list[np.ndarray] = []
    j = 0
    i = 0
    prog = _progress(end)
    task = prog.add_task("render", total=total) if prog else None
    if prog:
        prog.start()
    try:
        while i < total:
            n = min(BLOCK, total - i)
            while j < len(events) and int(events[j][0] * rate) < i + n:
                t, msg = events[j]
                off = max(0, int(t * rate) - i)
                for ev in tr.translate(msg, off):
                    inst.push_event(*ev)
                j += 1
            buf = np.empty(n, dtype=np.float32)
            inst.process(n, buf)
            chunks.append(buf)
            i += n
            if prog:
                prog.update(task, completed=i)
    finally:
        if prog:
            prog.stop()
    inst.release_all(0)
    tail_n = int(tail_max_s * rate)
    k = 0
    while k < tail_n:
        buf = np.empty(BLOCK, dtype=np.float32)
        inst.process(BLOCK, buf)
        chunks.append(buf)
        k += BLOCK
        if inst.counters["voices_active"] == 0:
            break
    stats = {"midi_messages": tr.counters.received, "midi_ignored": tr.counters.ignored,
             "notes_out_of_range": tr.counters.out_of_range,
             "notes_out_of_range_which": sorted(tr.counters.out_of_range_notes),
             "program_changes_ignored": len(programs), "program_changes_which": sorted(set(programs))}
    return np.concatenate(chunks) if chunks else np.zeros(0, np.float32), stats


# The demo phrase: a short figure of our own in D dorian, (start s, note, velocity, length s).
DEMO_PHRASE = [
    (0.00, 50, 96, 0.9), (0.25, 57, 84, 0.7), (0.50, 62, 90, 0.6), (0.75, 65, 78, 0.5),
    (1.00, 64, 88, 0.5), (1.25, 60, 72, 0.5), (1.50, 62, 100, 1.2), (1.50, 57, 70, 1.2),
    (1.50, 53, 66, 1.2), (2.60, 69, 92, 0.4), (2.85, 67, 80, 0.4), (3.10, 62, 104, 1.6),
    (3.10, 50, 90, 1.6),
]

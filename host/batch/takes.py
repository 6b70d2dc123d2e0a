"""One take of a sample set: a note at a velocity, rendered until silent, trimmed and measured.

A take's noise seed is derived from (base seed, note, velocity, round)
alone, and every take gets a fresh instrument, so its audio is the same
sample for sample whichever worker renders it and in whatever order.  The
note is held for ``hold_s`` s, then released; rendering stops once the
output has stayed below ``SILENCE_DBFS`` for ``SILENCE_S`` s, or at
``seconds_max`` s.  The silence before the first and after the last sample
above ``SILENCE_DBFS`` is cut.  Loudness is integrated loudness per ITU-R
BS.1770 (pyloudnorm's meter), in LUFS.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass

import numpy as np
import pyloudnorm

from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir.program import LIMITER_CEILING
from sheafsynth.engine.preset import Preset
from sheafsynth.host.offline.render import BLOCK

__all__ = ["SILENCE_DBFS", "SILENCE_S", "LOUDNESS_MIN_S", "Take", "TakeSettings", "take_seed", "render_take",
           "loudness_lufs"]

SILENCE_DBFS = -90.0     # dBFS: below this the output counts as silent
SILENCE_S = 0.1          # s the output must stay silent for a take to end
LOUDNESS_MIN_S = 0.4     # s: BS.1770 gates 400 ms blocks, so shorter takes have no loudness


@dataclass(frozen=True)
class Take:
    """One take: MIDI note, velocity (1-127) and round-robin index (0, 1, ...)."""

    note: int
    velocity: int
    round: int

    @property
    def file(self) -> str:
        """The take's WAV file name inside the set's folder."""
        return f"n{self.note:03d}-v{self.velocity:03d}-r{self.round}.wav"


@dataclass(frozen=True)
class TakeSettings:
    """What every take of a set shares: rate (Hz), longest take (s), hold (s), loudness target (LUFS or None)
    and base noise seed."""

    rate: int
    seconds_max: float
    hold_s: float
    loudness: float | None
    seed: int


def take_seed(base_seed: int, take: Take) -> int:
    """The take's noise seed (32 bits): a hash of the base seed, note, velocity and round only."""
    text = f"sheafsynth-take:{int(base_seed)}:{take.note}:{take.velocity}:{take.round}".encode()
    return int.from_bytes(hashlib.sha256(text).digest()[:4], "little")


def loudness_lufs(audio: np.ndarray, rate: float) -> float | None:
    """Integrated loudness (LUFS, ITU-R BS.1770 via pyloudnorm) of mono ``audio`` at ``rate`` Hz.

    None for takes shorter than one 400 ms gating block or quieter than the absolute gate (-70 LUFS).
    """
    if len(audio) < int(math.ceil(LOUDNESS_MIN_S * rate)):
        return None
    value = float(pyloudnorm.Meter(int(rate)).integrated_loudness(np.asarray(audio, dtype=np.float64)))
    return value if math.isfinite(value) else None


def _trim(audio: np.ndarray, threshold: float) -> np.ndarray:
    loud = np.flatnonzero(np.abs(audio) >= threshold)
    if len(loud) == 0:
        return audio[:0]
    return audio[loud[0]:loud[-1] + 1]


def render_take(preset: Preset, take: Take, settings: TakeSettings) -> dict:
    """Render one take (module doc); runs on a worker.

    Returns {"audio": float32 samples at ``settings.rate`` Hz, "seed", "ended": "silence" or "max",
    "loudness": LUFS or None, "ceiling_held": True when --loudness would have pushed the peak above the
    limiter's ceiling (-1 dBFS) and the gain was held there}.  The instrument is built here, so the
    kernel is compiled or loaded through the build cache on this worker; its limiter stays on.
    """
    rate = settings.rate
    seed = take_seed(settings.seed, take)
    inst = Instrument(preset, rate=rate, max_block=BLOCK, seed=seed)
    total = int(round(settings.seconds_max * rate))
    hold_n = min(int(round(settings.hold_s * rate)), total)
    threshold = 10.0 ** (SILENCE_DBFS / 20.0)
    quiet_needed = int(round(SILENCE_S * rate))
    out = np.zeros(total, dtype=np.float32)
    inst.note_on(take.note, take.velocity, 0)
    released = hold_n == 0
    if released:
        inst.note_off(take.note, 0)
    heard = False
    quiet = 0
    ended = "max"
    i = 0
    while i < total:
        n = min(BLOCK, total - i)
        if not released and i <= hold_n < i + n:
            inst.note_off(take.note, hold_n - i)
            released = True
        block = out[i:i + n]
        inst.process(n, block)
        loud = np.flatnonzero(np.abs(block) >= threshold)
        if len(loud):
            heard = True
            quiet = n - 1 - int(loud[-1])
        else:
            quiet += n
        i += n
        if (heard or released) and quiet >= quiet_needed:
            ended = "silence"
            break
    audio = _trim(out[:i], threshold)
    level = loudness_lufs(audio, rate)
    held = False
    if settings.loudness is not None and level is not None:
        gain = 10.0 ** ((settings.loudness - level) / 20.0)
        peak = float(np.max(np.abs(audio)))
        if peak * gain > LIMITER_CEILING:
            gain = LIMITER_CEILING / peak
            held = True
        audio = (audio.astype(np.float64) * gain).astype(np.float32)
        level = loudness_lufs(audio, rate)
    return {"audio": audio, "seed": seed, "ended": ended, "loudness": level, "ceiling_held": held}

"""Everything ``sheafsynth play`` takes, checked before anything opens.

Times in s, rates in Hz, buffer sizes in frames.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from sheafsynth.engine.errors import InputError
from sheafsynth.host import bank

__all__ = ["PlayOptions"]


@dataclass
class PlayOptions:
    """Everything ``sheafsynth play`` takes; times in s, rate in Hz, buffer in frames."""

    preset: str
    midi_in: str | None = None
    virtual_midi: str | None = None
    midi_api: str | None = None
    device: str | None = None
    rate: int | None = None
    buffer: int = 128
    channel: int | None = None          # 1-16, None = omni
    seconds: float | None = None
    record: str | None = None
    report: str | None = None
    learn: str | None = None
    bank_dir: str | None = None
    save_as: str | None = None
    allow_unstable: bool = False
    no_limiter: bool = False
    sets: dict[str, float] = field(default_factory=dict)
    seed: int = 0
    stall_probe: bool = False
    shallow_idle: bool = False
    timing_log: bool = True             # --report keeps every MIDI arrival and audio-clock anchors

    def check(self) -> None:
        """Raise InputError naming the first bad option."""
        if not (isinstance(self.buffer, int) and 16 <= self.buffer <= 4096):
            raise InputError(f"--buffer {self.buffer}: expected 16..4096 frames")
        if self.rate is not None and not 8000 <= self.rate <= 192000:
            raise InputError(f"--rate {self.rate}: expected 8000..192000 Hz")
        if self.channel is not None and not 1 <= self.channel <= 16:
            raise InputError(f"--channel {self.channel}: MIDI channels are 1-16")
        if self.seconds is not None and not (0 < self.seconds <= 7 * 24 * 3600):
            raise InputError(f"--seconds {self.seconds:g}: expected a positive duration")
        if self.midi_in is not None and self.virtual_midi is not None:
            raise InputError("--midi-in and --virtual-midi: choose one")
        if self.save_as is not None:
            if not bank.valid_preset_name(self.save_as):
                raise InputError(f"--save-as {self.save_as!r}: use 1-64 letters, digits, spaces, '-' or '_'")
            if bank.is_factory_name(self.save_as):
                raise InputError(f"--save-as {self.save_as!r} is a factory preset; choose another name")
        if self.record is not None and not str(self.record).lower().endswith(".wav"):
            raise InputError(f"--record {self.record!r}: the recording is a .wav file")
        for opt, path in (("--record", self.record), ("--report", self.report)):
            if path is not None:
                parent = Path(path).expanduser().resolve().parent
                if not parent.is_dir():
                    raise InputError(f"{opt} {path!r}: folder {str(parent)!r} does not exist")

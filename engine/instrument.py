"""The plugin-style instrument: one compiled preset behind a host-shaped API.

Offline render, live play, tests and notebooks all go through this object;
nothing else reaches into a kernel (DESIGN §4).  Typical use::

    inst = Instrument("porch-pluck", rate=48000, max_block=256)
    inst.note_on(60, 100)
    block = inst.process(256)          # float32 mono, limiter applied

Events carry a sample offset inside the next block.  Parameter values are
in the parameter's own units and are ramped by the kernel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable

import numpy as np

from sheafsynth.engine.backends.c.abi import CDEF
from sheafsynth.engine.backends.c.build import CompiledModule, compile_module
from sheafsynth.engine.backends.c.emit import generate
from sheafsynth.engine.errors import PresetError, SheafsynthError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.ir.program import ParamInfo, StepProgram
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.engine.preset import Preset
from sheafsynth.engine.ir import voicing as V

__all__ = ["Instrument", "KernelHandle", "render_notes", "EVENT_CAPACITY", "RATES"]

EVENT_CAPACITY = 4096
RATES = (22050, 32000, 44100, 48000, 88200, 96000, 192000)


@dataclass(frozen=True)
class KernelHandle:
    """Raw addresses for the live host runtime (csrc/host_rt.c)."""

    render_fn: int      # address of sheafsynth_render (ss_render_fn)
    state: int          # address of the kernel state
    module: CompiledModule


class Instrument:
    """A compiled preset with note, control and block-processing calls."""

    def __init__(self, preset, *, rate: float = 48000, max_block: int = 512, seed: int = 0,
                 polyphony: int | None = None, limiter: bool = True, strict: bool = False,
                 min_ramp_s: dict[str, float] | None = None):
        """``min_ramp_s``: per-parameter ramp times (s) a stability certificate
        requires; the host passes engine.analysis.report.ramp_limits(preset) here."""
        self.preset: Preset = load_checked(preset)
        self._min_ramp_s = dict(min_ramp_s or {})
        self._seed = int(seed) & 0xFFFFFFFF
        self._polyphony = polyphony
        self._limiter = bool(limiter)
        self._strict = strict
        self._events: list[tuple] = []
        self.events_dropped = 0
        self.prepare(rate, max_block)

    # -- life cycle --------------------------------------------------------
    def prepare(self, rate: float, max_block: int) -> None:
        """Compile (or load from cache) the kernel for ``rate`` Hz and blocks up to ``max_block``."""
        if not (isinstance(max_block, int) and 1 <= max_block <= 8192):
            raise PresetError(f"max block {max_block!r} must be a whole number in 1..8192", "max_block")
        if not (8000 <= float(rate) <= 192000):
            raise PresetError(f"sample rate {rate!r} Hz is outside 8000..192000", "rate")
        values = self.values if hasattr(self, "_mod") else None
        self.program: StepProgram = lower(self.preset, float(rate), int(max_block), self._polyphony,
                                          self._min_ramp_s)
        self.source = generate(self.program)
        self._mod = compile_module(CDEF, self.source, tag="k", strict=self._strict)
        ffi, lib = self._mod.ffi, self._mod.lib
        self._state = ffi.new("char[]", int(lib.sheafsynth_state_size()))
        self._check(lib.sheafsynth_init(self._state, self._seed), "init")
        self._check(lib.sheafsynth_set_limiter(self._state, int(self._limiter)), "limiter")
        self._evbuf = ffi.new("ss_event[]", EVENT_CAPACITY)
        self._counters = ffi.cast("ss_counters *", self._state)
        self.rate = float(rate)
        self.max_block = int(max_block)
        self._pidx = self.program.param_index
        if values:
            for name, v in values.items():
                self.set_now(name, v)

    @property
    def cached(self) -> bool:
        """True when the kernel was loaded without running the compiler."""
        return self._mod.cached

    @property
    def module(self) -> CompiledModule:
        return self._mod

    def handle(self) -> KernelHandle:
        ffi = self._mod.ffi
        fn = int(ffi.cast("uintptr_t", ffi.addressof(self._mod.lib, "sheafsynth_render")))
        return KernelHandle(fn, int(ffi.cast("uintptr_t", self._state)), self._mod)

    def _check(self, rc: int, what: str) -> None:
        """One choke point for kernel status codes."""
        if rc < 0:
            raise SheafsynthError(f"kernel {what} failed with status {rc} (preset {self.preset.name!r})")

    # -- parameters --------------------------------------------------------
    @property
    def parameters(self) -> list[ParamInfo]:
        return list(self.program.params)

    def param_index(self, name: str) -> int:
        if name not in self._pidx:
            known = ", ".join(self._pidx) or "none"
            raise PresetError(f'unknown parameter "{name}" (this preset has: {known})', "parameters")
        return self._pidx[name]

    @property
    def values(self) -> dict[str, float]:
        lib = self._mod.lib
        return {p.name: float(lib.sheafsynth_get_param(self._state, p.index)) for p in self.program.params}

    def set_now(self, name: str, value: float) -> None:
        """Jump a parameter to ``value`` without a ramp (before playing)."""
        i = self.param_index(name)
        p = self.program.params[i]
        if not (math.isfinite(value) and p.lo <= value <= p.hi):
            raise PresetError(f"value {value:g} is outside [{p.lo:g}, {p.hi:g}]", f"parameters.{name}")
        self._check(self._mod.lib.sheafsynth_set_param_now(self._state, i, float(value)), "set")

    def set_ramp(self, name: str, seconds: float) -> None:
        """Length of the kernel's linear ramp for every change of ``name`` (s).

        The steepest ramp is then (max - min) / seconds per second; the
        ramp-limited stability certificate sets this so the kernel never
        moves a parameter faster than the proof allows.
        """
        i = self.param_index(name)
        n = max(1, int(round(float(seconds) * self.rate)))
        self._check(self._mod.lib.sheafsynth_set_ramp(self._state, i, n), "ramp")

    # -- events ------------------------------------------------------------
    def _push(self, offset: int, typ: int, a: int = 0, b: int = 0, value: float = 0.0) -> None:
        self._events.append((int(offset), typ, int(a), int(b), float(value)))

    def push_event(self, offset: int, typ: int, a: int = 0, b: int = 0, value: float = 0.0) -> None:
        """Queue a raw kernel event (types ``EV_*`` in engine.ir.voicing, carried to C by csrc/ss_abi.h)."""
        self._push(offset, typ, a, b, value)

    def note_on(self, note: int, velocity: int = 100, offset: int = 0) -> None:
        self._push(offset, V.EV_NOTE_ON, note, velocity)

    def note_off(self, note: int, offset: int = 0) -> None:
        self._push(offset, V.EV_NOTE_OFF, note)

    def control(self, name: str, value: float, offset: int = 0) -> None:
        """Move parameter ``name`` toward ``value`` (parameter units; clamped to range)."""
        self._push(offset, V.EV_PARAM, self.param_index(name), 0, value)

    def control_index(self, index: int, value: float, offset: int = 0) -> None:
        self._push(offset, V.EV_PARAM, index, 0, value)

    def bend(self, semitones: float, offset: int = 0) -> None:
        self._push(offset, V.EV_BEND, 0, 0, semitones)

    def sustain(self, on: bool, offset: int = 0) -> None:
        self._push(offset, V.EV_SUSTAIN, 0, 1 if on else 0)

    def all_notes_off(self, offset: int = 0) -> None:
        self._push(offset, V.EV_ALL_NOTES_OFF)

    def all_sound_off(self, offset: int = 0) -> None:
        self._push(offset, V.EV_ALL_SOUND_OFF)

    def release_all(self, offset: int = 0) -> None:
        self._push(offset, V.EV_RELEASE_ALL)

    def pending_events(self) -> list[tuple]:
        return list(self._events)

    # -- processing --------------------------------------------------------
    def process(self, frames: int, out: np.ndarray | None = None) -> np.ndarray:
        """Render one block of ``frames`` samples (mono float32) with the queued events."""
        if not 0 < frames <= self.max_block:
            raise PresetError(f"block of {frames} frames is outside 1..{self.max_block}", "frames")
        if out is None:
            out = np.empty(frames, dtype=np.float32)
        evs = sorted(self._events, key=lambda e: max(0, min(frames - 1, e[0])))
        self._events.clear()
        if len(evs) > EVENT_CAPACITY:
            self.events_dropped += len(evs) - EVENT_CAPACITY
            evs = evs[:EVENT_CAPACITY]
        buf = self._evbuf
        for i, (off, typ, a, b, val) in enumerate(evs):
            e = buf[i]
            e.offset, e.type, e.a, e.b, e.value = off, typ, a, b, val
        ffi = self._mod.ffi
        rc = self._mod.lib.sheafsynth_render(self._state, buf, len(evs),
                                             ffi.cast("float *", ffi.from_buffer(out)), frames)
        self._check(rc, "render")
        return out[:frames]

    def render(self, frames_total: int, block: int | None = None) -> np.ndarray:
        """Render ``frames_total`` samples in blocks (events queued so far land in the first)."""
        block = block or self.max_block
        out = np.empty(frames_total, dtype=np.float32)
        i = 0
        while i < frames_total:
            n = min(block, frames_total - i)
            self.process(n, out[i:i + n])
            i += n
        return out

    @property
    def counters(self) -> dict:
        c = self._counters
        return {"blocks": int(c.blocks), "frames": int(c.frames), "voices_active": int(c.voices_active),
                "voices_stolen": int(c.voices_stolen), "guard_resets": int(c.guard_resets),
                "events_ignored": int(c.events_ignored), "peak": float(c.peak),
                "limiter_gain": float(c.limiter_gain)}

    def voices(self) -> list[tuple[str, int]]:
        """(status, note) for every voice slot."""
        n = self.program.polyphony
        ffi = self._mod.ffi
        st, nt = ffi.new("int32_t[]", n), ffi.new("int32_t[]", n)
        self._mod.lib.sheafsynth_voices(self._state, st, nt, n)
        return [(V.STATUS_NAMES[st[i]], int(nt[i])) for i in range(n)]

    # -- state -------------------------------------------------------------
    def save_state(self) -> dict:
        """The preset document with current parameter values (plain JSON data)."""
        return {"preset": self.preset.raw, "values": self.values}

    def load_state(self, state: dict) -> None:
        if not isinstance(state, dict) or "values" not in state:
            raise PresetError('a saved state needs "values"', "state")
        for name, v in state["values"].items():
            self.set_now(name, float(v))


def render_notes(instrument: Instrument, notes: Iterable[tuple[float, int, int, float]],
                 seconds: float, block: int = 256) -> np.ndarray:
    """Render (start_s, note, velocity, duration_s) notes offline, sample-accurately."""
    rate = instrument.rate
    total = int(round(seconds * rate))
    evs = []
    for start, note, vel, dur in notes:
        on = int(round(start * rate))
        evs.append((on, 0, note, vel))
        evs.append((on + max(1, int(round(dur * rate))), 1, note, 0))
    evs.sort()
    out = np.zeros(total, dtype=np.float32)
    j = 0
    i = 0
    while i < total:
        n = min(block, total - i)
        while j < len(evs) and evs[j][0] < i + n:
            t, kind, note, vel = evs[j]
            if kind == 0:
                instrument.note_on(note, vel, t - i)
            else:
                instrument.note_off(note, t - i)
            j += 1
        instrument.process(n, out[i:i + n])
        i += n
    return out

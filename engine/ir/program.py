"""The step program (the IR): its types, its constants and the rules it obeys.

The step program is the one description of a voice's per-sample update that
three consumers read (DESIGN §1): the C generator (engine.backends.c), the
NumPy reference stepper (engine.backends.reference, the living definition of
this IR) and the sparse assembly for analysis (engine.analysis.assemble).
Nothing downstream looks at the preset again; engine.ir.lower builds it.

Per sample, every consumer performs the same five steps:

1. ``sig[0]`` = the excitation sample;
2. every block without feedthrough produces its output from its state
   (a delay reads its ring buffer ``len`` samples back, a field reads its
   pickups from u);
3. blocks with feedthrough, in ``order``, gather their inputs and produce
   ``y = C s + D u``;
4. the remaining blocks gather their inputs;
5. states advance: ``s = A s + B u``; delays write ``u * relgain`` into the
   ring; fields advance their update (engine.ir.fields); the voice output
   is the sum of the ``out`` terms.

Signals are numbered: 0 is the excitation, then each block's output ports.
Each input is a list of ``(signal, Affine gain)`` terms.

Block kinds (``Block.kind``) are the three shapes a cell lowers to:
``"linear"`` (a small parameter-affine state space: gain, filters,
statespace cells; the cell's own kind is ``Block.cell_kind``), ``"delay"``
(a ring buffer) and ``"field"`` (a :class:`engine.ir.fields.FieldProgram`).
Every consumer dispatches on ``Block.kind`` through one table.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.preset.affine import Affine, AffineMatrix

if TYPE_CHECKING:   # engine.ir.fields imports this module (note_hz); the annotation only
    from sheafsynth.engine.ir.fields import FieldProgram

__all__ = [
    "MIDI_A4", "A4_HZ", "RAMP_FADE_S", "LIMITER_CEILING", "LIMITER_RELEASE_S", "GUARD_LIMIT",
    "SILENCE_RELEASED", "SILENCE_HELD", "HELD_QUIET_S", "MAX_BEND_SEMITONES",
    "KIND_LINEAR", "KIND_DELAY", "KIND_FIELD", "BLOCK_KINDS",
    "ParamInfo", "Term", "Block", "LoopStep", "TuningLoop", "StepProgram", "note_hz",
]

MIDI_A4 = 69                # MIDI note number of A4 (MIDI 1.0)
A4_HZ = 440.0               # Hz (ISO 16)
RAMP_FADE_S = 0.003         # s: steal / all-sound-off fade (common practice: a few ms)
LIMITER_CEILING = 0.8912509381337456   # -1 dBFS (linear)
LIMITER_RELEASE_S = 0.05    # s: limiter release time constant
GUARD_LIMIT = 1.0e4         # a voice sample beyond this is a runaway (linear)
SILENCE_RELEASED = 1.0e-5   # -100 dBFS: a released voice below this for a block is freed
SILENCE_HELD = 1.0e-6       # -120 dBFS: a held voice this quiet for HELD_QUIET_S is freed
HELD_QUIET_S = 0.5          # s
MAX_BEND_SEMITONES = 24.0   # semitones either way

KIND_LINEAR = "linear"
KIND_DELAY = "delay"
KIND_FIELD = "field"
BLOCK_KINDS = (KIND_LINEAR, KIND_DELAY, KIND_FIELD)


def note_hz(note: float) -> float:
    """MIDI note (fractional: note plus bend in semitones) to Hz: 440 * 2^((n - 69)/12).

    MIDI 1.0 note numbering, A4 = 440 Hz (ISO 16).  The one definition; the
    kernel's ``ss_note_hz`` (csrc/ss_kernel_rt.h) computes the same in C.
    """
    return A4_HZ * 2.0 ** ((note - MIDI_A4) / 12.0)


@dataclass(frozen=True)
class ParamInfo:
    """One preset parameter: value and range in its own ``unit``, ramp length in s."""

    name: str
    index: int
    value: float
    lo: float
    hi: float
    unit: str
    ramp_s: float               # every change is a linear ramp of this length (s)

    @property
    def slope_per_s(self) -> float:
        """Largest change per second the kernel's ramp can make (a full-range jump), units/s."""
        return (self.hi - self.lo) / self.ramp_s


@dataclass(frozen=True)
class Term:
    """One term of a gathered input: ``gain * sig[signal]``."""

    signal: int
    gain: Affine


@dataclass
class Block:
    """One cell in the step program (module doc: kinds and the five steps)."""

    index: int
    name: str
    kind: str                            # one of BLOCK_KINDS
    n_in: int
    n_out: int
    out_signal: int                      # first output signal index
    inputs: list[list[Term]]             # per input port
    # linear blocks
    A: AffineMatrix | None = None
    B: AffineMatrix | None = None
    C: AffineMatrix | None = None
    D: AffineMatrix | None = None
    # delay blocks
    delay_length: int | None = None      # fixed length in samples, or None when pitch-tracking
    pitch: bool = False
    pitch_ratio: float = 1.0
    pitch_cents: float = 0.0             # cents
    tune_symbol: str | None = None       # "@tune0" for a pitch-fraction allpass
    loop: int | None = None              # tuning loop this delay / allpass belongs to
    field: FieldProgram | None = None    # field blocks
    cell_kind: str = ""                  # the preset cell's kind ("biquad", "gain", ...)

    @property
    def is_delay(self) -> bool:
        return self.kind == KIND_DELAY

    @property
    def is_field(self) -> bool:
        return self.kind == KIND_FIELD

    def linear(self) -> tuple[AffineMatrix, AffineMatrix, AffineMatrix, AffineMatrix]:
        """(A, B, C, D) of a linear block; BuildError for a delay or field block."""
        if self.A is None or self.B is None or self.C is None or self.D is None:
            raise BuildError(f"internal: block {self.index} ({self.kind}) has no state-space matrices")
        return self.A, self.B, self.C, self.D

    def fieldprog(self) -> FieldProgram:
        """The FieldProgram of a field block; BuildError for any other block."""
        if self.field is None:
            raise BuildError(f"internal: block {self.index} ({self.kind}) is not a field")
        return self.field

    def fixed_length(self) -> int:
        """Length in samples of a fixed (not pitch-tracking) delay block."""
        if self.delay_length is None:
            raise BuildError(f"internal: block {self.index} has no fixed delay length")
        return self.delay_length

    @property
    def n_state(self) -> int:
        """Small dense states (delays and fields keep theirs in buffers)."""
        return self.linear()[0].rows if self.kind == KIND_LINEAR else 0

    @property
    def feedthrough(self) -> bool:
        return self.kind == KIND_LINEAR and not self.linear()[3].is_zero


@dataclass(frozen=True)
class LoopStep:
    """One cell of a tuning loop, entered at ``in_port`` and left at ``out_port``."""

    block: int
    in_port: int
    out_port: int


@dataclass
class TuningLoop:
    """The shortest cycle through a pitch-tracking delay.

    ``steps`` lists the other cells on the cycle and ``gains`` the scalar
    wire gains along it; their phase delay at the note frequency is
    subtracted from the delay length (plus the allpass's fraction) so the
    loop rings at the played pitch (engine.ir.tuning).
    """

    index: int
    delay: int
    tuner: int | None
    steps: list[LoopStep]
    gains: list[Affine]


@dataclass
class StepProgram:
    """A whole voice: blocks, wiring, parameters, tuning loops, at ``rate`` Hz."""

    name: str
    rate: float                          # Hz
    polyphony: int
    max_block: int                       # samples
    notes: tuple[int, int]               # lowest and highest playable MIDI note
    params: list[ParamInfo]
    blocks: list[Block]
    order: list[int]                     # feedthrough blocks in evaluation order
    out_terms: list[Term]
    n_signals: int
    loops: list[TuningLoop]
    excitation: dict[str, Any]
    release_decay: float                 # amplitude factor per period after note-off
    ring_size: dict[int, int] = field(default_factory=dict)   # delay block -> ring length (power of 2)
    limiter_ceiling: float = LIMITER_CEILING

    @property
    def param_index(self) -> dict[str, int]:
        return {p.name: p.index for p in self.params}

    def block_named(self, name: str) -> Block:
        for b in self.blocks:
            if b.name == name:
                return b
        raise KeyError(name)

    def ramp_samples(self) -> list[int]:
        """Length of every parameter's ramp in samples (at least 1)."""
        return [max(1, int(round(p.ramp_s * self.rate))) for p in self.params]

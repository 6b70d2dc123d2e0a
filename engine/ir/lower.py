"""Lower a network sheaf to the step program (the IR).

The step program is the one description of a voice's per-sample update that
three consumers read (DESIGN §1): the C generator (engine.backends.c.emit), the NumPy
reference stepper (engine.backends.reference.stepper) and the sparse assembly for analysis
(engine.analysis.assemble).  Nothing downstream looks at the preset again.

Per sample, every consumer performs the same five steps:

1. ``sig[0]`` = the excitation sample;
2. every cell without feedthrough produces its output from its state
   (a delay reads its ring buffer ``len`` samples back);
3. cells with feedthrough, in ``order``, gather their inputs and produce
   ``y = C s + D u``;
4. the remaining cells gather their inputs;
5. states advance: ``s = A s + B u``; delays write ``u * relgain`` into the
   ring; the voice output is the sum of the ``out`` terms.

Signals are numbered: 0 is the excitation, then each cell's output ports.
Each input is a list of ``(signal, Affine gain)`` terms.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

from sheafsynth.engine.preset.affine import Affine, AffineMatrix
from sheafsynth.engine.model.cells import CellModel
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.sheaf import EXCITE, OUT, NetworkSheaf, evaluation_order, sheaf_of

MIDI_A4 = 69
A4_HZ = 440.0
RAMP_FADE_S = 0.003        # steal / all-sound-off fade (common practice: a few ms)
LIMITER_CEILING = 0.8912509381337456   # -1 dBFS
LIMITER_RELEASE_S = 0.05
GUARD_LIMIT = 1.0e4        # a voice sample beyond this is a runaway
SILENCE_RELEASED = 1.0e-5  # -100 dBFS: a released voice below this for a block is freed
SILENCE_HELD = 1.0e-6      # a held voice this quiet for HELD_QUIET_S is freed
HELD_QUIET_S = 0.5
MAX_BEND_SEMITONES = 24.0


@dataclass(frozen=True)
class ParamInfo:
    name: str
    index: int
    value: float
    lo: float
    hi: float
    unit: str
    ramp_s: float               # every change is a linear ramp of this length (s)

    @property
    def slope_per_s(self) -> float:
        """Largest change per second the kernel's ramp can make (a full-range jump)."""
        return (self.hi - self.lo) / self.ramp_s


@dataclass(frozen=True)
class Term:
    signal: int
    gain: Affine


@dataclass
class Block:
    """One cell in the step program."""

    index: int
    name: str
    kind: str
    n_in: int
    n_out: int
    out_signal: int                      # first output signal index
    inputs: list[list[Term]]             # per input port
    # linear cells
    A: AffineMatrix | None = None
    B: AffineMatrix | None = None
    C: AffineMatrix | None = None
    D: AffineMatrix | None = None
    # delay cells
    delay_length: int | None = None      # fixed length, or None when pitch-tracking
    pitch: bool = False
    pitch_ratio: float = 1.0
    pitch_cents: float = 0.0
    tune_symbol: str | None = None       # "@tune0" for a pitch-fraction allpass
    loop: int | None = None              # tuning loop this delay / allpass belongs to
    field: object = None                 # field cells: engine.ir.fields.FieldProgram

    @property
    def is_delay(self) -> bool:
        return self.kind == "delay"

    @property
    def is_field(self) -> bool:
        return self.field is not None

    @property
    def n_state(self) -> int:
        """Small dense states (delays and fields keep theirs in buffers)."""
        return 0 if self.is_delay or self.is_field else self.A.rows

    @property
    def feedthrough(self) -> bool:
        return not self.is_delay and not self.is_field and not self.D.is_zero


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
    loop rings at the played pitch.
    """

    index: int
    delay: int
    tuner: int | None
    steps: list[LoopStep]
    gains: list[Affine]


@dataclass
class StepProgram:
    name: str
    rate: float
    polyphony: int
    max_block: int
    notes: tuple[int, int]
    params: list[ParamInfo]
    blocks: list[Block]
    order: list[int]                     # feedthrough blocks in evaluation order
    out_terms: list[Term]
    n_signals: int
    loops: list[TuningLoop]
    excitation: dict
    release_decay: float
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


def note_hz(note: float) -> float:
    """MIDI note to Hz: 440 * 2^((n - 69)/12) (MIDI 1.0 numbering, ISO 16 A4)."""
    return A4_HZ * 2.0 ** ((note - MIDI_A4) / 12.0)


def lower(preset, rate: float = 48000.0, max_block: int = 1024, polyphony: int | None = None,
          min_ramp_s: dict[str, float] | None = None) -> StepProgram:
    """Lower a validated preset to its step program at ``rate`` Hz.

    ``min_ramp_s`` lengthens parameter ramps (seconds per change) where a
    ramp-limited stability certificate needs it (engine.analysis.report.ramp_limits).
    """
    if rate not in (22050.0, 32000.0, 44100.0, 48000.0, 88200.0, 96000.0, 192000.0):
        if not (8000.0 <= rate <= 192000.0):
            raise PresetError(f"sample rate {rate:g} Hz is outside 8000..192000", "rate")
    sheaf: NetworkSheaf = sheaf_of(preset)
    min_ramp_s = min_ramp_s or {}
    params = [ParamInfo(p.name, i, p.value, p.lo, p.hi, p.unit, max(p.ramp_ms / 1000.0, min_ramp_s.get(p.name, 0.0)))
              for i, p in enumerate(preset.parameters.values())]
    cells = sheaf.cells
    out_signal = []
    n_sig = 1
    for c in cells:
        out_signal.append(n_sig)
        n_sig += c.n_out

    def signal_of(src: int, port: int | None, k: int) -> int:
        if src == EXCITE:
            return 0
        return out_signal[src] + (port if port is not None else k)

    inputs: list[list[list[Term]]] = [[[] for _ in range(c.n_in)] for c in cells]
    out_terms: list[Term] = []
    for w in sheaf.wires:
        for r in range(w.gain.rows):
            for col in range(w.gain.cols):
                g = w.gain[r, col]
                if g.is_zero:
                    continue
                term = Term(signal_of(w.src, w.src_port, col), g)
                if w.dst == OUT:
                    out_terms.append(term)
                else:
                    inputs[w.dst][w.dst_port if w.dst_port is not None else r].append(term)

    blocks = [_block(i, c, out_signal[i], inputs[i]) for i, c in enumerate(cells)]
    loops = _tuning_loops(sheaf, blocks)
    prog = StepProgram(
        name=preset.name, rate=float(rate), polyphony=int(polyphony or preset.polyphony),
        max_block=int(max_block), notes=preset.notes, params=params, blocks=blocks,
        order=evaluation_order(sheaf), out_terms=out_terms, n_signals=n_sig, loops=loops,
        excitation=dict(preset.excitation), release_decay=preset.release_decay,
    )
    for b in blocks:
        if b.is_delay:
            prog.ring_size[b.index] = _ring_size(b, prog)
    _check_voice_memory(prog)
    if any(b.is_field for b in blocks):
        from sheafsynth.engine.ir.fields import finish_fields

        finish_fields(prog, preset)
    return prog


def _block(i: int, c: CellModel, out_sig: int, inputs: list[list[Term]]) -> Block:
    if c.kind == "field":
        from sheafsynth.engine.ir.fields import lower_field

        return Block(i, c.name, "field", c.n_in, c.n_out, out_sig, inputs, field=lower_field(c))
    if c.delay is not None:
        d = c.delay
        return Block(i, c.name, "delay", 1, 1, out_sig, inputs, delay_length=d.length,
                     pitch=d.pitch, pitch_ratio=d.ratio, pitch_cents=d.cents)
    return Block(i, c.name, c.kind, c.n_in, c.n_out, out_sig, inputs, c.A, c.B, c.C, c.D)


MAX_VOICE_MEMORY = 512 << 20   # bytes of delay lines and small states, all voices


def _check_voice_memory(prog: StepProgram) -> None:
    """Refuse a preset whose voices would need more memory than MAX_VOICE_MEMORY at this rate."""
    per_voice = 4 * (sum(prog.ring_size.values()) + sum(b.n_state for b in prog.blocks))
    total = per_voice * prog.polyphony
    if total > MAX_VOICE_MEMORY:
        raise PresetError(f"{prog.polyphony} voices need {total / 2**20:.0f} MiB of delay lines at "
                          f"{prog.rate:g} Hz (limit {MAX_VOICE_MEMORY >> 20} MiB); lower the polyphony, "
                          "shorten the delays or raise the lowest note", "polyphony")


def _ring_size(b: Block, prog: StepProgram) -> int:
    if b.pitch:
        lowest = note_hz(prog.notes[0] - MAX_BEND_SEMITONES) * b.pitch_ratio * 2 ** (b.pitch_cents / 1200)
        need = int(math.ceil(prog.rate / lowest)) + 4
    else:
        need = b.delay_length + 1
    return 1 << max(2, (need - 1).bit_length())


def _tuning_loops(sheaf: NetworkSheaf, blocks: list[Block]) -> list[TuningLoop]:
    loops: list[TuningLoop] = []
    tuners_used: set[int] = set()
    for b in blocks:
        if not b.pitch:
            continue
        cycle = _shortest_cycle(sheaf, b.index)
        steps: list[LoopStep] = []
        gains: list[Affine] = []
        tuner = None
        if cycle is not None:
            for w in cycle:
                if w.gain.rows != 1 or w.gain.cols != 1:
                    raise PresetError(
                        f'the loop through pitch delay "{b.name}" must carry single signals; '
                        f"pick ports on wires[{w.index}]", f"wires[{w.index}]")
                gains.append(w.gain[0, 0])
            for w_in, w_out in zip(cycle[:-1], cycle[1:]):
                cell = w_in.dst
                if blocks[cell].pitch:
                    raise PresetError(f'the loop through pitch delay "{b.name}" passes another pitch delay '
                                      f'"{blocks[cell].name}"', "cells")
                steps.append(LoopStep(cell, w_in.dst_port or 0, w_out.src_port or 0))
                if sheaf.cells[cell].tune:
                    if tuner is not None:
                        raise PresetError(f'the loop through "{b.name}" has two pitch-fraction allpasses '
                                          f'("{blocks[tuner].name}", "{blocks[cell].name}")', "cells")
                    tuner = cell
        k = len(loops)
        b.loop = k
        if tuner is not None:
            tb = blocks[tuner]
            sym = f"@tune{k}"
            tb.tune_symbol = sym
            tb.loop = k
            for old, new in (("@tune", sym), ("@tunec", f"@tunec{k}")):
                tb.A, tb.B, tb.C, tb.D = (_rename(m, old, new) for m in (tb.A, tb.B, tb.C, tb.D))
            tuners_used.add(tuner)
        loops.append(TuningLoop(k, b.index, tuner, steps, gains))
    for i, c in enumerate(sheaf.cells):
        if c.tune and i not in tuners_used:
            raise PresetError(f'allpass "{c.name}" tracks the pitch fraction but is not on a loop through '
                              'a "pitch" delay', f"cells[{i}].delay")
    return loops


def _rename(m: AffineMatrix, old: str, new: str) -> AffineMatrix:
    rows = []
    for row in m.entries:
        rows.append(tuple(Affine(e.const, tuple((new if s == old else s, c) for s, c in e.terms)) for e in row))
    return AffineMatrix(m.rows, m.cols, tuple(rows))


def _shortest_cycle(sheaf: NetworkSheaf, start: int):
    """Wires of the shortest directed cycle from ``start`` back to itself.

    Cycles through a field cell (a bridge) are couplings, not tuning loops.
    """
    prev: dict[int, object] = {}
    q = deque()
    for w in sheaf.wires:
        if w.src == start and w.dst >= 0 and sheaf.cells[w.dst].kind != "field":
            if w.dst == start:
                return [w]
            if w.dst not in prev:
                prev[w.dst] = w
                q.append(w.dst)
    while q:
        v = q.popleft()
        for w in sheaf.wires:
            if w.src != v or w.dst < 0 or sheaf.cells[w.dst].kind == "field":
                continue
            if w.dst == start:
                path = [w]
                node = v
                while node != start:
                    pw = prev[node]
                    path.append(pw)
                    node = pw.src
                return list(reversed(path))
            if w.dst not in prev and w.dst != start:
                prev[w.dst] = w
                q.append(w.dst)
    return None

"""Lower a validated preset's network sheaf to the step program (engine.ir.program).

:func:`lower` numbers the signals, turns every wire's gain matrix into
input terms, lowers each cell to a block (linear, delay or field), sizes
the delay rings (power-of-two lengths, samples), finds the tuning loop
through every pitch-tracking delay and refuses presets whose voices would
need more than MAX_VOICE_MEMORY bytes.  The types and the per-sample rules
live in engine.ir.program; field blocks are lowered by engine.ir.fields.
"""

from __future__ import annotations

import math
from collections import deque

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.fields import finish_fields, lower_field
from sheafsynth.engine.ir.program import (KIND_DELAY, KIND_FIELD, KIND_LINEAR, MAX_BEND_SEMITONES, Block,
                                          LoopStep, ParamInfo, StepProgram, Term, TuningLoop, note_hz)
from sheafsynth.engine.model.cells import CellModel
from sheafsynth.engine.model.timebase import Timebase, excitation_at
from sheafsynth.engine.model.sheaf import EXCITE, OUT, NetworkSheaf, Wire, evaluation_order, sheaf_of
from sheafsynth.engine.preset.affine import Affine, AffineMatrix

__all__ = ["lower", "MAX_VOICE_MEMORY"]

def lower(preset, rate: float = 48000.0, max_block: int = 1024, polyphony: int | None = None,
          min_ramp_s: dict[str, float] | None = None) -> StepProgram:
    """Lower a validated preset to its step program at ``rate`` Hz.

    The preset's physical and design-rate quantities become per-sample
    numbers for ``rate`` in the model layer (``sheaf_of(preset, rate)``,
    engine.model.timebase), so every consumer of the step program sees the
    same instrument at every rate.

    ``min_ramp_s`` lengthens parameter ramps (seconds per change) where a
    ramp-limited stability certificate needs it (engine.analysis.report.ramp_limits).
    """
    if rate not in (22050.0, 32000.0, 44100.0, 48000.0, 88200.0, 96000.0, 192000.0):
        if not (8000.0 <= rate <= 192000.0):
            raise PresetError(f"sample rate {rate:g} Hz is outside 8000..192000", "rate")
    sheaf: NetworkSheaf = sheaf_of(preset, float(rate))
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
        excitation=excitation_at(preset.excitation, Timebase(float(rate), preset.design_rate)),
        release_decay=preset.release_decay,
    )
    for b in blocks:
        if b.is_delay:
            prog.ring_size[b.index] = _ring_size(b, prog)
    _check_voice_memory(prog)
    if any(b.is_field for b in blocks):
        finish_fields(prog, preset)
    return prog


def _block(i: int, c: CellModel, out_sig: int, inputs: list[list[Term]]) -> Block:
    if c.kind == "field":
        return Block(i, c.name, KIND_FIELD, c.n_in, c.n_out, out_sig, inputs, field=lower_field(c),
                     cell_kind=c.kind)
    if c.delay is not None:
        d = c.delay
        return Block(i, c.name, KIND_DELAY, 1, 1, out_sig, inputs, delay_length=d.length,
                     pitch=d.pitch, pitch_ratio=d.ratio, pitch_cents=d.cents, cell_kind=c.kind)
    return Block(i, c.name, KIND_LINEAR, c.n_in, c.n_out, out_sig, inputs, c.A, c.B, c.C, c.D,
                 cell_kind=c.kind)


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
        need = b.fixed_length() + 1
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
                tb.A, tb.B, tb.C, tb.D = (_rename(m, old, new) for m in tb.linear())
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


def _shortest_cycle(sheaf: NetworkSheaf, start: int) -> list[Wire] | None:
    """Wires of the shortest directed cycle from ``start`` back to itself.

    Cycles through a field cell (a bridge) are couplings, not tuning loops.
    """
    prev: dict[int, Wire] = {}
    q: deque[int] = deque()
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

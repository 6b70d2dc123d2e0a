"""Pitch tracking: delay length and allpass fraction for a played note.

For a tuning loop the total phase delay at the note frequency f must be
P = fs / f samples.  The rest of the loop (filters, fixed delays, wire gains)
contributes its phase delay tau_rest(w) = -arg H(e^{jw}) / w; the pitch
delay takes the integer part and a first-order allpass the fraction
tau in [0.5, 1.5), with the exact phase-delay formula

    a = sin(w (1 - tau) / 2) / sin(w (1 + tau) / 2)

which tends to the Thiran value (1 - tau) / (1 + tau) as w -> 0
(Thiran 1971; Jaffe & Smith 1983).  Without an allpass the length is
rounded.  The generated C (engine.backends.c.emit) performs the same arithmetic in
double precision; the reference stepper and the analysis call this module.
"""

from __future__ import annotations

import cmath
import math
from typing import Mapping, Sequence

import numpy as np

from sheafsynth.engine.ir.program import Block, StepProgram, TuningLoop, note_hz

__all__ = ["TAU_MIN", "KEEP_LO", "KEEP_HI", "block_response", "phase_delay", "allpass_coef", "loop_frequency",
           "tune_loop", "tune_all", "env_from_values", "loop_slack"]

TAU_MIN = 0.5   # allpass fraction range [0.5, 1.5) when a length is chosen
KEEP_LO, KEEP_HI = 0.02, 1.98   # a knob may move the fraction this far before the length changes


def block_response(prog: StepProgram, bi: int, in_port: int, out_port: int,
                   env: Mapping[str, float], omega: float) -> complex:
    """H(e^{j omega}) of block ``bi`` from one input port to one output port."""
    b = prog.blocks[bi]
    if b.is_delay:
        raise ValueError("delays are handled by their length")
    Am, Bm, Cm, Dm = b.linear()
    d = Dm[out_port, in_port].value(env)
    k = b.n_state
    if k == 0:
        return complex(d)
    A = Am.value(env)
    Bc = Bm.value(env)[:, in_port]
    Cr = Cm.value(env)[out_port, :]
    z = cmath.exp(1j * omega)
    x = np.linalg.solve(z * np.eye(k) - A, Bc.astype(complex))
    return complex(d + Cr @ x)


def phase_delay(h: complex, omega: float) -> float:
    """-arg(h) / omega in samples (arg in (-pi, pi])."""
    return -math.atan2(h.imag, h.real) / omega


def allpass_coef(tau: float, omega: float) -> float:
    """First-order allpass coefficient with phase delay ``tau`` at ``omega``."""
    return math.sin(omega * (1.0 - tau) / 2.0) / math.sin(omega * (1.0 + tau) / 2.0)


def loop_frequency(prog: StepProgram, loop: TuningLoop, pitch: float) -> float:
    """Frequency in Hz the loop must ring at for ``pitch`` (MIDI note + bend, semitones)."""
    b = prog.blocks[loop.delay]
    return note_hz(pitch) * b.pitch_ratio * 2.0 ** (b.pitch_cents / 1200.0)


def tune_loop(prog: StepProgram, loop: TuningLoop, pitch: float,
              env: Mapping[str, float], keep_len: int | None = None) -> tuple[int, float | None]:
    """(delay length in samples, allpass coefficient or None) for ``pitch``.

    ``pitch`` is the MIDI note plus bend in semitones; ``env`` maps every
    parameter name to its current value.  With ``keep_len`` (a retune after
    a knob moved) the length is kept while the fraction stays inside
    [KEEP_LO, KEEP_HI] (or, without an allpass, while the rounding error
    stays under one sample): knob motion then never changes a delay length,
    which is what lets the stability proof treat delays as fixed (engine.analysis.report).
    """
    f = loop_frequency(prog, loop, pitch)
    period = prog.rate / f
    omega = 2.0 * math.pi * f / prog.rate
    rest = 0.0
    for st in loop.steps:
        if st.block == loop.tuner:
            continue
        blk = prog.blocks[st.block]
        if blk.is_delay:
            rest += float(blk.fixed_length())
        else:
            rest += phase_delay(block_response(prog, st.block, st.in_port, st.out_port, env, omega), omega)
    for g in loop.gains:
        if g.value(env) < 0.0:
            rest -= math.pi / omega
    need = period - rest
    while need < 1.0 + TAU_MIN:
        need += period
    max_len = prog.ring_size[loop.delay] - 2
    if keep_len is not None:
        if loop.tuner is None and abs(need - keep_len) < 1.0:
            return keep_len, None
        if loop.tuner is not None and KEEP_LO <= need - keep_len <= KEEP_HI:
            return keep_len, allpass_coef(need - keep_len, omega)
    if loop.tuner is None:
        n = int(math.floor(need + 0.5))
        return max(1, min(max_len, n)), None
    n = int(math.floor(need - TAU_MIN))
    n = max(1, min(max_len, n))
    tau = need - n
    tau = min(max(tau, KEEP_LO), KEEP_HI)
    return n, allpass_coef(tau, omega)


def loop_slack(prog: StepProgram, b: Block) -> float:
    """Upper bound of (pitch delay length) / period for the tuning loop through ``b``.

    :func:`tune_loop`: length = period - rest, and rest loses at most half a
    period per filter on the loop (a phase delay -arg H / w with |arg H| <= pi)
    and per wire gain that can be negative; fixed delays only add to rest.
    """
    lp = prog.loops[b.loop] if b.loop is not None else None
    if lp is None:
        return 1.0
    k = sum(1 for st in lp.steps if st.block != lp.tuner and not prog.blocks[st.block].is_delay)
    rng = {p.name: (p.lo, p.hi) for p in prog.params}
    for g in lp.gains:
        lo = g.const
        for sym, c in g.terms:
            if sym not in rng:
                lo = -1.0
                break
            lo += min(c * rng[sym][0], c * rng[sym][1])
        if lo < 0.0:
            k += 1
    return 1.0 + 0.5 * k


def tune_all(prog: StepProgram, pitch: float, env: Mapping[str, float]) -> list[tuple[int, float | None]]:
    """:func:`tune_loop` for every loop of ``prog`` (fresh lengths)."""
    return [tune_loop(prog, lp, pitch, env) for lp in prog.loops]


def env_from_values(prog: StepProgram, values: Sequence[float]) -> dict[str, float]:
    """Parameter name -> value, from values indexed like ``prog.params``."""
    return {p.name: float(values[p.index]) for p in prog.params}

"""Sparse assembly of a voice's whole linear system from the step program.

For a parameter setting theta and a played pitch, the held voice is the
linear time-invariant system

    s[n+1] = A s[n] + B e[n],    y[n] = C s[n] + D e[n]

with e the excitation.  A delay line of length N contributes N shift
states (a sparse chain, never a dense matrix); a linear cell its k states.
Signals produced by cells with feedthrough are eliminated through
(I - D_cells W)^{-1}, which exists because the wiring has no delay-free
loop (the matrix is nilpotent in evaluation order).

This is the third consumer of the step program (after the C generator and
the reference stepper); the analysis (``sheafsynth check``) reads it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import scipy.sparse as sp

from sheafsynth.engine.analysis.assemble_field import assemble_block
from sheafsynth.engine.ir.program import StepProgram
from sheafsynth.engine.ir.tuning import tune_all

__all__ = ["LinearSystem", "assemble", "impulse_response"]


@dataclass
class LinearSystem:
    """A, B, C, D (scipy.sparse CSR) with the state range of every cell."""

    A: sp.csr_matrix
    B: sp.csr_matrix
    C: sp.csr_matrix
    D: np.ndarray
    partition: dict[str, np.ndarray]
    rate: float
    pitch: float
    values: dict[str, float]
    delay_lengths: dict[str, int] = field(default_factory=dict)

    @property
    def n_states(self) -> int:
        return self.A.shape[0]


def assemble(prog: StepProgram, values: Mapping[str, float] | None = None, pitch: float = 60.0) -> LinearSystem:
    """The closed-loop system at parameter ``values`` (defaults fill gaps) and ``pitch``."""
    env = {p.name: float(p.value) for p in prog.params}
    if values:
        env.update({k: float(v) for k, v in values.items()})
    tunes = tune_all(prog, pitch, env)
    lens: dict[int, int] = {}
    for lp, (n, a) in zip(prog.loops, tunes):
        lens[lp.delay] = n
        if lp.tuner is not None and a is not None:
            env[f"@tune{lp.index}"] = float(a)
            env[f"@tunec{lp.index}"] = float(np.sqrt(1.0 - a * a))
    offsets: dict[int, int] = {}
    size: dict[int, int] = {}
    n_s = 0
    for b in prog.blocks:
        offsets[b.index] = n_s
        if b.is_delay:
            size[b.index] = lens[b.index] if b.index in lens else b.fixed_length()
        elif b.is_field:
            size[b.index] = 2 * b.fieldprog().n_dof      # [u; u_prev]
        else:
            size[b.index] = b.n_state
        n_s += size[b.index]
    in_off: dict[int, int] = {}
    n_u = 0
    for b in prog.blocks:
        in_off[b.index] = n_u
        n_u += b.n_in
    n_sig = prog.n_signals

    Ab = sp.lil_matrix((n_s, n_s))
    Bb = sp.lil_matrix((n_s, n_u))
    Cb = sp.lil_matrix((n_sig, n_s))       # signals from states
    Db = np.zeros((n_sig, n_u))            # signals from inputs (feedthrough)
    W = np.zeros((n_u, n_sig))             # inputs from signals
    field_A: list = []                     # (offset, sparse block) of field cells
    for b in prog.blocks:
        o, k, ui = offsets[b.index], size[b.index], in_off[b.index]
        if b.is_delay:
            Bb[o, ui] = 1.0
            for i in range(1, k):
                Ab[o + i, o + i - 1] = 1.0
            Cb[b.out_signal, o + k - 1] = 1.0
        elif b.is_field:
            fa, fb, fc = assemble_block(b.fieldprog(), env, pitch, prog.rate)
            field_A.append((o, fa))
            for r, c in zip(*fb.nonzero()):
                Bb[o + r, ui + c] = fb[r, c]
            for r, c in zip(*fc.nonzero()):
                Cb[b.out_signal + r, o + c] = fc[r, c]
        else:
            A, B, C, D = (m.value(env) for m in b.linear())
            if k:
                Ab[o:o + k, o:o + k] = A
                Bb[o:o + k, ui:ui + b.n_in] = B
                Cb[b.out_signal:b.out_signal + b.n_out, o:o + k] = C
            Db[b.out_signal:b.out_signal + b.n_out, ui:ui + b.n_in] = D
        for p, port in enumerate(b.inputs):
            for t in port:
                W[ui + p, t.signal] += t.gain.value(env)
    wout = np.zeros((1, n_sig))
    for t in prog.out_terms:
        wout[0, t.signal] += t.gain.value(env)
    E = np.zeros((n_sig, 1))
    E[0, 0] = 1.0
    M = np.linalg.inv(np.eye(n_sig) - Db @ W)     # small: one row per cell output
    Cb = Cb.tocsr()
    WM = sp.csr_matrix(W @ M)
    A_cl = (Ab.tocsr() + _placed(field_A, n_s) + Bb.tocsr() @ WM @ Cb).tocsr()
    B_cl = sp.csr_matrix(Bb.tocsr() @ (W @ M @ E))
    C_cl = sp.csr_matrix(sp.csr_matrix(wout @ M) @ Cb)
    D_cl = wout @ M @ E
    A_cl.eliminate_zeros()
    part = {b.name: np.arange(offsets[b.index], offsets[b.index] + size[b.index]) for b in prog.blocks}
    return LinearSystem(A_cl, B_cl, C_cl, D_cl, part, prog.rate, float(pitch),
                        {p.name: env[p.name] for p in prog.params},
                        {prog.blocks[i].name: n for i, n in lens.items()})


def _placed(blocks, n: int) -> sp.csr_matrix:
    """Sum of square sparse blocks placed on the diagonal at their offsets (n x n)."""
    out = sp.csr_matrix((n, n))
    for o, blk in blocks:
        c = sp.coo_matrix(blk)
        out = out + sp.csr_matrix((c.data, (c.row + o, c.col + o)), shape=(n, n))
    return out


def impulse_response(sysm: LinearSystem, n: int) -> np.ndarray:
    """y for a unit impulse at e[0] (for tests: compare with the kernel)."""
    s = np.zeros(sysm.n_states)
    y = np.zeros(n)
    for i in range(n):
        e = 1.0 if i == 0 else 0.0
        y[i] = (sysm.C @ s)[0] + sysm.D[0, 0] * e
        s = sysm.A @ s + (sysm.B.toarray()[:, 0] * e)
    return y

"""Cell gains and the vector small-gain test over a network of cells.

Every cell of a voice gets a gain (dimensionless, in one signal norm, ℓ2 or
ℓ∞) that holds for every admissible parameter path; wires multiply by their
own induced norms.  If the nonnegative cell-to-cell gain matrix Γ has
spectral radius below 1 the network is stable for those paths (small-gain
theorem, vector form, valid for time-varying systems).  Filters get their ℓ2
gain from a storage function (engine.analysis.storage) and their ℓ∞ gain
from the convex-combination rule here; `peak_gain` / `frozen_hinf` give the
frozen (LTI) H∞ norm on a frequency grid.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal, Sequence

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog

from sheafsynth.engine.analysis.spectra import dense
from sheafsynth.engine.analysis.storage import corner_blocks, l2_gain_common_storage
from sheafsynth.engine.errors import AnalysisError

__all__ = [
    "Norm",
    "CellModel",
    "WireModel",
    "CellGain",
    "GainMatrix",
    "linf_gain_convex_filter",
    "cell_gain",
    "build_gain_matrix",
    "network_small_gain",
    "peak_gain",
    "frozen_hinf",
]


def _linf_gain_with_weights(blocks, w: np.ndarray, contraction: float) -> float | None:
    """ℓ∞ gain bound for state weights w > 0, or None if a row condition fails."""
    tol = 1e-12
    gain = 0.0
    for A, B, C, D in blocks:
        aw = np.abs(A) @ w
        if np.any(aw + np.abs(B).sum(axis=1) > w * (1.0 + tol)):
            return None
        if np.any(aw > (1.0 - contraction) * w):
            return None
        out = np.abs(C) @ w + np.abs(D).sum(axis=1)
        gain = max(gain, float(out.max()) if out.size else 0.0)
    return gain


def linf_gain_convex_filter(blocks_at_corners, *, contraction: float = 1e-9) -> float | None:
    """Peak (ℓ∞) gain bound γ of a filter under arbitrarily fast variation.

    What makes "gain ≤ 1" true is a property of the realisation actually
    stepped, not of the transfer function: every new state entry and every
    output must be a combination of the current state entries and inputs
    whose absolute coefficients sum to ≤ 1 (nonnegative coefficients summing
    to ≤ 1 -- a convex combination -- is the common case: the 2-tap average
    with state u[n−1], the one-pole lowpass y = (1−p)u + p·y[n−1] with state
    y[n−1] and 0 ≤ p < 1).  Then, by induction, |x[n]|∞ ≤ max(|x[0]|∞, ‖u‖∞)
    and |y[n]|∞ ≤ γ·max(|x[0]|∞, ‖u‖∞) however the coefficients move, since
    each sample uses only that sample's coefficients.  A one-pole with p < 0
    fails (|p| + 1 − p > 1); so does a θ-dependent rescaling of the state.
    Additionally every state row must contract strictly (Σ|A_rj| ≤ 1 −
    contraction) so the initial state is forgotten: then limsup|y| ≤
    γ·limsup|u| too, which the ℓ∞ small-gain argument needs for decay.

    Checked at the corners (Σ|a(θ)| is convex in θ); first with unit state
    weights, then with the best diagonal state weighting w > 0 from a linear
    program (weighted max-norm |x_r|/w_r, which handles e.g. FIR delay
    chains).  Returns γ, or None if no weighting satisfies the conditions.
    """
    blocks = corner_blocks(blocks_at_corners)
    n = blocks[0][0].shape[0]
    best = _linf_gain_with_weights(blocks, np.ones(n), contraction)
    if n == 0 or (best is not None and best <= 1.0):
        return best
    # variables z = [w (n), γ]; minimise γ
    rows, rhs = [], []
    for A, B, C, D in blocks:
        aA = np.abs(A)
        for r in range(n):
            e = np.zeros(n)
            e[r] = 1.0
            rows.append(np.r_[aA[r] - e, 0.0])
            rhs.append(-np.abs(B[r]).sum())
            rows.append(np.r_[aA[r] - (1.0 - 10 * contraction) * e, 0.0])
            rhs.append(0.0)
        for q in range(C.shape[0]):
            rows.append(np.r_[np.abs(C[q]), -1.0])
            rhs.append(-np.abs(D[q]).sum())
    res = linprog(
        np.r_[np.zeros(n), 1.0],
        A_ub=np.array(rows),
        b_ub=np.array(rhs),
        bounds=[(1e-6, 1e6)] * n + [(0, None)],
        method="highs",
    )
    if res.status != 0:
        return best
    w = np.asarray(res.x[:n], dtype=float)  # scale matters (B and C terms): keep it
    cand = _linf_gain_with_weights(blocks, w, contraction)  # independent re-check
    if cand is None:
        return best
    return cand if best is None else min(best, cand)


Norm = Literal["l2", "linf"]


@dataclass(frozen=True)
class CellModel:
    """One cell as seen by the small-gain route.

    kind: "delay" (pure delay line; `length_varies` if its length is
    modulated), "gain" (static map; `corners` = its matrix at each corner)
    or "filter" (`corners` = (A, B, C, D) at each corner).
    """

    name: str
    kind: Literal["delay", "gain", "filter"]
    corners: tuple = ()
    length_varies: bool = False


@dataclass(frozen=True)
class WireModel:
    """Wire from cell `src`'s output into cell `dst`'s input.

    corners: the wire's matrix (or scalar gain) at each corner of the box.
    """

    src: str
    dst: str
    corners: tuple = (1.0,)


@dataclass(frozen=True)
class CellGain:
    """Worst-case gain of one cell (dimensionless) in one signal norm."""

    cell: str
    gain: float
    norm: Norm | Literal["any"]   # "any": holds in every norm (a stand-in until the norm is chosen)
    route: str


@dataclass(frozen=True)
class GainMatrix:
    """Nonnegative cell-to-cell gain matrix, all entries in the norm `norm`.

    matrix[i, j] = (gain of cell i) · (gain of the wires from cell j into
    cell i), i.e. the gain from cell j's output to cell i's output.
    """

    cells: tuple
    matrix: np.ndarray
    norm: Norm


def _induced_norm(W, norm: Norm) -> float:
    W = np.atleast_2d(np.asarray(dense(W) if sp.issparse(W) else W, dtype=float))
    if W.size == 0:
        return 0.0
    if norm == "l2":
        return float(np.linalg.norm(W, 2))
    return float(np.abs(W).sum(axis=1).max())


def _check_norm(norm) -> Norm:
    if norm not in ("l2", "linf"):
        raise AnalysisError(f"norm must be 'l2' or 'linf', got {norm!r}")
    return norm


def cell_gain(cell: CellModel, norm: Norm) -> CellGain | None:
    """Gain of one cell under arbitrary-speed parameter motion, or None.

    * delay: 1 in ℓ∞ always (each output is some past input, also for a
      modulated length read with interpolation weights in [0, 1]); 1 in ℓ2
      only for a fixed length -- a modulated read pointer can repeat samples
      and raise the energy, so then None.
    * gain: max induced norm of its matrix over the corners (convex in θ).
    * filter: ℓ2 → `l2_gain_common_storage`; ℓ∞ → `linf_gain_convex_filter`.
    """
    norm = _check_norm(norm)
    if cell.kind == "delay":
        if norm == "l2" and cell.length_varies:
            return None
        return CellGain(cell.name, 1.0, norm, "delay line")
    if cell.kind == "gain":
        if not cell.corners:
            raise AnalysisError(f"cell {cell.name!r}: a gain cell needs its matrix at each corner")
        return CellGain(cell.name, max(_induced_norm(g, norm) for g in cell.corners), norm, "static gain")
    if cell.kind == "filter":
        if not cell.corners:
            raise AnalysisError(f"cell {cell.name!r}: a filter cell needs (A, B, C, D) at each corner")
        if norm == "l2":
            res = l2_gain_common_storage(cell.corners)
            return None if res is None else CellGain(cell.name, res[0], norm, "common storage (l2)")
        g = linf_gain_convex_filter(cell.corners)
        return None if g is None else CellGain(cell.name, g, norm, "convex combination (linf)")
    raise AnalysisError(f"cell {cell.name!r}: unknown kind {cell.kind!r}")


def build_gain_matrix(cell_gains: Sequence[CellGain], wires: Sequence[WireModel], norm: Norm) -> GainMatrix:
    """Assemble the nonnegative gain matrix in ONE norm.

    Rule enforced: every cell gain must be in `norm`, and wire gains are
    taken as induced norms of that same kind (spectral norm for ℓ2, max row
    sum for ℓ∞); mixing an ℓ2 gain with an ℓ∞ gain raises AnalysisError,
    because the small-gain argument chains inequalities of one norm.  Wires
    from or to names that are not cells (the voice's input and output) are
    ignored: they do not close loops.
    """
    norm = _check_norm(norm)
    names = [g.cell for g in cell_gains]
    if len(set(names)) != len(names):
        raise AnalysisError("duplicate cell names in the gain list")
    for g in cell_gains:
        if g.norm != norm:
            raise AnalysisError(
                f"cell {g.cell!r}: gain is in {g.norm} but the network is analysed in {norm}; "
                "one norm throughout"
            )
    idx = {n: i for i, n in enumerate(names)}
    G = np.zeros((len(names), len(names)))
    for w in wires:
        if w.src in idx and w.dst in idx:
            wg = max(_induced_norm(c, norm) for c in w.corners) if w.corners else 0.0
            G[idx[w.dst], idx[w.src]] += cell_gains[idx[w.dst]].gain * wg
    return GainMatrix(tuple(names), G, norm)


def network_small_gain(gain_matrix, *, margin: float = 1e-9) -> tuple[float, bool]:
    """Vector small-gain test: (ρ(Γ), certified) for a nonnegative gain matrix Γ.

    Γ[i, j] bounds the gain from cell j's output to cell i's output, every
    entry in one norm (use `build_gain_matrix`, which enforces it).  If each
    cell satisfies ‖y_i‖ ≤ γ_i‖u_i‖ + β_i(x₀) for every parameter path (and
    forgets its own initial state), then on every finite horizon the vector
    of output norms obeys v ≤ Γv + β, and ρ(Γ) < 1 makes (I − Γ)⁻¹ ≥ 0, so
    all signals stay bounded and decay: the network is stable under
    modulation of any speed.  `certified` is decided independently of the
    eigenvalue by Collatz–Wielandt: v = (I − Γ)⁻¹·1 > 0 with
    max_i (Γv)_i / v_i < 1 − margin.
    """
    G = gain_matrix.matrix if isinstance(gain_matrix, GainMatrix) else np.asarray(gain_matrix, dtype=float)
    G = np.atleast_2d(G)
    if G.shape[0] != G.shape[1]:
        raise AnalysisError(f"gain matrix must be square, got shape {G.shape}")
    if not np.all(np.isfinite(G)) or np.any(G < 0):
        raise AnalysisError("gain matrix must be finite and nonnegative")
    if G.size == 0:
        return 0.0, True
    rho = float(np.max(np.abs(np.linalg.eigvals(G))))
    n = G.shape[0]
    try:
        v = np.linalg.solve(np.eye(n) - G, np.ones(n))
    except np.linalg.LinAlgError:
        return rho, False
    if not np.all(v > 0):
        return rho, False
    ratio = float(np.max((G @ v) / v))
    return rho, bool(ratio < 1.0 - margin)


def peak_gain(A, B, C, D, zs) -> float:
    """max over the points ``zs`` (complex z) of the largest singular value of D + C (zI - A)^-1 B."""
    k = A.shape[0]
    if k:
        M = zs[:, None, None] * np.eye(k)[None] - A[None]
        try:
            H = D[None] + C[None] @ np.linalg.solve(M, np.broadcast_to(B, (len(zs),) + B.shape))
        except np.linalg.LinAlgError:      # a pole on the grid: unbounded gain
            return math.inf
    else:
        H = np.broadcast_to(D, (len(zs),) + D.shape)
    if H.shape[1] == 1 and H.shape[2] == 1:
        return float(np.max(np.abs(H)))
    return float(np.max(np.linalg.svd(H, compute_uv=False)))


def frozen_hinf(blocks_corners, n_freq: int = 2048) -> float:
    """Largest frozen H∞ norm over the corners (``n_freq`` points on the unit circle; a lower bound)."""
    zs = np.exp(1j * np.linspace(0, math.pi, n_freq))
    return max(peak_gain(A, B, C, D, zs) for A, B, C, D in blocks_corners)

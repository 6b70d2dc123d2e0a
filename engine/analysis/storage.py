"""Storage functions: ℓ2 gains of a filter cell that hold while knobs move.

A storage V(s) = sᵀPs proves the dissipation inequality

    [A B; C D]ᵀ diag(P⁺, I) [A B; C D] ⪯ diag(P, γ² I)

along a parameter path; summing it over time gives ‖y‖₂ ≤ γ‖u‖₂ + √V(s₀)
(γ dimensionless, signals per sample).  For a fixed P the inequality is
convex in the cell's matrices, which are affine in θ, so checking the
corners of the parameter box covers the whole box.  Two forms:

* **common storage** (`l2_gain_common_storage`): one P for every θ, so any
  speed of knob motion is covered;
* **ramp-limited storage** (`ramp_storage_gain`, `largest_ramp_slope`): P(θ)
  affine in θ and |θ⁺ − θ| ≤ δ·(hi − lo) per sample.  With a slack matrix G
  (Oliveira, Bernussou & Geromel 1999 style) the inequality is implied by
  the LMI

      [[diag(P(θ), γ²I), [A B]ᵀG, [C D]ᵀ], [Gᵀ[A B], G + Gᵀ − P(θ⁺), 0], [[C D], 0, I]] ≻ 0,

  affine in (θ, θ⁺) jointly; the admissible (θ, θ⁺) set is a product of
  hexagons (`hexagon`), so checking its vertices proves it everywhere.  When
  the parameters move only the output map [C D] (A and B constant), the
  slack is not needed: the plain Schur form with P(θ⁺) in place of G is
  already affine in (θ, θ⁺), and far less conservative.

Every positive answer is re-verified with eigenvalues of explicitly formed
matrices before it is returned; a solver's word alone is never trusted.
cvxpy (with Clarabel or SCS) solves the LMIs when installed; without it
every route here answers "not proven" (None).
"""

from __future__ import annotations

import itertools
import math
import warnings
from typing import Callable, Mapping, Sequence

import numpy as np

from sheafsynth.engine.analysis.spectra import dense
from sheafsynth.engine.errors import AnalysisError

__all__ = [
    "optional_cvxpy",
    "solve_lmi",
    "corner_blocks",
    "l2_gain_common_storage",
    "hexagon",
    "ramp_storage_gain",
    "largest_ramp_slope",
    "BlockAt",
]

Box = Mapping[str, tuple[float, float]]
BlockAt = Callable[[Mapping[str, float]], tuple[np.ndarray, ...]]


def optional_cvxpy():
    """The cvxpy module, or None when it is not installed.

    Imported lazily: cvxpy is a heavy optional dependency (start-up time), and
    its absence only makes the LMI routes answer "not proven".
    """
    try:
        import cvxpy  # noqa: PLC0415  (heavy optional dependency, see docstring)
    except Exception:  # pragma: no cover - depends on the environment
        return None
    return cvxpy


def solve_lmi(cp, prob, solvers: Sequence[str] = ("CLARABEL", "SCS")) -> bool:
    """Solve ``prob`` with the first of ``solvers`` that gives a usable answer.

    True if a solver reported optimal (or optimal but inaccurate: the answer
    is re-verified by the caller anyway).  Solver failures are "not proven",
    never a crash.
    """
    installed = set(cp.installed_solvers())
    for solver in solvers:
        if solver not in installed:
            continue
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                prob.solve(solver=solver, verbose=False)
        except Exception:  # solver failures are "not proven", never a crash
            continue
        if prob.status in ("optimal", "optimal_inaccurate"):
            return True
    return False


def _sym(X):
    return 0.5 * (X + X.T)


def corner_blocks(blocks_at_corners) -> list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]:
    """Check and densify (A, B, C, D) given at each corner; one shape at every corner."""
    out = []
    for i, blk in enumerate(blocks_at_corners):
        try:
            A, B, C, D = (dense(m) for m in blk)
        except (TypeError, ValueError):
            raise AnalysisError(f"block {i}: expected (A, B, C, D)") from None
        n, m, p = A.shape[0], B.shape[1], C.shape[0]
        if A.shape != (n, n) or B.shape != (n, m) or C.shape != (p, n) or D.shape != (p, m):
            raise AnalysisError(
                f"block {i}: inconsistent shapes A{A.shape} B{B.shape} C{C.shape} D{D.shape}"
            )
        out.append((A, B, C, D))
    if not out:
        raise AnalysisError("no blocks given")
    if len({(b[0].shape, b[1].shape, b[2].shape) for b in out}) != 1:
        raise AnalysisError("blocks at different corners have different shapes")
    return out


# --------------------------------------------------------------------------
# ℓ2 gain with a common storage
# --------------------------------------------------------------------------


def _verified_l2_gain(P: np.ndarray, blocks, strict: float) -> float | None:
    """Smallest γ for which storage P proves the dissipation inequality.

    At every corner, with Q = AᵀPA + CᵀC − P, S = AᵀPB + CᵀD,
    R = BᵀPB + DᵀD:  [Q S; Sᵀ R − γ²I] ⪯ 0  ⇔  Q ≺ 0 and
    γ² ≥ λmax(R − SᵀQ⁻¹S)  (Schur complement).  Requires P ≻ 0 and
    Q ⪯ −max(strict·λmin(P), round-off)·I (strict decrease, so the block
    forgets its state; round-off = a bound on the error of forming Q).
    """
    P = 0.5 * (P + P.T)
    ev = np.linalg.eigvalsh(P)
    if ev[0] <= 1e-12 * max(1.0, ev[-1]):
        return None
    g2 = 0.0
    eps = np.finfo(float).eps
    for A, B, C, D in blocks:
        Q = A.T @ P @ A + C.T @ C - P
        Q = 0.5 * (Q + Q.T)
        n = A.shape[0]
        roundoff = 100 * n * eps * (max(1.0, np.linalg.norm(A, 2) ** 2) * ev[-1] + np.linalg.norm(C, 2) ** 2)
        if np.linalg.eigvalsh(Q)[-1] > -max(strict * ev[0], roundoff):
            return None
        S = A.T @ P @ B + C.T @ D
        R = B.T @ P @ B + D.T @ D
        T = R - S.T @ np.linalg.solve(Q, S)
        T = 0.5 * (T + T.T)
        g2 = max(g2, float(np.linalg.eigvalsh(T)[-1]) if T.size else 0.0)
    g2 = g2 * (1.0 + 1e-9) + 1e-15  # round-off allowance, upward only
    return math.sqrt(g2)


def l2_gain_common_storage(blocks_at_corners, *, margin: float = 1e-6):
    """ℓ2 gain γ (dimensionless) of a block under arbitrarily fast variation.

    blocks_at_corners: list of (A, B, C, D), one per corner of the box.
    Searches one storage V(x) = xᵀPx, P ≻ 0, with
    [A B; C D]ᵀ diag(P, I) [A B; C D] ⪯ diag((1 − margin)P, γ²I) at every
    corner, minimising γ².  By the Schur complement this is affine in
    (A, B, C, D) for fixed P, so the corners cover the box, and summing the
    inequality over time gives ‖y‖₂ ≤ γ‖u‖₂ + √V(x₀) for every parameter path.
    The result is re-verified (`_verified_l2_gain`).  Returns (γ, P), or None
    when not proven (infeasible, solver missing or failing, verification failed).
    """
    blocks = corner_blocks(blocks_at_corners)
    n = blocks[0][0].shape[0]
    m = blocks[0][1].shape[1]
    if n == 0:  # static map: γ = max spectral norm of D
        return max(float(np.linalg.norm(D, 2)) if D.size else 0.0 for *_, D in blocks), np.zeros((0, 0))
    cp = optional_cvxpy()
    if cp is None:
        return None
    P = cp.Variable((n, n), symmetric=True)
    t = cp.Variable(nonneg=True)
    cons = [P >> 1e-7 * np.eye(n)]
    for A, B, C, D in blocks:
        M = np.block([[A, B], [C, D]])
        p = C.shape[0]
        W = cp.bmat([[P, np.zeros((n, p))], [np.zeros((p, n)), np.eye(p)]])
        lhs = M.T @ W @ M
        rhs = cp.bmat([[(1.0 - margin) * P, np.zeros((n, m))], [np.zeros((m, n)), t * np.eye(m)]])
        cons.append(_sym(rhs - lhs) >> 0)
    prob = cp.Problem(cp.Minimize(t), cons)
    if not solve_lmi(cp, prob) or P.value is None:
        return None
    Pv = np.array(P.value, dtype=float)
    gamma = _verified_l2_gain(Pv, blocks, strict=0.01 * margin)
    return None if gamma is None else (gamma, 0.5 * (Pv + Pv.T))


def hexagon(lo: float, hi: float, d: float) -> list[tuple[float, float]]:
    """Vertices of {(θ, θ⁺) ∈ [lo, hi]²: |θ⁺ − θ| ≤ d} (parameter units; d is clipped to hi − lo)."""
    d = min(d, hi - lo)
    pts = [(lo, lo), (lo, lo + d), (hi - d, hi), (hi, hi), (hi, hi - d), (lo + d, lo)]
    return list(dict.fromkeys(pts))


def ramp_storage_gain(block_at: BlockAt, names: Sequence[str], box: Box, gamma: float, delta_frac: float,
                      *, state_fixed: bool):
    """Affine storage P(θ) proving ℓ2 gain ``gamma`` for slopes ≤ delta_frac·range per sample.

    block_at(θ) gives the cell's (A, B, C, D) at a point θ (parameter units)
    of the parameters ``names`` (each with a range in ``box``);
    ``state_fixed``: A and B do not depend on them (then no slack matrix is
    needed, see the module docstring).  Returns {"P0", "P": {name: Pᵢ},
    "G"} with P(θ) = P0 + Σ θᵢPᵢ, or None when not proven.
    """
    cp = optional_cvxpy()
    if cp is None or not names:
        return None
    A0 = block_at({n: box[n][0] for n in names})[0]
    k = A0.shape[0]
    if k == 0:
        return None
    P0 = cp.Variable((k, k), symmetric=True)
    Pi = {n: cp.Variable((k, k), symmetric=True) for n in names}
    G = None if state_fixed else cp.Variable((k, k))
    cons = []
    hexes = [hexagon(box[n][0], box[n][1], delta_frac * (box[n][1] - box[n][0])) for n in names]
    eps = 1e-7
    numeric = []
    for v in itertools.product(*hexes):
        now = {n: t for n, (t, _) in zip(names, v)}
        nxt = {n: t for n, (_, t) in zip(names, v)}
        A, B, C, D = block_at(now)
        m, p = B.shape[1], C.shape[0]
        AB, CD = np.hstack([A, B]), np.hstack([C, D])
        P_now = P0 + sum(now[n] * Pi[n] for n in names)
        P_nxt = P0 + sum(nxt[n] * Pi[n] for n in names)
        top = cp.bmat([[P_now, np.zeros((k, m))], [np.zeros((m, k)), gamma ** 2 * np.eye(m)]])
        if G is None:
            M = cp.bmat([[top, AB.T @ P_nxt, CD.T],
                         [P_nxt @ AB, P_nxt, np.zeros((k, p))],
                         [CD, np.zeros((p, k)), np.eye(p)]])
        else:
            M = cp.bmat([[top, AB.T @ G, CD.T],
                         [G.T @ AB, G + G.T - P_nxt, np.zeros((k, p))],
                         [CD, np.zeros((p, k)), np.eye(p)]])
        cons.append(_sym(M) >> eps * np.eye(2 * k + m + p))
        numeric.append((now, nxt, AB, CD))
    prob = cp.Problem(cp.Minimize(0), cons)
    # an interior-point answer or none: "not proven" is cheap
    if not solve_lmi(cp, prob, ("CLARABEL",)) or P0.value is None:
        return None
    p0 = np.array(P0.value)
    pis = {n: np.array(Pi[n].value) for n in names}
    g = None if G is None else np.array(G.value)
    # independent check at every vertex with plain eigenvalues
    for now, nxt, AB, CD in numeric:
        m, p = AB.shape[1] - k, CD.shape[0]
        Pn = p0 + sum(now[n] * pis[n] for n in names)
        Px = p0 + sum(nxt[n] * pis[n] for n in names)
        top = np.block([[Pn, np.zeros((k, m))], [np.zeros((m, k)), gamma ** 2 * np.eye(m)]])
        gg, corner = (Px, Px) if g is None else (g, g + g.T - Px)
        M = np.block([[top, AB.T @ gg, CD.T], [gg.T @ AB, corner, np.zeros((k, p))],
                      [CD, np.zeros((p, k)), np.eye(p)]])
        if np.linalg.eigvalsh(_sym(M)).min() <= 0.0:
            return None
    return {"P0": p0, "P": pis, "G": g}


def largest_ramp_slope(block_at: BlockAt, names: Sequence[str], box: Box, gamma: float,
                       *, state_fixed: bool) -> float | None:
    """Largest slope (fraction of each range per sample) with a `ramp_storage_gain` proof.

    Geometric search upward from 1e-4 (or 1e-6), then bisection on a log
    scale; 1.0 means any jump across the box is covered.  None when not even
    the smallest slope is proven.
    """
    def proven(d: float) -> bool:
        return ramp_storage_gain(block_at, names, box, gamma, d, state_fixed=state_fixed) is not None

    hi = None
    d = 1e-4
    if not proven(d):
        d = 1e-6
        if not proven(d):
            return None
    lo = d
    while d < 1.0:
        d2 = min(1.0, d * 8)
        if not proven(d2):
            hi = d2
            break
        lo = d = d2
    if hi is None:
        return 1.0
    for _ in range(6):
        mid = math.sqrt(lo * hi)
        if proven(mid):
            lo = mid
        else:
            hi = mid
    return lo

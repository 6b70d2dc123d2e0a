"""Spectral radius of a matrix and the corners of a parameter box.

Pure linear algebra on matrices; nothing here knows about presets.  A
network's one-sample update is ``x[n+1] = A(θ) x[n] + B(θ) u[n]`` with every
matrix affine in the parameters θ, which range over a box
``{name: (lo, hi)}`` (parameter units).  `corners` lists the box's corners
(where convex checks need to be made), `spectral_radius` gives ρ(A) per
sample (dimensionless; |z| of the slowest-decaying mode) for dense or
sparse A.

Size limits: matrices up to ``engine.model.dense.DENSE_MAX`` states are solved
densely; `DENSE_ONE_OFF_MAX` is the larger size up to which a one-off dense
solve is still accepted when no cheaper exact route answered.
"""

from __future__ import annotations

import itertools
import math
from typing import Mapping, Sequence

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from sheafsynth.engine.analysis.deadline import Deadline
from sheafsynth.engine.errors import AnalysisError
from sheafsynth.engine.model.dense import DENSE_MAX
from sheafsynth.engine.model.spectra import start_vector

__all__ = [
    "MAX_CORNER_PARAMETERS",
    "DENSE_ONE_OFF_MAX",
    "as_matrix",
    "dense",
    "validate_box",
    "corners",
    "spectral_radius",
    "probe_radius",
]


#: Corner enumeration is exponential; beyond this many varying parameters
#: (4096 corners) `corners` refuses.
MAX_CORNER_PARAMETERS = 12

#: Largest operator size (states or DOFs) for a one-off dense solve (seconds at
#: most) when no cheaper exact route answered: the last resort of
#: `spectral_radius` after the sparse solvers failed, and the one-time,
#: cached diagonalisation of a field's Laplacian (engine.analysis.fields).
#: A different question from DENSE_MAX (the routine dense/sparse switch).
DENSE_ONE_OFF_MAX = 3000


def as_matrix(m, what: str):
    """Return a 2-D float ndarray or a CSR matrix; reject anything else."""
    if sp.issparse(m):
        out = sp.csr_matrix(m, dtype=float)
        if out.nnz and not np.all(np.isfinite(out.data)):
            raise AnalysisError(f"{what}: matrix has non-finite entries")
        return out
    arr = np.asarray(m, dtype=float)
    if arr.ndim == 0:
        arr = arr.reshape(1, 1)
    if arr.ndim != 2:
        raise AnalysisError(f"{what}: expected a 2-D matrix, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise AnalysisError(f"{what}: matrix has non-finite entries")
    return arr


def dense(m) -> np.ndarray:
    """`as_matrix` as a dense ndarray."""
    m = as_matrix(m, "matrix")
    return m.toarray() if sp.issparse(m) else m


def validate_box(box: Mapping[str, Sequence[float]]) -> dict[str, tuple[float, float]]:
    """Check a box {name: (lo, hi)}: finite ranges with lo ≤ hi."""
    out = {}
    for name, rng in dict(box).items():
        try:
            lo, hi = (float(v) for v in rng)
        except (TypeError, ValueError):
            raise AnalysisError(f"box[{name!r}]: expected (lo, hi), got {rng!r}") from None
        if not (math.isfinite(lo) and math.isfinite(hi)):
            raise AnalysisError(f"box[{name!r}]: range ({lo}, {hi}) is not finite")
        if lo > hi:
            raise AnalysisError(f"box[{name!r}]: lo {lo} is above hi {hi}")
        out[name] = (lo, hi)
    return out


def corners(box: Mapping[str, Sequence[float]]) -> list[dict[str, float]]:
    """All 2^k corners of a parameter box ``{name: (lo, hi)}``.

    A parameter with lo == hi contributes one value, not two.  Order: the
    box's key order, lowest values first.  Raises AnalysisError beyond
    MAX_CORNER_PARAMETERS varying parameters.
    """
    b = validate_box(box)
    varying = [n for n, (lo, hi) in b.items() if lo != hi]
    if len(varying) > MAX_CORNER_PARAMETERS:
        raise AnalysisError(
            f"{len(varying)} parameters vary ({', '.join(varying)}); corner analysis is capped at "
            f"{MAX_CORNER_PARAMETERS} ({2 ** MAX_CORNER_PARAMETERS} corners): map fewer parameters"
        )
    choices = [(b[n][0],) if b[n][0] == b[n][1] else b[n] for n in b]
    return [dict(zip(b, vals)) for vals in itertools.product(*choices)]


# --------------------------------------------------------------------------
# Spectral radius
# --------------------------------------------------------------------------


def _square(A, what="A"):
    A = as_matrix(A, what)
    if A.shape[0] != A.shape[1]:
        raise AnalysisError(f"{what}: expected a square matrix, got shape {A.shape}")
    return A


def _checked(deadline: Deadline, f):
    """``f`` that first calls ``deadline.check()`` (so an eigen-solver stops at the deadline)."""
    def g(x):
        deadline.check()
        return f(x)
    return g


def _nearest_eigs(A, sigma: complex, k: int, deadline: Deadline):
    """The k eigenvalues of sparse A nearest to sigma (shift-invert ARPACK; stops at ``deadline``)."""
    n = A.shape[0]
    M = (sp.csc_matrix(A, dtype=complex) - sigma * sp.identity(n, dtype=complex, format="csc")).tocsc()
    deadline.check()
    lu = spla.splu(M)
    op = spla.LinearOperator((n, n), matvec=_checked(deadline, lambda x: lu.solve(np.asarray(x, dtype=complex))),
                             dtype=complex)
    mu = spla.eigs(op, k=k, which="LM", return_eigenvectors=False, tol=1e-12, maxiter=max(1000, 10 * n),
                   v0=start_vector(n))
    return sigma + 1.0 / mu


def _covered_halfwidth(Rs: float, d: float, r: float) -> float:
    """Half-angle of the arc of radius r inside the disk |z - Rs| < d (rad)."""
    if r <= 0.0:
        return math.pi if d > Rs else 0.0
    c = (Rs * Rs + r * r - d * d) / (2.0 * Rs * r)
    return float(np.arccos(np.clip(c, -1.0, 1.0)))


def _scan_radius(A, deadline: Deadline, k: int = 40, max_shifts: int = 600) -> float | None:
    """Spectral radius of sparse A by shift-invert probes on a circle.

    Probes sit on |z| = Rs, just outside the bound R = min(‖A‖₁, ‖A‖∞) ≥ ρ(A).
    Probe j finds its k nearest eigenvalues, so every eigenvalue in the disk
    D_j (radius = distance of the k-th) is known.  With ρ̂ the largest modulus
    found, ρ(A) = ρ̂ once the disks cover the annulus ρ̂ ≤ |z| ≤ Rs; the arc a
    disk covers at radius r is unimodal in r, so it suffices that the arcs at
    the two edge radii (their smaller one) cover the circle.  Returns None if
    coverage was not reached; NotDecided (engine.analysis.deadline) at ``deadline``.
    """
    n = A.shape[0]
    k = max(1, min(k, n - 2))
    absA = abs(sp.csr_matrix(A))
    R = float(min(absA.sum(axis=0).max(), absA.sum(axis=1).max()))
    if R == 0.0:
        return 0.0
    Rs = R * (1.0 + 1e-6) + 1e-12
    full = 2.0 * math.pi if np.iscomplexobj(A.data if sp.issparse(A) else A) else math.pi
    probes: list[tuple[float, float]] = []  # (angle, disk radius)
    found: list[complex] = []

    def probe(phi):
        s = Rs * complex(math.cos(phi), math.sin(phi))
        lam = _nearest_eigs(A, s, k, deadline)
        found.extend(lam)
        probes.append((phi, float(np.max(np.abs(lam - s)))))

    def halfwidths(rho_hat):
        return [min(_covered_halfwidth(Rs, d, rho_hat), _covered_halfwidth(Rs, d, Rs)) for _, d in probes]

    try:
        phi = 0.0
        while phi <= full and len(probes) < max_shifts:
            probe(phi)
            rho_hat = float(np.max(np.abs(found)))
            m = halfwidths(rho_hat)[-1]
            phi += max(1.8 * m, 1e-5)
        for _ in range(4):
            rho_hat = float(np.max(np.abs(found)))
            hw = halfwidths(rho_hat)
            iv = sorted((p - h, p + h) for (p, _), h in zip(probes, hw))
            gaps, reach = [], 0.0
            for a, b in iv:
                if a > reach:
                    gaps.append((reach, a))
                reach = max(reach, b)
            if reach < full:
                gaps.append((reach, full))
            if not gaps:
                return rho_hat
            if len(probes) + len(gaps) > max_shifts:
                return None
            for a, b in gaps:
                probe(0.5 * (a + b))
    except (RuntimeError, spla.ArpackError, spla.ArpackNoConvergence, ValueError):
        return None
    return None


def probe_radius(A, angles, *, k: int = 16, deadline: Deadline | None = None) -> float | None:
    """Largest |λ| among the eigenvalues of sparse A nearest to e^{iφ} for each φ in ``angles`` (rad).

    A lower bound on ρ(A) (shift-invert ARPACK at each angle, at most 300
    iterations each; eigenvalues that converged are kept), or None when no
    probe found any.  Quick evidence of a growing or undamped mode; not a
    proof of stability.  Stops at ``deadline`` (NotDecided).
    """
    deadline = deadline or Deadline()
    A = _square(A)
    n = A.shape[0]
    if n < 4:
        return None
    k = max(1, min(k, n - 2))
    Ac = sp.csc_matrix(A, dtype=complex)
    eye = sp.identity(n, dtype=complex, format="csc")
    best: float | None = None
    for phi in angles:
        deadline.check()
        sigma = complex(np.exp(1j * float(phi))) * (1.0 + 1e-9)
        try:
            lu = spla.splu((Ac - sigma * eye).tocsc())
            op = spla.LinearOperator((n, n), dtype=complex,
                                     matvec=_checked(deadline, lambda x, lu=lu: lu.solve(np.asarray(x, dtype=complex))))
            mu = spla.eigs(op, k=k, which="LM", tol=1e-10, ncv=min(n - 1, 3 * k + 1), maxiter=300,
                           return_eigenvectors=False, v0=start_vector(n))
        except spla.ArpackNoConvergence as exc:   # keep what did converge
            mu = exc.eigenvalues
        except (RuntimeError, spla.ArpackError):
            continue
        mu = np.asarray(mu)
        mu = mu[mu != 0]
        if mu.size:
            r = float(np.max(np.abs(sigma + 1.0 / mu)))
            best = r if best is None else max(best, r)
    return best


def spectral_radius(A, *, dense_max: int = DENSE_MAX, deadline: Deadline | None = None) -> float:
    """Largest |eigenvalue| of a square matrix (dense ndarray or scipy.sparse).

    Dense LAPACK up to `dense_max` states.  Larger sparse matrices: ARPACK
    ``eigs(k, which='LM')``; when it does not converge (typical for delay
    networks, whose eigenvalues crowd a circle), shift-invert probes with a
    coverage proof (`_scan_radius`); then dense LAPACK up to
    DENSE_ONE_OFF_MAX states; otherwise AnalysisError.  The sparse solvers
    stop at ``deadline`` (engine.analysis.deadline.NotDecided).
    """
    deadline = deadline or Deadline()
    A = _square(A)
    n = A.shape[0]
    if n == 0:
        return 0.0
    if not sp.issparse(A) or n <= dense_max:
        dense = A.toarray() if sp.issparse(A) else A
        return float(np.max(np.abs(np.linalg.eigvals(dense))))
    k = min(6, n - 2)
    try:
        op = spla.LinearOperator(A.shape, matvec=_checked(deadline, A.dot), dtype=A.dtype)
        ev = spla.eigs(op, k=k, which="LM", ncv=min(n - 1, 40), maxiter=100, tol=0, return_eigenvectors=False,
                       v0=start_vector(n))
        return float(np.max(np.abs(ev)))
    except (spla.ArpackNoConvergence, spla.ArpackError):
        pass
    rho = _scan_radius(A, deadline)
    if rho is not None:
        return rho
    deadline.check()
    if n <= DENSE_ONE_OFF_MAX:
        return float(np.max(np.abs(np.linalg.eigvals(A.toarray()))))
    raise AnalysisError(
        f"spectral radius of a {n}-state matrix: sparse eigensolvers did not converge and the "
        f"state is too large for a dense solve (> {DENSE_ONE_OFF_MAX})"
    )



"""Eigenvalues of the symmetric positive semi-definite operators of fields (L, S, lambda^2 L + beta^2 S).

Operators of up to :data:`~sheafsynth.engine.model.dense.DENSE_MAX` DOFs are
solved densely (LAPACK through ``numpy.linalg``: exact to rounding,
deterministic); larger ones with ARPACK (``scipy.sparse.linalg.eigsh``) from a
fixed start vector (:func:`start_vector`: without one ARPACK starts from a random
vector and the last digits of its answer change from run to run, and with them the
generated C and its cache key), the largest eigenvalue falling back to the Gershgorin bound (never below the true
value) when ARPACK does not converge.  Not for the audio thread.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from sheafsynth.engine.model.dense import DENSE_MAX

__all__ = ["gershgorin_bound", "largest_eigenvalue", "lowest_eigenvalues", "rayleigh_at", "start_vector"]


def start_vector(n: int) -> np.ndarray:
    """ARPACK's start vector for an ``n``-dimensional problem: fixed, so that answers repeat exactly.

    Pseudo-random (seeded) rather than constant, so it is almost surely not
    orthogonal to the wanted eigenvectors (a constant vector is orthogonal
    to every non-constant mode of a symmetric grid).
    """
    return np.random.default_rng(20261202).standard_normal(n)


def gershgorin_bound(a) -> float:
    """max_i sum_j |A_ij|: an upper bound on every eigenvalue of symmetric A."""
    a = sp.csr_matrix(a)
    if a.shape[0] == 0:
        return 0.0
    return float(np.max(np.asarray(abs(a).sum(axis=1)).ravel()))


def largest_eigenvalue(a) -> float:
    """Largest eigenvalue of symmetric PSD ``a`` (dense up to DENSE_MAX, else eigsh).

    Falls back to the Gershgorin bound (safe: never below the true value)
    when the iterative solver does not converge.
    """
    a = sp.csr_matrix(a)
    n = a.shape[0]
    if n <= DENSE_MAX:
        return float(np.linalg.eigvalsh(a.toarray())[-1])
    try:
        val = spla.eigsh(a, k=1, which="LA", return_eigenvectors=False, tol=1e-12, v0=start_vector(n))
        return float(val[0])
    except spla.ArpackNoConvergence:
        return gershgorin_bound(a)


def lowest_eigenvalues(a, k: int) -> np.ndarray:
    """The ``k`` smallest eigenvalues of symmetric PSD ``a``, ascending (shift-invert ARPACK when large)."""
    a = sp.csr_matrix(a)
    n = a.shape[0]
    if n <= DENSE_MAX or k >= n - 1:
        return np.linalg.eigvalsh(a.toarray())[:k]
    shift = -1e-6 * max(1.0, gershgorin_bound(a))      # keeps A - shift*I definite
    ev = spla.eigsh(a.tocsc(), k=k, sigma=shift, which="LM", return_eigenvectors=False, v0=start_vector(n))
    return np.sort(ev)


def rayleigh_at(op, other, q: float) -> float:
    """x^T ``other`` x for the unit eigenvector x of symmetric ``op`` with eigenvalue ``q``.

    For a stiff field: the L-eigenvalue (Rayleigh quotient of L) of the mode
    of lambda^2 L + beta^2 S that the tuning picked.
    """
    op = sp.csr_matrix(op)
    n = op.shape[0]
    if n <= DENSE_MAX:
        ev, vec = np.linalg.eigh(op.toarray())
        x = vec[:, int(np.argmin(np.abs(ev - q)))]
    else:
        _, vecs = spla.eigsh(op.tocsc(), k=1, sigma=q * (1.0 - 1e-9), which="LM", v0=start_vector(n))
        x = vecs[:, 0]
    x = x / np.linalg.norm(x)
    return float(x @ (other @ x))

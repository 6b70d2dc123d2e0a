"""The lowest mode shapes of a field cell: eigenvectors of its operator at the parameter defaults.

The operator is K = lambda^2 L + beta^2 S (engine.model.cells.field_model:
L the boundary-treated sheaf Laplacian, S the bending operator of a stiff
field, lambda = speed and beta = stiffness at the defaults).  Its
eigenvalues q give the lossless mode frequencies through
4 sin^2(pi f / fs) = k2 q, so for low modes f is proportional to sqrt(q):
the ratios sqrt(q / q1) are the partial ratios the picture labels (the
tuned field rings its lowest non-drift mode at the played note).  Drift
modes (q = 0, a kernel of K) are skipped.  Operators of up to DENSE_MAX
DOFs are solved densely (LAPACK); larger ones with shift-invert ARPACK
from the engine's fixed start vector, so the pictures repeat exactly.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from sheafsynth.engine.model.cells.field_model import FieldModel, f32
from sheafsynth.engine.model.dense import DENSE_MAX
from sheafsynth.engine.model.spectra import gershgorin_bound, start_vector

__all__ = ["ModeShape", "field_operator", "lowest_modes", "vertex_values"]


@dataclass(frozen=True)
class ModeShape:
    """One mode: eigenvalue q of K, the ratio sqrt(q / q1) to the lowest ringing mode, values per vertex.

    ``values`` has one entry per vertex of the complex (0 on clamped rim
    vertices), the first stalk component of the eigenvector, scaled so the
    largest magnitude is 1 and the largest entry positive.
    """

    q: float
    ratio: float
    values: np.ndarray


def field_operator(model: FieldModel) -> sp.csr_matrix:
    """K = lambda^2 L + beta^2 S at the parameters' default values (float32-rounded as the kernel stores them)."""
    lam = f32(model.speed.value(model.defaults))
    beta = f32(model.stiffness.value(model.defaults))
    op = lam * lam * model.laplacian()
    s_op = model.stiffness_op()
    if s_op is not None and beta != 0.0:
        op = op + beta * beta * s_op
    return sp.csr_matrix(op)


def vertex_values(model: FieldModel, vec: np.ndarray) -> np.ndarray:
    """A DOF vector (order v*d + a over kept vertices) as one value per vertex (component 0; 0 when clamped)."""
    d = model.stalk
    out = np.zeros(model.complex.n_vertices)
    out[model.kept] = np.asarray(vec, dtype=float).reshape(-1, d)[:, 0]
    return out


def _eigenpairs(op: sp.csr_matrix, k: int) -> tuple[np.ndarray, np.ndarray]:
    n = op.shape[0]
    if n <= DENSE_MAX or k >= n - 1:
        w, v = np.linalg.eigh(op.toarray())
        return w[:k], v[:, :k]
    shift = -1e-6 * max(1.0, gershgorin_bound(op))
    w, v = spla.eigsh(op.tocsc(), k=k, sigma=shift, which="LM", v0=start_vector(n))
    order = np.argsort(w)
    return w[order], v[:, order]


def lowest_modes(model: FieldModel, count: int = 4) -> list[ModeShape]:
    """The ``count`` lowest ringing (non-drift) modes of ``model``, ascending in frequency."""
    op = field_operator(model)
    n = op.shape[0]
    if n == 0 or count <= 0:
        return []
    scale = max(1.0, gershgorin_bound(op))
    k = min(n, count + max(2, model.stalk))
    while True:
        w, v = _eigenpairs(op, k)
        ring = np.flatnonzero(w > 1e-9 * scale)
        if ring.size >= count or k >= n:
            break
        k = min(n, 2 * k)
    ring = ring[:count]
    if ring.size == 0:
        return []
    q1 = float(w[ring[0]])
    out = []
    for i in ring:
        vals = vertex_values(model, v[:, i])
        big = float(np.max(np.abs(vals))) or 1.0
        vals = vals / big
        if vals[int(np.argmax(np.abs(vals)))] < 0:
            vals = -vals
        out.append(ModeShape(float(w[i]), float(np.sqrt(w[i] / q1)), vals))
    return out

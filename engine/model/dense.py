"""The one size limit for dense linear algebra, shared by model, ir and analysis.

``DENSE_MAX`` is the operator size, in degrees of freedom (rows of a square
matrix: stalk entries of a field, or state entries of a network), up to which
spectra, eigenvectors and linear solves are computed with dense LAPACK
(``numpy.linalg``) rather than iterative sparse solvers (ARPACK through
``scipy.sparse.linalg``).  Dense is exact to rounding, deterministic and
thread-safe; at 600 DOFs a full symmetric eigen-decomposition costs a few tens
of milliseconds.  Above it the sparse solvers are used, with a safe bound
(Gershgorin) where they fail to converge.

The value 600 is the limit the field complexes already used before it was
made one constant; factory stability verdicts and golden audio were recorded
with it.
"""

from __future__ import annotations

__all__ = ["DENSE_MAX"]

DENSE_MAX: int = 600
"""Largest operator size (DOFs) solved densely; larger ones use sparse iterative solvers."""

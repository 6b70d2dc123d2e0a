"""Linear systems written out by hand for the analysis tests (no project code inside)."""

from __future__ import annotations

import scipy.sparse as sp

__all__ = ["ks_matrix"]


def ks_matrix(N: int, g: float, sparse: bool = True):
    """Karplus–Strong loop y[n] = g/2 (y[n-N] + y[n-N-1]) as a state matrix; state = last N+1 outputs.

    Its fundamental is fs / (N + 1/2) (Karplus & Strong 1983; the two-tap
    average adds half a sample of delay).
    """
    n = N + 1
    rows, cols, vals = [0, 0], [N - 1, N], [g / 2, g / 2]
    for i in range(1, n):
        rows.append(i)
        cols.append(i - 1)
        vals.append(1.0)
    A = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
    return A if sparse else A.toarray()

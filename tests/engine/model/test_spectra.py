"""Eigenvalue helpers against scipy and the Gershgorin circle theorem."""

import pytest
import scipy.sparse.linalg as spla

from sheafsynth.engine.model.spectra import gershgorin_bound, largest_eigenvalue
from tests.engine.model.test_field_sheaf import sheaf


def test_mu_max_bound_and_torus_spectrum():
    """Gershgorin bound >= the largest eigenvalue (Gershgorin circle theorem);
    the largest eigenvalue agrees with scipy's eigsh; the torus grid Laplacian
    has mu_max = 8 (circulant spectrum 4 sin^2 + 4 sin^2, standard result), so
    leapfrog needs lambda <= 1/sqrt(2) there (Bilbao 2009, 2-D wave FDTD)."""
    for spec in [{"grid": [30, 31]}, {"grid": [26, 26], "wrap": "torus"},
                 {"grid": [12, 9], "wrap": "mobius"}, {"path": 700}]:
        s = sheaf(spec)
        for b in ("free", "fixed") if spec.get("wrap") != "torus" else ("free",):
            lap = s.laplacian(b)
            assert gershgorin_bound(lap) >= largest_eigenvalue(lap) - 1e-9
    lap = sheaf({"grid": [30, 31]}).laplacian("free")
    ref = spla.eigsh(lap, k=1, which="LA", return_eigenvectors=False)[0]
    assert largest_eigenvalue(lap) == pytest.approx(ref, rel=1e-9)
    torus = sheaf({"grid": [26, 26], "wrap": "torus"}).laplacian()
    assert largest_eigenvalue(torus) == pytest.approx(8.0, abs=1e-9)
    assert gershgorin_bound(torus) == pytest.approx(8.0)

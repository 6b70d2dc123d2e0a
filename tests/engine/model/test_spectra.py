"""Eigenvalue helpers against scipy and the Gershgorin circle theorem."""

import numpy as np
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


def test_large_spectra_repeat_exactly():
    """Above DENSE_MAX the iterative solver starts from a fixed vector, so the same operator gives
    the same digits every time (they reach the generated C, whose text keys the kernel cache).
    The values themselves agree with the closed form of the path Laplacian with free ends,
    mu_k = 4 sin^2(pi k / 2n) (Neumann path spectrum; Chung, Spectral Graph Theory, 1997)."""
    from sheafsynth.engine.model.dense import DENSE_MAX
    from sheafsynth.engine.model.spectra import lowest_eigenvalues

    n = 2 * DENSE_MAX
    lap = sheaf({"path": n}).laplacian("free")
    assert lap.shape[0] > DENSE_MAX
    first = [largest_eigenvalue(lap), *lowest_eigenvalues(lap, 4)]
    again = [largest_eigenvalue(lap), *lowest_eigenvalues(lap, 4)]
    assert first == again
    closed = [4 * np.sin(np.pi * k / (2 * n)) ** 2 for k in range(4)]
    assert first[1:] == pytest.approx(closed, abs=1e-9)
    assert first[0] == pytest.approx(4 * np.sin(np.pi * (n - 1) / (2 * n)) ** 2, rel=1e-9)


def test_generated_c_of_a_large_field_preset_repeats_exactly():
    """Same network in, same C out (DESIGN §8), also for a field too big for dense solves."""
    from sheafsynth.engine.backends.c.emit import generate
    from sheafsynth.engine.ir.lower import lower
    from sheafsynth.engine.ir.validate import load_checked
    from sheafsynth.engine.locations import FACTORY_DIR

    preset = load_checked(FACTORY_DIR / "bucket-drum.json")
    assert generate(lower(preset)) == generate(lower(load_checked(FACTORY_DIR / "bucket-drum.json")))

"""Tests for engine.analysis.spectra, .gains and .storage: spectral radius,
box corners, cell gains, storage functions and the vector small-gain test."""

import math

import numpy as np
import pytest
import scipy.signal as ss
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from sheafsynth.engine.analysis import storage
from sheafsynth.engine.analysis.gains import (
    CellGain,
    CellModel,
    WireModel,
    build_gain_matrix,
    cell_gain,
    linf_gain_convex_filter,
    network_small_gain,
)
from sheafsynth.engine.analysis.spectra import MAX_CORNER_PARAMETERS, corners, spectral_radius
from sheafsynth.engine.analysis.storage import hexagon, l2_gain_common_storage, largest_ramp_slope, ramp_storage_gain
from sheafsynth.engine.errors import AnalysisError, SheafsynthError
from tests.reference_systems import ks_matrix


def one_pole(p):
    """One-pole lowpass y = (1-p)u + p·y[n-1] with state y[n-1]."""
    return (np.array([[p]]), np.array([[1 - p]]), np.array([[p]]), np.array([[1 - p]]))


need_cvxpy = pytest.mark.skipif(storage.optional_cvxpy() is None, reason="cvxpy not installed")


# ---------------------------------------------------------------- basics


def test_errors_are_project_errors():
    assert issubclass(AnalysisError, SheafsynthError)


def test_corners_count_degenerate_and_cap():
    c = corners({"a": (0, 1), "b": (2, 3), "c": (5, 5)})
    assert len(c) == 4
    assert {"a": 1.0, "b": 2.0, "c": 5.0} in c
    with pytest.raises(AnalysisError, match="capped"):
        corners({f"p{i}": (0, 1) for i in range(MAX_CORNER_PARAMETERS + 1)})
    with pytest.raises(AnalysisError):
        corners({"a": (1, 0)})


# ---------------------------------------------------------------- spectral radius


def test_spectral_radius_matches_numpy_dense_and_sparse():
    """Reference: numpy.linalg.eigvals (NumPy as reference library)."""
    rng = np.random.default_rng(1)
    for n in (1, 3, 10, 40):
        A = rng.standard_normal((n, n)) / math.sqrt(n)
        ref = np.max(np.abs(np.linalg.eigvals(A)))
        assert spectral_radius(A) == pytest.approx(ref, rel=1e-12)
        assert spectral_radius(sp.csr_matrix(A)) == pytest.approx(ref, rel=1e-12)


def test_spectral_radius_large_sparse_paths_match_numpy():
    """Reference: numpy.linalg.eigvals on the same matrix (NumPy as reference).

    The string loop's eigenvalues crowd a circle, so ARPACK's 'LM' mode does
    not converge and the shift-invert scan with its coverage proof answers.
    """
    A = ks_matrix(600, 0.996)
    ref = np.max(np.abs(np.linalg.eigvals(A.toarray())))
    assert spectral_radius(A, dense_max=50) == pytest.approx(ref, rel=1e-12, abs=1e-13)
    # a matrix with one dominant eigenvalue, where 'LM' converges directly
    rng = np.random.default_rng(2)
    D = sp.diags(np.r_[1.7, rng.uniform(-0.5, 0.5, 399)]) + sp.random(400, 400, density=0.005, random_state=3) * 0.1
    ref = np.max(np.abs(np.linalg.eigvals(D.toarray())))
    assert spectral_radius(sp.csr_matrix(D), dense_max=50) == pytest.approx(ref, rel=1e-10)


# ---------------------------------------------------------------- gains


@need_cvxpy
def test_l2_gain_of_a_fixed_biquad_matches_its_peak_response():
    """For one corner (LTI) the storage LMI gives the H∞ norm (bounded-real lemma);
    reference peak from scipy.signal.freqz (SciPy as reference implementation)."""
    b, a = [0.05, 0.0, -0.05], [1.0, -1.6, 0.9]
    A, B, C, D = ss.tf2ss(b, a)
    gamma, P = l2_gain_common_storage([(A, B, C, D)])
    _, h = ss.freqz(b, a, worN=1 << 16)
    peak = np.max(np.abs(h))
    assert gamma >= peak * (1 - 1e-6)
    assert gamma == pytest.approx(peak, rel=1e-2)
    assert np.linalg.eigvalsh(P)[0] > 0


@need_cvxpy
def test_l2_gain_of_one_pole_and_two_tap_average():
    """LTI one-pole and 2-tap average both have peak |H| = 1 at DC (common practice)."""
    g, _ = l2_gain_common_storage([one_pole(0.7)])
    assert 1.0 <= g < 1.001
    avg = (np.zeros((1, 1)), np.ones((1, 1)), np.array([[0.5]]), np.array([[0.5]]))
    g, _ = l2_gain_common_storage([avg])
    assert 1.0 <= g < 1.001


def test_linf_gain_of_convex_combination_filters():
    avg = (np.zeros((1, 1)), np.ones((1, 1)), np.array([[0.5]]), np.array([[0.5]]))
    assert linf_gain_convex_filter([avg]) == 1.0
    assert linf_gain_convex_filter([one_pole(0.0), one_pole(0.95)]) == 1.0
    # same 2-tap average with the state stored as 0.5·u[n−1]: weights fix the scale
    avg_scaled = (np.zeros((1, 1)), np.array([[0.5]]), np.array([[1.0]]), np.array([[0.5]]))
    assert linf_gain_convex_filter([avg_scaled]) == pytest.approx(1.0, abs=1e-6)
    # p < 0 is not a convex combination; the bound is the impulse response's ℓ1 norm
    # (1−p)/(1−|p|) = 1.5 for p = −0.2 (peak-to-peak gain of an LTI filter, common practice)
    assert linf_gain_convex_filter([one_pole(-0.2)]) == pytest.approx(1.5, rel=1e-6)
    # an integrator never forgets its state: no bound
    integ = (np.ones((1, 1)), np.ones((1, 1)), np.ones((1, 1)), np.zeros((1, 1)))
    assert linf_gain_convex_filter([integ]) is None


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0.0, 0.95), min_size=50, max_size=50),
       st.lists(st.floats(-1.0, 1.0), min_size=50, max_size=50))
def test_one_pole_with_moving_coefficient_never_exceeds_input_peak(ps, us):
    """Brute force: |y| ≤ max|u| for any path of p in [0, 0.95] (the property linf_gain certifies)."""
    y = 0.0
    for p, u in zip(ps, us):
        y = (1 - p) * u + p * y
        assert abs(y) <= 1.0 + 1e-12


def test_cell_gains_and_one_norm_rule():
    assert cell_gain(CellModel("d", "delay"), "l2").gain == 1.0
    assert cell_gain(CellModel("d", "delay", length_varies=True), "linf").gain == 1.0
    assert cell_gain(CellModel("d", "delay", length_varies=True), "l2") is None
    assert cell_gain(CellModel("g", "gain", (0.5, -0.9)), "linf").gain == pytest.approx(0.9)
    mixed = [CellGain("a", 1.0, "l2", "x"), CellGain("b", 1.0, "linf", "y")]
    with pytest.raises(AnalysisError, match="one norm"):
        build_gain_matrix(mixed, [WireModel("a", "b")], "l2")


def test_network_small_gain_matches_eigenvalues():
    """ρ of a nonnegative matrix vs numpy.linalg.eigvals (NumPy as reference)."""
    G = np.array([[0.0, 0.5, 0.0], [0.0, 0.0, 0.9], [1.0, 0.0, 0.1]])
    rho, ok = network_small_gain(G)
    assert rho == pytest.approx(np.max(np.abs(np.linalg.eigvals(G))), rel=1e-12)
    assert ok == (rho < 1)
    rho, ok = network_small_gain(2.0 * G)
    assert rho > 1 and not ok
    with pytest.raises(AnalysisError):
        network_small_gain(-G)


def test_without_cvxpy_the_storage_routes_say_not_proven(monkeypatch):
    monkeypatch.setattr(storage, "optional_cvxpy", lambda: None)
    assert l2_gain_common_storage([one_pole(0.5)]) is None
    assert largest_ramp_slope(lambda th: one_pole(th["p"]), ["p"], {"p": (0.1, 0.6)}, 2.0, state_fixed=False) is None


def _one_pole_loop(g_hi):
    cells = [
        CellModel("loop", "delay"),
        CellModel("damp", "filter", tuple(one_pole(p) for p in (0.1, 0.6))),
        CellModel("fb", "gain", (0.5, g_hi)),
    ]
    wires = [WireModel("excite", "loop"), WireModel("loop", "damp"), WireModel("damp", "fb"),
             WireModel("fb", "loop"), WireModel("loop", "out", (0.5,))]
    return cells, wires


def _loop_rho(cells, wires, norm):
    gains = [cell_gain(c, norm) for c in cells]
    assert all(g is not None for g in gains)
    return network_small_gain(build_gain_matrix(gains, wires, norm))


def test_small_gain_certifies_a_one_pole_loop_for_any_speed():
    """One-pole lowpass (ℓ∞ gain 1), feedback gain ≤ 0.98 and a delay in one 3-cell cycle:
    ρ(Γ) = (1 · 1 · 0.98)^(1/3), the spectral radius of a weighted 3-cycle (constructed)."""
    rho, ok = _loop_rho(*_one_pole_loop(0.98), "linf")
    assert ok
    assert rho == pytest.approx(0.98 ** (1 / 3))


def test_small_gain_fails_with_unit_loop_gain():
    rho, ok = _loop_rho(*_one_pole_loop(1.0), "linf")
    assert not ok
    assert rho == pytest.approx(1.0)


def test_hexagon_vertices_bound_the_slope_set():
    """{(t, t⁺): |t⁺ − t| ≤ d} in a square is a hexagon with these six vertices (constructed)."""
    assert hexagon(0.0, 1.0, 0.25) == [(0.0, 0.0), (0.0, 0.25), (0.75, 1.0), (1.0, 1.0), (1.0, 0.75), (0.25, 0.0)]
    assert hexagon(0.0, 1.0, 2.0) == [(0.0, 0.0), (0.0, 1.0), (1.0, 1.0), (1.0, 0.0)]


@need_cvxpy
def test_ramp_storage_decreases_along_every_admissible_slow_path():
    """A one-pole whose coefficient moves in [0.1, 0.9]: the storage returned for gain γ and
    slope δ must satisfy the dissipation inequality V(s⁺, θ⁺) − V(s, θ) ≤ γ²u² − y² at random
    admissible pairs |θ⁺ − θ| ≤ δ·range (brute force against the definition)."""
    box = {"p": (0.1, 0.9)}
    gamma = 1.9     # between the frozen H∞ norm (1) and the common-storage bound (about 2.13)

    def block_at(th):
        return one_pole(th["p"])

    frac = largest_ramp_slope(block_at, ["p"], box, gamma, state_fixed=False)
    assert frac is not None and 0 < frac < 1
    proof = ramp_storage_gain(block_at, ["p"], box, gamma, frac, state_fixed=False)
    assert proof is not None

    def V(s, p):
        return float(s @ (proof["P0"] + p * proof["P"]["p"]) @ s)

    rng = np.random.default_rng(11)
    d = frac * 0.8
    for _ in range(2000):
        p = rng.uniform(0.1, 0.9)
        p_next = min(0.9, max(0.1, p + rng.uniform(-d, d)))
        A, B, C, D = one_pole(p)
        s = rng.standard_normal(1)
        u = rng.standard_normal(1)
        s_next = A @ s + B @ u
        y = C @ s + D @ u
        assert V(s_next, p_next) - V(s, p) <= gamma ** 2 * float(u @ u) - float(y @ y) + 1e-9

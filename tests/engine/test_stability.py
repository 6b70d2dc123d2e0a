"""Tests for engine.analysis.stability: frozen stability, certificates, lattices."""

import math

import numpy as np
import pytest
import scipy.signal as ss
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from sheafsynth.engine.analysis import stability as S
from sheafsynth.engine.errors import SheafsynthError
from sheafsynth.engine.analysis.stability import (
    AffineMatrix,
    AnalysisError,
    CellGain,
    CellModel,
    WireModel,
    allpass1_to_lattice,
    biquad_to_lattice,
    build_gain_matrix,
    cell_gain,
    certify,
    common_quadratic_lyapunov,
    corners,
    frozen_stability,
    l2_gain_common_storage,
    lattice_sections,
    lattice_state_space,
    linf_gain_convex_filter,
    lyapunov_margin,
    network_small_gain,
    ramp_limited_slope,
    spectral_radius,
)


def ks_matrix(N, g, sparse=True):
    """Plucked-string loop y[n] = g/2 (y[n-N] + y[n-N-1]); state = last N+1 outputs."""
    n = N + 1
    rows, cols, vals = [0, 0], [N - 1, N], [g / 2, g / 2]
    for i in range(1, n):
        rows.append(i)
        cols.append(i - 1)
        vals.append(1.0)
    A = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
    return A if sparse else A.toarray()


def delay_loop_family(N, taps):
    """Delay loop whose feedback taps on the last two states are parameters.

    taps: (name_a, name_b); x0⁺ = a·x[N-1] + b·x[N], the rest shifts.
    """
    n = N + 1
    const = np.zeros((n, n))
    const[np.arange(1, n), np.arange(0, n - 1)] = 1.0
    Ea = np.zeros((n, n))
    Ea[0, N - 1] = 1.0
    Eb = np.zeros((n, n))
    Eb[0, N] = 1.0
    return AffineMatrix(const, {taps[0]: Ea, taps[1]: Eb})


def one_pole(p):
    """One-pole lowpass y = (1-p)u + p·y[n-1] with state y[n-1]."""
    return (np.array([[p]]), np.array([[1 - p]]), np.array([[p]]), np.array([[1 - p]]))


need_cvxpy = pytest.mark.skipif(S._cvxpy() is None, reason="cvxpy not installed")


# ---------------------------------------------------------------- basics


def test_errors_are_project_errors():
    assert issubclass(AnalysisError, SheafsynthError)


def test_affine_matrix_evaluates_and_checks():
    fam = AffineMatrix(np.eye(2), {"g": [[0, 1], [0, 0]], ("g", "p"): [[0, 0], [2, 0]]})
    M = fam.at({"g": 3.0, "p": 0.5})
    assert np.allclose(M, [[1, 3], [3, 1]])
    assert set(fam.names) == {"g", "p"}
    with pytest.raises(AnalysisError):
        fam.at({"g": 1.0})
    with pytest.raises(AnalysisError):
        AffineMatrix(np.eye(2), {"g": np.eye(3)})
    with pytest.raises(AnalysisError):
        AffineMatrix(np.eye(2), {("g", "g"): np.eye(2)})


def test_corners_count_degenerate_and_cap():
    c = corners({"a": (0, 1), "b": (2, 3), "c": (5, 5)})
    assert len(c) == 4
    assert {"a": 1.0, "b": 2.0, "c": 5.0} in c
    with pytest.raises(AnalysisError, match="capped"):
        corners({f"p{i}": (0, 1) for i in range(S.MAX_CORNER_PARAMETERS + 1)})
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


# ---------------------------------------------------------------- frozen


def test_loop_gain_above_one_at_a_corner_is_unstable_and_names_it():
    """Loop gain at DC = a + b; above 1 only at the corner a=0.51, b=0.5 (constructed)."""
    fam = delay_loop_family(30, ("a", "b"))
    box = {"a": (0.45, 0.51), "b": (0.40, 0.50)}
    fr = frozen_stability(fam, box)
    assert fr.status == "unstable"
    assert fr.worst_corner == {"a": 0.51, "b": 0.5}
    assert fr.radius_max > 1.0
    cert = certify(fam, box)
    assert cert.certified is False
    assert "'a': 0.51" in cert.failing and "'b': 0.5" in cert.failing


def test_lossless_at_a_corner_is_marginal_not_stable():
    """A pure delay loop with gain 1 has all eigenvalues on |z| = 1 (roots of unity)."""
    fam = delay_loop_family(25, ("a", "b"))
    box = {"a": (0.0, 0.0), "b": (0.9, 1.0)}
    fr = frozen_stability(fam, box)
    assert fr.status == "marginal"
    assert not fr.stable
    assert fr.worst_corner["b"] == 1.0
    assert certify(fam, box).certified is False


# ---------------------------------------------------------------- switching counterexample

A1 = np.array([[0.2, 1.5], [0.0, 0.2]])
A2 = np.array([[0.2, 0.0], [1.5, 0.2]])


def test_fast_switching_counterexample_is_not_certified_for_any_speed():
    """Constructed pair: each Schur-stable (eigenvalues 0.2), every convex
    combination stable (eigenvalues 0.2 ± 1.5·sqrt(t(1−t)) ≤ 0.95), yet
    alternating A1, A2 grows since ρ(A1·A2) > 1."""
    assert np.max(np.abs(np.linalg.eigvals(A1))) < 1
    assert np.max(np.abs(np.linalg.eigvals(A2))) < 1
    rho_product = np.max(np.abs(np.linalg.eigvals(A1 @ A2)))
    assert rho_product > 1.0  # this is what proves switching instability
    fam = AffineMatrix(A1, {"t": A2 - A1})
    box = {"t": (0.0, 1.0)}
    fr = frozen_stability(fam, box)
    assert fr.status == "stable"
    for t in np.linspace(0, 1, 101):  # frozen-stable on the whole segment
        assert np.max(np.abs(np.linalg.eigvals(fam.at({"t": t})))) < 1
    x = np.array([1.0, 1.0])
    for _ in range(20):
        x = A1 @ A2 @ x
    assert np.linalg.norm(x) > 1e5  # corner-to-corner jumps diverge
    assert common_quadratic_lyapunov([A1, A2]) is None
    cert = certify(fam, box)
    assert cert.certified != "any-speed"
    if cert.certified == "ramp-limited":
        assert 0 < cert.slope_per_sample < 1.0  # a jump across the box is excluded


def test_ramp_limited_slope_verified_by_simulation_of_slow_paths():
    """Frozen-stable family with no common Lyapunov function (above): the
    reported slope must make V(x, θ) = xᵀP(θ)x decrease along every path
    whose per-sample change is within the slope (brute force, constructed)."""
    fam = AffineMatrix(A1, {"t": A2 - A1})
    box = {"t": (0.0, 1.0)}
    ramp = ramp_limited_slope(fam, box)
    assert ramp is not None and 0 < ramp.per_sample < 1
    d = ramp.per_parameter["t"]
    rng = np.random.default_rng(7)
    for trial in range(200):
        t = rng.uniform(0, 1)
        x = rng.standard_normal(2)
        v0 = x @ ramp.storage({"t": t}, box) @ x
        for _ in range(300):
            if trial % 2:  # bang-bang at the full slope, bouncing off the edges
                step = d if rng.random() < 0.5 else -d
            else:
                step = rng.uniform(-d, d)
            t_next = min(1.0, max(0.0, t + step))
            assert abs(t_next - t) <= d + 1e-15
            x_next = fam.at({"t": t}) @ x
            v = x @ ramp.storage({"t": t}, box) @ x
            v_next = x_next @ ramp.storage({"t": t_next}, box) @ x_next
            assert v_next < v or v < 1e-250
            x, t = x_next, t_next
        assert x @ ramp.storage({"t": t}, box) @ x < 1e-3 * v0
    # the underlying pointwise inequality on random admissible pairs
    for _ in range(500):
        t = rng.uniform(0, 1)
        tp = min(1.0, max(0.0, t + rng.uniform(-d, d)))
        A = fam.at({"t": t})
        Q = ramp.storage({"t": t}, box) - A.T @ ramp.storage({"t": tp}, box) @ A
        assert np.linalg.eigvalsh(0.5 * (Q + Q.T))[0] > 0


# ---------------------------------------------------------------- common Lyapunov


def test_common_lyapunov_on_a_two_state_family_is_verified():
    """A(θ) = [[0.5, θ], [0, 0.6]], θ ∈ [−1, 1] (constructed); P checked here with eigenvalues."""
    fam = AffineMatrix([[0.5, 0.0], [0.0, 0.6]], {"c": [[0.0, 1.0], [0.0, 0.0]]})
    box = {"c": (-1.0, 1.0)}
    As = [fam.at(c) for c in corners(box)]
    P = common_quadratic_lyapunov(As)
    assert P is not None
    assert np.linalg.eigvalsh(P)[0] > 0
    rng = np.random.default_rng(0)
    for c in list(rng.uniform(-1, 1, 50)) + [-1.0, 1.0]:  # corners cover the interior
        A = fam.at({"c": c})
        assert np.linalg.eigvalsh(A.T @ P @ A - P)[-1] < 0
    assert lyapunov_margin(P, As) > 0
    cert = certify(fam, box)
    assert cert.certified == "any-speed" and cert.route == "common quadratic Lyapunov"


def test_without_cvxpy_routes_degrade_to_not_proven(monkeypatch):
    monkeypatch.setattr(S, "_cvxpy", lambda: None)
    assert l2_gain_common_storage([one_pole(0.5)]) is None
    fam = AffineMatrix(A1, {"t": A2 - A1})
    cert = certify(fam, {"t": (0.0, 1.0)})
    assert cert.certified != "any-speed"


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


def _one_pole_loop(g_hi):
    cells = [
        CellModel("loop", "delay"),
        CellModel("damp", "filter", tuple(one_pole(p) for p in (0.1, 0.6))),
        CellModel("fb", "gain", (0.5, g_hi)),
    ]
    wires = [WireModel("excite", "loop"), WireModel("loop", "damp"), WireModel("damp", "fb"),
             WireModel("fb", "loop"), WireModel("loop", "out", (0.5,))]
    return cells, wires


def one_pole_loop_family(N):
    """Same loop as a state-space family: states = delay buffer (N) + one-pole state.

    Delay input = g·(damp output) = g·((1−p)·x[N−1] + p·s), so A is
    multi-affine: terms in g and in the product g·p.
    """
    n = N + 1
    const = np.zeros((n, n))
    const[np.arange(1, N), np.arange(0, N - 1)] = 1.0
    Eg = np.zeros((n, n))
    Eg[0, N - 1] = 1.0
    Egp = np.zeros((n, n))
    Egp[0, N - 1], Egp[0, N] = -1.0, 1.0
    Ep = np.zeros((n, n))
    Ep[N, N - 1], Ep[N, N] = -1.0, 1.0
    const[N, N - 1] = 1.0  # s⁺ = (1−p)x[N−1] + p·s
    return AffineMatrix(const, {"g": Eg, ("g", "p"): Egp, "p": Ep})


def test_small_gain_certifies_a_one_pole_loop_for_any_speed():
    cells, wires = _one_pole_loop(0.98)
    fam = one_pole_loop_family(20)
    box = {"g": (0.5, 0.98), "p": (0.1, 0.6)}
    assert frozen_stability(fam, box).stable
    cert = certify(fam, box, cells=cells, wires=wires)
    assert cert.certified == "any-speed"
    assert cert.route.startswith("small-gain")
    assert cert.details["small_gain"]["linf"]["rho"] == pytest.approx(0.98 ** (1 / 3))  # 3-cell cycle


def test_small_gain_fails_with_unit_loop_gain_and_names_the_loop():
    cells, wires = _one_pole_loop(1.0)
    cert = certify(cells=cells, wires=wires)
    assert cert.certified is False
    assert "loop" in cert.failing and "damp" in cert.failing and "fb" in cert.failing
    assert cert.details["warning"]


# ---------------------------------------------------------------- lattice


@pytest.mark.parametrize("b,a", [
    ([0.2, 0.3, 0.1], [1.0, -1.2, 0.8]),
    ([0.1, 0.2, 0.3], [1.0, 0.3, -0.4]),
    ([1.0, -2.0, 1.0], [2.0, -1.8, 0.9]),
    ([0.3, 0.7], [1.0, -0.5]),
])
def test_lattice_impulse_response_equals_direct_form(b, a):
    """Reference: scipy.signal.lfilter on the same coefficients (SciPy reference implementation)."""
    lat = biquad_to_lattice(b, a)
    A, B, C, D = lattice_state_space(lat.k, lat.v)
    x = np.zeros(200)
    x[0] = 1.0
    y = ss.dlsim((A, B, C, D, 1), x)[1].ravel()
    assert np.allclose(y, ss.lfilter(b, a, x), atol=1e-12)


def test_first_order_allpass_lattice_and_its_phase_delay():
    """Allpass a = (1−d)/(1+d) has DC phase delay d (Thiran 1971; Laakso et al. 1996);
    impulse response vs scipy.signal.lfilter (SciPy reference implementation)."""
    d = 0.3
    a = (1 - d) / (1 + d)
    k = allpass1_to_lattice(a)
    A, B, C, D = lattice_state_space([k])
    x = np.zeros(100)
    x[0] = 1.0
    y = ss.dlsim((A, B, C, D, 1), x)[1].ravel()
    assert np.allclose(y, ss.lfilter([a, 1.0], [1.0, a], x), atol=1e-12)
    _, gd = ss.group_delay(([a, 1.0], [1.0, a]), w=[1e-4])
    assert gd[0] == pytest.approx(d, rel=1e-6)
    with pytest.raises(AnalysisError):
        allpass1_to_lattice(1.0)


def test_lattice_sections_are_orthogonal_and_energy_never_grows():
    """Orthogonal sections: ‖s⁺‖² + g_M² = ‖s‖² + x² at every sample, however k moves."""
    for R in lattice_sections([0.9, -0.3, 0.0]):
        assert np.allclose(R.T @ R, np.eye(2), atol=1e-15)
    rng = np.random.default_rng(5)
    s = rng.standard_normal(2)
    for n in range(500):
        k = rng.uniform(-0.99, 0.99, 2)
        A, B, C, D = lattice_state_space(k)
        M = np.block([[A, B], [C, D]])
        assert np.allclose(M.T @ M, np.eye(3), atol=1e-12)
        x = rng.standard_normal() if n < 250 else 0.0
        s_next = A @ s + B[:, 0] * x
        y = C[0] @ s + D[0, 0] * x
        assert np.dot(s_next, s_next) + y * y == pytest.approx(np.dot(s, s) + x * x, rel=1e-12)
        if x == 0.0:
            assert np.dot(s_next, s_next) <= np.dot(s, s) * (1 + 1e-12)
        s = s_next


def test_unstable_biquad_is_refused():
    with pytest.raises(AnalysisError):
        biquad_to_lattice([1.0], [1.0, 0.0, 1.2])


def test_family_from_numeric_assembly_at_corners():
    """A multi-affine family is recovered from its values at the corners; a
    squared parameter is refused (constructed)."""
    fam = one_pole_loop_family(8)
    box = {"g": (0.5, 0.98), "p": (0.1, 0.6), "fixed": (2.0, 2.0)}
    rebuilt = AffineMatrix.from_function(fam.at, box)
    rng = np.random.default_rng(3)
    for _ in range(10):
        th = {"g": rng.uniform(0.5, 0.98), "p": rng.uniform(0.1, 0.6)}
        assert np.allclose(rebuilt.at(th), fam.at(th), atol=1e-12)
    with pytest.raises(AnalysisError, match="not multi-affine"):
        AffineMatrix.from_function(lambda th: np.array([[th["g"] ** 2]]), {"g": (0.0, 1.0)})

"""Stability analysis of affine matrix families over a parameter box.

Everything here is pure linear algebra on matrices; nothing knows about
presets.  A network's one-sample update is ``x[n+1] = A(θ) x[n] + B(θ) u[n]``
with every matrix *affine* in the parameters θ (see `AffineMatrix`), and the
parameters range over a box ``{name: (lo, hi)}``.

Two kinds of answer:

* **Frozen** (`frozen_stability`): spectral radius of A(θ) at each corner of
  the box (and its centre).  This says nothing about the box's interior in
  general (the spectral radius is not convex in θ) and nothing about moving
  knobs.
* **Certificates** (`certify`): proofs that hold while θ moves inside the box.
  They all rest on one fact: for a fixed storage matrix the dissipation
  inequality is convex in the cell's matrices, which are affine in θ, so
  checking the corners of the box covers the whole box.  Routes:

  - vector small gain (`cell_gain`, `build_gain_matrix`,
    `network_small_gain`), any speed;
  - common quadratic Lyapunov function (`common_quadratic_lyapunov`), any
    speed;
  - parameter-dependent storage with a bounded slope (`ramp_limited_slope`),
    ramp-limited, or any speed when the bound covers jumps across the box.

Every positive answer is re-verified with eigenvalues of explicitly formed
matrices before it is returned; a solver's word alone is never trusted.
cvxpy (with Clarabel or SCS) is used for the LMIs when installed; without it
the LMI routes try cheap closed-form candidates and otherwise say
"not proven".
"""

from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import dataclass, field
from typing import Literal, Mapping, Sequence

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from sheafsynth.engine.errors import SheafsynthError

__all__ = [
    "AnalysisError",
    "AffineMatrix",
    "MAX_CORNER_PARAMETERS",
    "corners",
    "box_center",
    "spectral_radius",
    "FrozenPoint",
    "FrozenResult",
    "frozen_stability",
    "l2_gain_common_storage",
    "linf_gain_convex_filter",
    "CellModel",
    "WireModel",
    "CellGain",
    "GainMatrix",
    "cell_gain",
    "build_gain_matrix",
    "network_small_gain",
    "common_quadratic_lyapunov",
    "lyapunov_margin",
    "RampSlope",
    "ramp_limited_slope",
    "Certificate",
    "certify",
    "allpass1_to_lattice",
    "NormalizedLattice",
    "biquad_to_lattice",
    "lattice_sections",
    "lattice_state_space",
]


class AnalysisError(SheafsynthError):
    """The analysis was given unusable input or could not complete."""


#: Corner enumeration is exponential; beyond this many varying parameters
#: (4096 corners) `corners` refuses.
MAX_CORNER_PARAMETERS = 12

#: States up to which the spectral radius is taken from a dense eigensolver.
DENSE_MAX = 600

#: Largest state a dense eigensolver is used for as a last resort.
DENSE_FALLBACK_MAX = 3000

Matrix = "np.ndarray | sp.spmatrix | sp.sparray"
Block = tuple  # (A, B, C, D), dense arrays


# --------------------------------------------------------------------------
# Affine families and parameter boxes
# --------------------------------------------------------------------------


def _as_matrix(m, what: str):
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


def _key(name) -> tuple[str, ...]:
    """Normalise a coefficient key: a name, or a tuple of distinct names."""
    if isinstance(name, str):
        parts = (name,)
    elif isinstance(name, tuple):
        parts = name
    else:
        raise AnalysisError(f"AffineMatrix: coefficient key {name!r} is not a name or a tuple of names")
    if not parts or not all(isinstance(p, str) and p for p in parts):
        raise AnalysisError(f"AffineMatrix: coefficient key {name!r} needs non-empty names")
    if len(set(parts)) != len(parts):
        raise AnalysisError(f"AffineMatrix: coefficient key {name!r} repeats a parameter (degree > 1)")
    return tuple(sorted(parts))


@dataclass(frozen=True)
class AffineMatrix:
    """M(θ) = const + Σ θ[name] · coeffs[name]  (dense or scipy.sparse).

    A key may also be a tuple of distinct names, meaning the product of
    those parameters (multi-affine: every parameter has degree ≤ 1 in every
    term), as arises when two parametrised cells are chained through a
    feedthrough, e.g. gain g after a one-pole (1 − p): g − g·p.  Every check
    in this module is convex along each single parameter axis, so the box's
    corners still cover the box.  Parameters are in their own units.
    """

    const: object
    coeffs: Mapping[object, object] = field(default_factory=dict)

    def __post_init__(self):
        const = _as_matrix(self.const, "AffineMatrix.const")
        coeffs: dict = {}
        for name, c in dict(self.coeffs).items():
            key = _key(name)
            cm = _as_matrix(c, f"AffineMatrix.coeffs[{name!r}]")
            if cm.shape != const.shape:
                raise AnalysisError(
                    f"AffineMatrix.coeffs[{name!r}]: shape {cm.shape} differs from const {const.shape}"
                )
            if key in coeffs:
                cm = coeffs[key] + cm
            coeffs[key if len(key) > 1 else key[0]] = cm
        object.__setattr__(self, "const", const)
        object.__setattr__(self, "coeffs", coeffs)

    @property
    def shape(self) -> tuple[int, int]:
        return self.const.shape

    @property
    def names(self) -> tuple[str, ...]:
        """Parameter names the family depends on (first-appearance order)."""
        seen: dict[str, None] = {}
        for key in self.coeffs:
            for n in _key(key):
                seen.setdefault(n)
        return tuple(seen)

    @property
    def is_sparse(self) -> bool:
        return sp.issparse(self.const)

    def _weight(self, key, theta) -> float:
        w = 1.0
        for n in _key(key):
            w *= float(theta[n])
        return w

    def at(self, theta: Mapping[str, float]):
        """Evaluate M(θ); θ must give a value for every parameter in `names`."""
        missing = [n for n in self.names if n not in theta]
        if missing:
            raise AnalysisError(f"AffineMatrix.at: no value for parameter(s) {', '.join(missing)}")
        if self.is_sparse:
            out = self.const.copy()
            for key, c in self.coeffs.items():
                out = out + self._weight(key, theta) * sp.csr_matrix(c)
            return sp.csr_matrix(out)
        out = np.array(self.const, dtype=float, copy=True)
        for key, c in self.coeffs.items():
            out += self._weight(key, theta) * (c.toarray() if sp.issparse(c) else c)
        return out

    @classmethod
    def constant(cls, m) -> "AffineMatrix":
        """A family that does not depend on any parameter."""
        return cls(m, {})

    @classmethod
    def from_function(cls, fn, box, *, rtol: float = 1e-9) -> "AffineMatrix":
        """Build the multi-affine family through fn's values at the box corners.

        fn(θ: dict) -> matrix (for example a numeric assembly of the network
        at one parameter point).  A multi-affine map is the multilinear
        interpolation of its corner values, so the 2^k corners determine it.
        The result is checked against fn at the centre and two interior
        points; AnalysisError if fn is not multi-affine there (e.g. a delay
        length or a squared parameter depends on θ).  At most 6 varying
        parameters.
        """
        b = _validate_box(box)
        names = [n for n, (lo, hi) in b.items() if lo != hi]
        fixed = {n: lo for n, (lo, hi) in b.items() if lo == hi}
        if len(names) > 6:
            raise AnalysisError(f"from_function: {len(names)} varying parameters (max 6)")
        k = len(names)
        lo = np.array([b[n][0] for n in names])
        w = np.array([b[n][1] - b[n][0] for n in names])

        def point(bits):
            th = dict(fixed)
            th.update({n: float(lo[j] + bits[j] * w[j]) for j, n in enumerate(names)})
            return th

        vals = {}
        for bits in itertools.product((0, 1), repeat=k):
            vals[bits] = _as_matrix(fn(point(bits)), "from_function value")
        shape = vals[(0,) * k].shape
        if any(v.shape != shape for v in vals.values()):
            raise AnalysisError("from_function: fn returned matrices of different shapes")
        # Möbius inversion: M(t) = Σ_S a_S Π_{j∈S} t_j with t_j = (θ_j − lo_j)/w_j
        subsets = [tuple(j for j in range(k) if (mask >> j) & 1) for mask in range(1 << k)]
        a = {}
        for S in subsets:
            acc = None
            for mask in range(1 << len(S)):
                T = {S[i] for i in range(len(S)) if (mask >> i) & 1}
                bits = tuple(1 if j in T else 0 for j in range(k))
                term = vals[bits] * ((-1.0) ** (len(S) - len(T)))
                acc = term if acc is None else acc + term
            a[S] = acc
        # expand Π (θ_j − lo_j)/w_j into monomials in θ
        coeffs: dict = {}
        for S, aS in a.items():
            scale = 1.0 / float(np.prod(w[list(S)])) if S else 1.0
            for mask in range(1 << len(S)):
                U = tuple(S[i] for i in range(len(S)) if (mask >> i) & 1)
                rest = [j for j in S if j not in U]
                c = scale * float(np.prod(-lo[rest])) if rest else scale
                if c == 0.0:
                    continue
                key = tuple(names[j] for j in U)
                coeffs[key] = coeffs[key] + c * aS if key in coeffs else c * aS
        const = coeffs.pop((), None)
        if const is None:
            const = vals[(0,) * k] * 0.0
        fam = cls(const, {(key[0] if len(key) == 1 else key): m for key, m in coeffs.items()})
        rng = np.random.default_rng(0)
        for t in [np.full(k, 0.5)] + [rng.uniform(0, 1, k) for _ in range(2)]:
            th = dict(fixed)
            th.update({n: float(lo[j] + t[j] * w[j]) for j, n in enumerate(names)})
            ref = _dense(fn(th))
            got = _dense(fam.at(th))
            if np.max(np.abs(ref - got), initial=0.0) > rtol * max(1.0, np.max(np.abs(ref), initial=0.0)):
                raise AnalysisError(
                    f"from_function: the matrix is not multi-affine in {', '.join(names)} "
                    f"(mismatch at {th}); corner reasoning does not apply"
                )
        return fam


def _as_family(A) -> AffineMatrix:
    return A if isinstance(A, AffineMatrix) else AffineMatrix.constant(A)


def _validate_box(box: Mapping[str, Sequence[float]]) -> dict[str, tuple[float, float]]:
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


def _family_box(family: AffineMatrix, box) -> dict[str, tuple[float, float]]:
    """The part of `box` that `family` depends on; every parameter needs a range."""
    box = _validate_box(box or {})
    missing = [n for n in family.names if n not in box]
    if missing:
        raise AnalysisError(f"parameter(s) {', '.join(missing)} of the matrix family have no range in the box")
    return {n: box[n] for n in family.names}


def corners(box: Mapping[str, Sequence[float]]) -> list[dict[str, float]]:
    """All 2^k corners of a parameter box ``{name: (lo, hi)}``.

    A parameter with lo == hi contributes one value, not two.  Order: the
    box's key order, lowest values first.  Raises AnalysisError beyond
    MAX_CORNER_PARAMETERS varying parameters.
    """
    b = _validate_box(box)
    varying = [n for n, (lo, hi) in b.items() if lo != hi]
    if len(varying) > MAX_CORNER_PARAMETERS:
        raise AnalysisError(
            f"{len(varying)} parameters vary ({', '.join(varying)}); corner analysis is capped at "
            f"{MAX_CORNER_PARAMETERS} ({2 ** MAX_CORNER_PARAMETERS} corners): map fewer parameters"
        )
    choices = [(b[n][0],) if b[n][0] == b[n][1] else b[n] for n in b]
    return [dict(zip(b, vals)) for vals in itertools.product(*choices)]


def box_center(box: Mapping[str, Sequence[float]]) -> dict[str, float]:
    """The centre of the box (each parameter at the middle of its range)."""
    return {n: 0.5 * (lo + hi) for n, (lo, hi) in _validate_box(box).items()}


# --------------------------------------------------------------------------
# Spectral radius
# --------------------------------------------------------------------------


def _square(A, what="A"):
    A = _as_matrix(A, what)
    if A.shape[0] != A.shape[1]:
        raise AnalysisError(f"{what}: expected a square matrix, got shape {A.shape}")
    return A


def _nearest_eigs(A, sigma: complex, k: int):
    """The k eigenvalues of sparse A nearest to sigma (shift-invert ARPACK)."""
    n = A.shape[0]
    M = (sp.csc_matrix(A, dtype=complex) - sigma * sp.identity(n, dtype=complex, format="csc")).tocsc()
    lu = spla.splu(M)
    op = spla.LinearOperator((n, n), matvec=lambda x: lu.solve(np.asarray(x, dtype=complex)), dtype=complex)
    mu = spla.eigs(op, k=k, which="LM", return_eigenvectors=False, tol=1e-12, maxiter=max(1000, 10 * n))
    return sigma + 1.0 / mu


def _covered_halfwidth(Rs: float, d: float, r: float) -> float:
    """Half-angle of the arc of radius r inside the disk |z - Rs| < d (rad)."""
    if r <= 0.0:
        return math.pi if d > Rs else 0.0
    c = (Rs * Rs + r * r - d * d) / (2.0 * Rs * r)
    return float(np.arccos(np.clip(c, -1.0, 1.0)))


def _scan_radius(A, k: int = 40, max_shifts: int = 600) -> float | None:
    """Spectral radius of sparse A by shift-invert probes on a circle.

    Probes sit on |z| = Rs, just outside the bound R = min(‖A‖₁, ‖A‖∞) ≥ ρ(A).
    Probe j finds its k nearest eigenvalues, so every eigenvalue in the disk
    D_j (radius = distance of the k-th) is known.  With ρ̂ the largest modulus
    found, ρ(A) = ρ̂ once the disks cover the annulus ρ̂ ≤ |z| ≤ Rs; the arc a
    disk covers at radius r is unimodal in r, so it suffices that the arcs at
    the two edge radii (their smaller one) cover the circle.  Returns None if
    coverage was not reached.
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
        lam = _nearest_eigs(A, s, k)
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


def spectral_radius(A, *, dense_max: int = DENSE_MAX) -> float:
    """Largest |eigenvalue| of a square matrix (dense ndarray or scipy.sparse).

    Dense LAPACK up to `dense_max` states.  Larger sparse matrices: ARPACK
    ``eigs(k, which='LM')``; when it does not converge (typical for delay
    networks, whose eigenvalues crowd a circle), shift-invert probes with a
    coverage proof (`_scan_radius`); then dense LAPACK up to
    DENSE_FALLBACK_MAX states; otherwise AnalysisError.
    """
    A = _square(A)
    n = A.shape[0]
    if n == 0:
        return 0.0
    if not sp.issparse(A) or n <= dense_max:
        dense = A.toarray() if sp.issparse(A) else A
        return float(np.max(np.abs(np.linalg.eigvals(dense))))
    k = min(6, n - 2)
    try:
        ev = spla.eigs(A, k=k, which="LM", ncv=min(n - 1, 40), maxiter=100, tol=0, return_eigenvectors=False)
        return float(np.max(np.abs(ev)))
    except (spla.ArpackNoConvergence, spla.ArpackError):
        pass
    rho = _scan_radius(A)
    if rho is not None:
        return rho
    if n <= DENSE_FALLBACK_MAX:
        return float(np.max(np.abs(np.linalg.eigvals(A.toarray()))))
    raise AnalysisError(
        f"spectral radius of a {n}-state matrix: sparse eigensolvers did not converge and the "
        f"state is too large for a dense solve (> {DENSE_FALLBACK_MAX})"
    )


# --------------------------------------------------------------------------
# Frozen stability
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class FrozenPoint:
    """Spectral radius (per sample, dimensionless) of A at one parameter point."""

    theta: dict
    radius: float
    is_corner: bool


@dataclass(frozen=True)
class FrozenResult:
    """Frozen (constant-parameter) stability over the evaluated points.

    status: "stable" (ρ < 1 − margin everywhere evaluated), "marginal"
    (largest ρ within ±margin of 1: lossless somewhere, not strictly stable)
    or "unstable" (ρ > 1 + margin somewhere).  `worst_corner` is the
    evaluated point with the largest radius.
    """

    status: Literal["stable", "marginal", "unstable"]
    radius_max: float
    worst_corner: dict
    points: tuple
    margin: float

    @property
    def stable(self) -> bool:
        """True only for strict stability at every evaluated point."""
        return self.status == "stable"


def _classify(rho: float, margin: float) -> str:
    if rho < 1.0 - margin:
        return "stable"
    if rho <= 1.0 + margin:
        return "marginal"
    return "unstable"


def frozen_stability(A_family, box=None, margin: float = 1e-9, *, include_center: bool = True) -> FrozenResult:
    """Spectral radius of A(θ) at every corner of the box (and its centre).

    margin: tolerance on ρ = 1 (dimensionless, per sample).  The default 1e-9
    separates a true loss (a 60 dB decay in under ~4·10⁴ s at 48 kHz) from
    round-off.  Corners (plus centre) are a sample of the box: interior
    points can be worse; a certificate from `certify` covers the interior.
    """
    if not (margin >= 0.0):
        raise AnalysisError(f"margin must be >= 0, got {margin}")
    fam = _as_family(A_family)
    if fam.shape[0] != fam.shape[1]:
        raise AnalysisError(f"A must be square, got shape {fam.shape}")
    b = _family_box(fam, box)
    pts = [(c, True) for c in corners(b)]
    if include_center and any(lo != hi for lo, hi in b.values()):
        pts.append((box_center(b), False))
    evaluated = tuple(FrozenPoint(theta, spectral_radius(fam.at(theta)), is_c) for theta, is_c in pts)
    worst = max(evaluated, key=lambda p: p.radius)
    return FrozenResult(_classify(worst.radius, margin), worst.radius, dict(worst.theta), evaluated, margin)


# --------------------------------------------------------------------------
# Optional LMI solver
# --------------------------------------------------------------------------


def _cvxpy():
    try:
        import cvxpy  # noqa: PLC0415  (optional dependency)
    except Exception:  # pragma: no cover - depends on the environment
        return None
    return cvxpy


def _solve(cp, prob) -> bool:
    """Solve with Clarabel, then SCS; True if a usable solution came back."""
    installed = set(cp.installed_solvers())
    for solver in ("CLARABEL", "SCS"):
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


def _sym(cp, X):
    return 0.5 * (X + X.T)


def _dense(m) -> np.ndarray:
    m = _as_matrix(m, "matrix")
    return m.toarray() if sp.issparse(m) else m


def _blocks(blocks_at_corners) -> list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]:
    out = []
    for i, blk in enumerate(blocks_at_corners):
        try:
            A, B, C, D = (_dense(m) for m in blk)
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
    blocks = _blocks(blocks_at_corners)
    n = blocks[0][0].shape[0]
    m = blocks[0][1].shape[1]
    if n == 0:  # static map: γ = max spectral norm of D
        return max(float(np.linalg.norm(D, 2)) if D.size else 0.0 for *_, D in blocks), np.zeros((0, 0))
    cp = _cvxpy()
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
        cons.append(_sym(cp, rhs - lhs) >> 0)
    prob = cp.Problem(cp.Minimize(t), cons)
    if not _solve(cp, prob) or P.value is None:
        return None
    Pv = np.array(P.value, dtype=float)
    gamma = _verified_l2_gain(Pv, blocks, strict=0.01 * margin)
    return None if gamma is None else (gamma, 0.5 * (Pv + Pv.T))


# --------------------------------------------------------------------------
# ℓ∞ gain of convex-combination filters
# --------------------------------------------------------------------------


def _linf_gain_with_weights(blocks, w: np.ndarray, contraction: float) -> float | None:
    """ℓ∞ gain bound for state weights w > 0, or None if a row condition fails."""
    tol = 1e-12
    gain = 0.0
    for A, B, C, D in blocks:
        aw = np.abs(A) @ w
        if np.any(aw + np.abs(B).sum(axis=1) > w * (1.0 + tol)):
            return None
        if np.any(aw > (1.0 - contraction) * w):
            return None
        out = np.abs(C) @ w + np.abs(D).sum(axis=1)
        gain = max(gain, float(out.max()) if out.size else 0.0)
    return gain


def linf_gain_convex_filter(blocks_at_corners, *, contraction: float = 1e-9) -> float | None:
    """Peak (ℓ∞) gain bound γ of a filter under arbitrarily fast variation.

    What makes "gain ≤ 1" true is a property of the realisation actually
    stepped, not of the transfer function: every new state entry and every
    output must be a combination of the current state entries and inputs
    whose absolute coefficients sum to ≤ 1 (nonnegative coefficients summing
    to ≤ 1 -- a convex combination -- is the common case: the 2-tap average
    with state u[n−1], the one-pole lowpass y = (1−p)u + p·y[n−1] with state
    y[n−1] and 0 ≤ p < 1).  Then, by induction, |x[n]|∞ ≤ max(|x[0]|∞, ‖u‖∞)
    and |y[n]|∞ ≤ γ·max(|x[0]|∞, ‖u‖∞) however the coefficients move, since
    each sample uses only that sample's coefficients.  A one-pole with p < 0
    fails (|p| + 1 − p > 1); so does a θ-dependent rescaling of the state.
    Additionally every state row must contract strictly (Σ|A_rj| ≤ 1 −
    contraction) so the initial state is forgotten: then limsup|y| ≤
    γ·limsup|u| too, which the ℓ∞ small-gain argument needs for decay.

    Checked at the corners (Σ|a(θ)| is convex in θ); first with unit state
    weights, then with the best diagonal state weighting w > 0 from a linear
    program (weighted max-norm |x_r|/w_r, which handles e.g. FIR delay
    chains).  Returns γ, or None if no weighting satisfies the conditions.
    """
    blocks = _blocks(blocks_at_corners)
    n = blocks[0][0].shape[0]
    best = _linf_gain_with_weights(blocks, np.ones(n), contraction)
    if n == 0 or (best is not None and best <= 1.0):
        return best
    try:
        from scipy.optimize import linprog  # noqa: PLC0415
    except ImportError:  # pragma: no cover
        return best
    # variables z = [w (n), γ]; minimise γ
    rows, rhs = [], []
    for A, B, C, D in blocks:
        aA = np.abs(A)
        for r in range(n):
            e = np.zeros(n)
            e[r] = 1.0
            rows.append(np.r_[aA[r] - e, 0.0])
            rhs.append(-np.abs(B[r]).sum())
            rows.append(np.r_[aA[r] - (1.0 - 10 * contraction) * e, 0.0])
            rhs.append(0.0)
        for q in range(C.shape[0]):
            rows.append(np.r_[np.abs(C[q]), -1.0])
            rhs.append(-np.abs(D[q]).sum())
    res = linprog(
        np.r_[np.zeros(n), 1.0],
        A_ub=np.array(rows),
        b_ub=np.array(rhs),
        bounds=[(1e-6, 1e6)] * n + [(0, None)],
        method="highs",
    )
    if res.status != 0:
        return best
    w = np.asarray(res.x[:n], dtype=float)  # scale matters (B and C terms): keep it
    cand = _linf_gain_with_weights(blocks, w, contraction)  # independent re-check
    if cand is None:
        return best
    return cand if best is None else min(best, cand)


# --------------------------------------------------------------------------
# Vector small gain over a network of cells
# --------------------------------------------------------------------------

Norm = Literal["l2", "linf"]


@dataclass(frozen=True)
class CellModel:
    """One cell as seen by the small-gain route.

    kind: "delay" (pure delay line; `length_varies` if its length is
    modulated), "gain" (static map; `corners` = its matrix at each corner)
    or "filter" (`corners` = (A, B, C, D) at each corner).
    """

    name: str
    kind: Literal["delay", "gain", "filter"]
    corners: tuple = ()
    length_varies: bool = False


@dataclass(frozen=True)
class WireModel:
    """Wire from cell `src`'s output into cell `dst`'s input.

    corners: the wire's matrix (or scalar gain) at each corner of the box.
    """

    src: str
    dst: str
    corners: tuple = (1.0,)


@dataclass(frozen=True)
class CellGain:
    """Worst-case gain of one cell (dimensionless) in one signal norm."""

    cell: str
    gain: float
    norm: Norm
    route: str


@dataclass(frozen=True)
class GainMatrix:
    """Nonnegative cell-to-cell gain matrix, all entries in the norm `norm`.

    matrix[i, j] = (gain of cell i) · (gain of the wires from cell j into
    cell i), i.e. the gain from cell j's output to cell i's output.
    """

    cells: tuple
    matrix: np.ndarray
    norm: Norm


def _induced_norm(W, norm: Norm) -> float:
    W = np.atleast_2d(np.asarray(_dense(W) if sp.issparse(W) else W, dtype=float))
    if W.size == 0:
        return 0.0
    if norm == "l2":
        return float(np.linalg.norm(W, 2))
    return float(np.abs(W).sum(axis=1).max())


def _check_norm(norm) -> Norm:
    if norm not in ("l2", "linf"):
        raise AnalysisError(f"norm must be 'l2' or 'linf', got {norm!r}")
    return norm


def cell_gain(cell: CellModel, norm: Norm) -> CellGain | None:
    """Gain of one cell under arbitrary-speed parameter motion, or None.

    * delay: 1 in ℓ∞ always (each output is some past input, also for a
      modulated length read with interpolation weights in [0, 1]); 1 in ℓ2
      only for a fixed length -- a modulated read pointer can repeat samples
      and raise the energy, so then None.
    * gain: max induced norm of its matrix over the corners (convex in θ).
    * filter: ℓ2 → `l2_gain_common_storage`; ℓ∞ → `linf_gain_convex_filter`.
    """
    norm = _check_norm(norm)
    if cell.kind == "delay":
        if norm == "l2" and cell.length_varies:
            return None
        return CellGain(cell.name, 1.0, norm, "delay line")
    if cell.kind == "gain":
        if not cell.corners:
            raise AnalysisError(f"cell {cell.name!r}: a gain cell needs its matrix at each corner")
        return CellGain(cell.name, max(_induced_norm(g, norm) for g in cell.corners), norm, "static gain")
    if cell.kind == "filter":
        if not cell.corners:
            raise AnalysisError(f"cell {cell.name!r}: a filter cell needs (A, B, C, D) at each corner")
        if norm == "l2":
            res = l2_gain_common_storage(cell.corners)
            return None if res is None else CellGain(cell.name, res[0], norm, "common storage (l2)")
        g = linf_gain_convex_filter(cell.corners)
        return None if g is None else CellGain(cell.name, g, norm, "convex combination (linf)")
    raise AnalysisError(f"cell {cell.name!r}: unknown kind {cell.kind!r}")


def build_gain_matrix(cell_gains: Sequence[CellGain], wires: Sequence[WireModel], norm: Norm) -> GainMatrix:
    """Assemble the nonnegative gain matrix in ONE norm.

    Rule enforced: every cell gain must be in `norm`, and wire gains are
    taken as induced norms of that same kind (spectral norm for ℓ2, max row
    sum for ℓ∞); mixing an ℓ2 gain with an ℓ∞ gain raises AnalysisError,
    because the small-gain argument chains inequalities of one norm.  Wires
    from or to names that are not cells (the voice's input and output) are
    ignored: they do not close loops.
    """
    norm = _check_norm(norm)
    names = [g.cell for g in cell_gains]
    if len(set(names)) != len(names):
        raise AnalysisError("duplicate cell names in the gain list")
    for g in cell_gains:
        if g.norm != norm:
            raise AnalysisError(
                f"cell {g.cell!r}: gain is in {g.norm} but the network is analysed in {norm}; "
                "one norm throughout"
            )
    idx = {n: i for i, n in enumerate(names)}
    G = np.zeros((len(names), len(names)))
    for w in wires:
        if w.src in idx and w.dst in idx:
            wg = max(_induced_norm(c, norm) for c in w.corners) if w.corners else 0.0
            G[idx[w.dst], idx[w.src]] += cell_gains[idx[w.dst]].gain * wg
    return GainMatrix(tuple(names), G, norm)


def network_small_gain(gain_matrix, *, margin: float = 1e-9) -> tuple[float, bool]:
    """Vector small-gain test: (ρ(Γ), certified) for a nonnegative gain matrix Γ.

    Γ[i, j] bounds the gain from cell j's output to cell i's output, every
    entry in one norm (use `build_gain_matrix`, which enforces it).  If each
    cell satisfies ‖y_i‖ ≤ γ_i‖u_i‖ + β_i(x₀) for every parameter path (and
    forgets its own initial state), then on every finite horizon the vector
    of output norms obeys v ≤ Γv + β, and ρ(Γ) < 1 makes (I − Γ)⁻¹ ≥ 0, so
    all signals stay bounded and decay: the network is stable under
    modulation of any speed.  `certified` is decided independently of the
    eigenvalue by Collatz–Wielandt: v = (I − Γ)⁻¹·1 > 0 with
    max_i (Γv)_i / v_i < 1 − margin.
    """
    G = gain_matrix.matrix if isinstance(gain_matrix, GainMatrix) else np.asarray(gain_matrix, dtype=float)
    G = np.atleast_2d(G)
    if G.shape[0] != G.shape[1]:
        raise AnalysisError(f"gain matrix must be square, got shape {G.shape}")
    if not np.all(np.isfinite(G)) or np.any(G < 0):
        raise AnalysisError("gain matrix must be finite and nonnegative")
    if G.size == 0:
        return 0.0, True
    rho = float(np.max(np.abs(np.linalg.eigvals(G))))
    n = G.shape[0]
    try:
        v = np.linalg.solve(np.eye(n) - G, np.ones(n))
    except np.linalg.LinAlgError:
        return rho, False
    if not np.all(v > 0):
        return rho, False
    ratio = float(np.max((G @ v) / v))
    return rho, bool(ratio < 1.0 - margin)


def _worst_loop(gm: GainMatrix) -> tuple[float, list[str]]:
    """Strongly connected set of cells with the largest loop gain ρ."""
    from scipy.sparse.csgraph import connected_components  # noqa: PLC0415

    G = gm.matrix
    ncomp, labels = connected_components(sp.csr_matrix(G > 0), directed=True, connection="strong")
    best, cells = 0.0, []
    for c in range(ncomp):
        ix = np.flatnonzero(labels == c)
        r = float(np.max(np.abs(np.linalg.eigvals(G[np.ix_(ix, ix)]))))
        if r > best:
            best, cells = r, [gm.cells[i] for i in ix]
    return best, cells


# --------------------------------------------------------------------------
# Common quadratic Lyapunov function
# --------------------------------------------------------------------------


def lyapunov_margin(P, As) -> float:
    """Verified decrease margin of V(x) = xᵀPx over matrices As (dimensionless).

    Returns min over i of λmin(P − AᵢᵀPAᵢ) / λmax(P), or −inf if P is not
    positive definite.  Positive ⇒ V(Ax) ≤ (1 − margin)·V(x) for every A in
    the convex hull of As (P − AᵀPA ≻ 0 is, by a Schur complement, an LMI
    affine in A).  A multi-affine A(θ) is the multilinear interpolation of
    its corner values, so it lies in the convex hull of the corners.
    """
    P = np.asarray(P, dtype=float)
    P = 0.5 * (P + P.T)
    ev = np.linalg.eigvalsh(P)
    if ev[0] <= 0:
        return -math.inf
    worst = math.inf
    for A in As:
        A = _dense(A)
        Q = P - A.T @ P @ A
        worst = min(worst, float(np.linalg.eigvalsh(0.5 * (Q + Q.T))[0]) / ev[-1])
    return worst


def _lyap_ok(P, As) -> bool:
    # round-off in forming P − AᵀPA is ~ n·eps·‖A‖²‖P‖; demand well above it
    n = P.shape[0]
    scale = max(1.0, max(float(np.linalg.norm(_dense(A), 2)) ** 2 for A in As))
    return lyapunov_margin(P, As) > 100 * n * np.finfo(float).eps * scale


def common_quadratic_lyapunov(As, *, max_states: int = 12):
    """P ≻ 0 with AᵢᵀPAᵢ − P ≺ 0 for every Aᵢ (one per corner), or None.

    Proves V(x) = xᵀPx decreases for every parameter path in the box, at any
    speed (the condition is convex in A, so corners cover the box).  Tries
    closed-form candidates first (discrete Lyapunov solutions at each corner
    and at the mean), then the LMI (maximise s with trace P = n, P ⪰ sI,
    P − AᵢᵀPAᵢ ⪰ sI).  Every candidate is verified with eigenvalues
    (`lyapunov_margin`) before it is returned.  Larger states than
    `max_states` raise AnalysisError (use the small-gain route).
    """
    As = [_dense(A) for A in As]
    if not As:
        raise AnalysisError("no matrices given")
    n = As[0].shape[0]
    if any(A.shape != (n, n) for A in As):
        raise AnalysisError("matrices must all be square and of one size")
    if n > max_states:
        raise AnalysisError(f"{n} states is too large for a direct Lyapunov search (max {max_states})")
    if n == 0:
        return np.zeros((0, 0))
    cands = []
    for A in As + [sum(As) / len(As)]:
        if np.max(np.abs(np.linalg.eigvals(A))) < 1.0:
            try:
                X = sla.solve_discrete_lyapunov(A.T, np.eye(n))
            except (ValueError, np.linalg.LinAlgError):
                continue
            if np.all(np.isfinite(X)):
                cands.append(0.5 * (X + X.T))
    for P in cands:
        if _lyap_ok(P, As):
            return P
    cp = _cvxpy()
    if cp is None:
        return None
    Pv = cp.Variable((n, n), symmetric=True)
    s = cp.Variable()
    cons = [cp.trace(Pv) == n, Pv >> s * np.eye(n)]
    cons += [_sym(cp, Pv - A.T @ Pv @ A) >> s * np.eye(n) for A in As]
    prob = cp.Problem(cp.Maximize(s), cons + [s <= 1.0])
    if not _solve(cp, prob) or Pv.value is None or s.value is None or s.value <= 0:
        return None
    P = np.array(Pv.value, dtype=float)
    P = 0.5 * (P + P.T)
    return P if _lyap_ok(P, As) else None


# --------------------------------------------------------------------------
# Ramp-limited: parameter-dependent storage
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class RampSlope:
    """A verified bound on the parameter slope (per sample).

    per_sample: δ, as a fraction of each parameter's range per sample (every
    parameter may move by up to δ·(hi − lo) each sample, all at once).
    per_parameter: δ·(hi − lo) in each parameter's own units per sample.
    P0, P: storage P(θ) = P0 + Σ t_j P[j] with t_j = (θ_j − lo_j)/(hi_j − lo_j);
    G: the slack matrix of the dilated inequality.  margin: smallest
    eigenvalue found at the vertices, relative to their largest.
    """

    per_sample: float
    per_parameter: dict
    P0: np.ndarray
    P: dict
    G: np.ndarray
    margin: float

    def storage(self, theta: Mapping[str, float], box) -> np.ndarray:
        """P(θ) for a parameter point θ (parameter units)."""
        b = _validate_box(box)
        out = np.array(self.P0, copy=True)
        for name, Pj in self.P.items():
            lo, hi = b[name]
            out = out + ((float(theta[name]) - lo) / (hi - lo)) * Pj
        return out


def _hexagon(delta: float) -> list[tuple[float, float]]:
    """Vertices of {(t, t⁺) ∈ [0,1]²: |t⁺ − t| ≤ δ}."""
    if delta >= 1.0:
        return [(0.0, 0.0), (0.0, 1.0), (1.0, 0.0), (1.0, 1.0)]
    if delta <= 0.0:
        return [(0.0, 0.0), (1.0, 1.0)]
    return [(0.0, 0.0), (0.0, delta), (1.0 - delta, 1.0), (1.0, 1.0), (1.0, 1.0 - delta), (delta, 0.0)]


def _ramp_vertices(k: int, delta: float):
    """Vertices (t, t⁺) of the product of k hexagons."""
    hexv = _hexagon(delta)
    for combo in itertools.product(hexv, repeat=k):
        yield np.array([c[0] for c in combo]), np.array([c[1] for c in combo])


def _dilated(P0, Ps, G, A_of, t, tp):
    """[P(t), A(t)ᵀG; GᵀA(t), G + Gᵀ − P(t⁺)] for numbers t, t⁺."""
    P = P0 + sum(tj * Pj for tj, Pj in zip(t, Ps))
    Pp = P0 + sum(tj * Pj for tj, Pj in zip(tp, Ps))
    A = A_of(t)
    M = np.block([[P, A.T @ G], [G.T @ A, G + G.T - Pp]])
    return 0.5 * (M + M.T)


def _ramp_verify(P0, Ps, G, A_of, k, delta) -> float | None:
    """Relative margin λmin/λmax over all vertices, or None if not positive."""
    lo, hi = math.inf, 0.0
    for t, tp in _ramp_vertices(k, delta):
        ev = np.linalg.eigvalsh(_dilated(P0, Ps, G, A_of, t, tp))
        lo, hi = min(lo, ev[0]), max(hi, abs(ev[-1]))
    n2 = 2 * P0.shape[0]
    if hi == 0.0 or lo <= 100 * n2 * np.finfo(float).eps * hi:
        return None
    return lo / hi


def _ramp_lmi(cp, A_of, n, k, delta):
    P0 = cp.Variable((n, n), symmetric=True)
    Ps = [cp.Variable((n, n), symmetric=True) for _ in range(k)]
    G = cp.Variable((n, n))
    s = cp.Variable()
    cons = [s <= 1.0]
    for c in itertools.product((0.0, 1.0), repeat=k):  # P(t) ⪯ I on the box (scale)
        cons.append(_sym(cp, P0 + sum(cj * Pj for cj, Pj in zip(c, Ps))) << np.eye(n))
    for t, tp in _ramp_vertices(k, delta):
        P = P0 + sum(tj * Pj for tj, Pj in zip(t, Ps))
        Pp = P0 + sum(tj * Pj for tj, Pj in zip(tp, Ps))
        A = A_of(t)
        M = cp.bmat([[P, A.T @ G], [G.T @ A, G + G.T - Pp]])
        cons.append(_sym(cp, M) >> s * np.eye(2 * n))
    prob = cp.Problem(cp.Maximize(s), cons)
    if not _solve(cp, prob) or s.value is None or s.value <= 0 or G.value is None:
        return None
    return (np.array(P0.value), [np.array(P.value) for P in Ps], np.array(G.value))


def _ramp_heuristic(A_of, n, k):
    """Closed-form candidate: corner Lyapunov solutions fitted affinely."""
    pts, sols = [], []
    for c in itertools.product((0.0, 1.0), repeat=k):
        A = A_of(np.array(c))
        if np.max(np.abs(np.linalg.eigvals(A))) >= 1.0:
            return None
        X = sla.solve_discrete_lyapunov(A.T, np.eye(n))
        pts.append(np.r_[1.0, c])
        sols.append(0.5 * (X + X.T))
    X = np.array(pts)
    Y = np.array([s.ravel() for s in sols])
    coef, *_ = np.linalg.lstsq(X, Y, rcond=None)
    P0 = coef[0].reshape(n, n)
    Ps = [coef[j + 1].reshape(n, n) for j in range(k)]
    scale = max(np.linalg.norm(s, 2) for s in sols)
    P0, Ps = P0 / scale, [P / scale for P in Ps]
    G = P0 + 0.5 * sum(Ps)  # P at the box centre
    return P0, Ps, G


#: Parameters the ramp-limited route handles (6^k vertex inequalities).
MAX_RAMP_PARAMETERS = 3


def ramp_limited_slope(A_family, box, *, max_states: int = 12, iterations: int = 6) -> RampSlope | None:
    """Largest verified per-sample parameter slope that keeps stability.

    Storage V(x, θ) = xᵀP(θ)x with P affine in the normalised parameters t.
    With x⁺ = A(θ)x the requirement V(x⁺, θ⁺) < V(x, θ) is
    P(θ) − A(θ)ᵀP(θ⁺)A(θ) ≻ 0.  It holds iff some G gives the dilated
    inequality  M(θ, θ⁺) = [P(θ), A(θ)ᵀG; GᵀA(θ), G + Gᵀ − P(θ⁺)] ≻ 0
    (since G + Gᵀ − P⁺ ⪯ GᵀP⁺⁻¹G, a congruence with diag(I, G⁻¹) gives
    [P, Aᵀ; A, P⁺⁻¹] ≻ 0).  With G constant, M is affine in each pair
    (t_j, t⁺_j) with the other pairs fixed (A multi-affine, P affine), and
    each pair ranges over the hexagon {t, t⁺ ∈ [0, 1], |t⁺ − t| ≤ δ}; so
    M at any admissible (θ, θ⁺) is a convex combination of M at the
    products of hexagon vertices, and M ≻ 0 there proves it everywhere.  The check at the vertices is redone with
    eigenvalues for the returned (P, G); δ is the largest value (by a
    geometric search) that passed.  δ ≥ 1 means every jump within the box is
    covered (any speed).  Returns None when no δ > 0 is proven.
    """
    fam = _as_family(A_family)
    b = _family_box(fam, box)
    names = [nm for nm, (lo, hi) in b.items() if lo != hi]
    if len(names) > MAX_RAMP_PARAMETERS:
        raise AnalysisError(
            f"{len(names)} parameters vary; the ramp-limited route handles at most {MAX_RAMP_PARAMETERS}"
        )
    n = fam.shape[0]
    if n > max_states:
        raise AnalysisError(f"{n} states is too large for the ramp-limited route (max {max_states})")
    fixed = {nm: lo for nm, (lo, hi) in b.items() if lo == hi}
    k = len(names)

    def A_of(t):
        """A at normalised parameters t ∈ [0, 1]^k."""
        theta = dict(fixed)
        theta.update({nm: b[nm][0] + tj * (b[nm][1] - b[nm][0]) for nm, tj in zip(names, t)})
        return _dense(fam.at(theta))

    cp = _cvxpy()

    def attempt(delta):
        """Verified (P0, Ps, G, margin) at slope δ, or None."""
        cands = []
        h = _ramp_heuristic(A_of, n, k)
        if h is not None:
            cands.append(h)
        for cand in cands:
            m = _ramp_verify(*cand, A_of, k, delta)
            if m is not None:
                return (*cand, m)
        if cp is not None:
            sol = _ramp_lmi(cp, A_of, n, k, delta)
            if sol is not None:
                m = _ramp_verify(*sol, A_of, k, delta)
                if m is not None:
                    return (*sol, m)
        return None

    def result(delta, sol):
        P0, Ps, G, m = sol
        return RampSlope(
            per_sample=float(delta),
            per_parameter={nm: float(delta * (b[nm][1] - b[nm][0])) for nm in names},
            P0=P0,
            P=dict(zip(names, Ps)),
            G=G,
            margin=float(m),
        )

    if not names:
        sol = attempt(1.0)
        return None if sol is None else result(1.0, sol)
    sol = attempt(1.0)
    if sol is not None:
        return result(1.0, sol)
    good, bad, good_sol = None, 1.0, None
    for e in range(1, 7):
        d = 10.0 ** (-e)
        sol = attempt(d)
        if sol is not None:
            good, good_sol = d, sol
            break
        bad = d
    if good is None:
        return None
    for _ in range(iterations):
        mid = math.sqrt(good * bad)
        sol = attempt(mid)
        if sol is not None:
            good, good_sol = mid, sol
        else:
            bad = mid
    return result(good, good_sol)


# --------------------------------------------------------------------------
# Certificates
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class Certificate:
    """What was proven about stability while parameters move.

    certified: "any-speed" (any parameter path in the box), "ramp-limited"
    (paths whose per-sample change stays within `slope_per_sample` of each
    range) or False.  route names the proof; failing names the cell, loop or
    corner that blocked it; details holds numbers (and "warning").
    """

    certified: Literal["any-speed", "ramp-limited", False]
    route: str
    slope_per_sample: float | None
    details: dict
    failing: str | None

    def slope_per_second(self, fs: float) -> float | None:
        """The ramp bound as a fraction of each range per second (fs in Hz)."""
        return None if self.slope_per_sample is None else self.slope_per_sample * float(fs)


FROZEN_ONLY = "frozen-stable only: no proof that moving the parameters keeps it stable"


def _small_gain_route(cells, wires, details):
    tried = {}
    for norm in ("linf", "l2"):
        gains, missing = [], None
        for c in cells:
            g = cell_gain(c, norm)
            if g is None:
                missing = c.name
                break
            gains.append(g)
        if missing is not None:
            tried[norm] = {"failing": f"cell {missing!r}: no {norm} gain bound"}
            continue
        gm = build_gain_matrix(gains, wires, norm)
        rho, ok = network_small_gain(gm)
        entry = {"rho": rho, "gains": {g.cell: g.gain for g in gains}}
        if ok:
            details["small_gain"] = {norm: entry}
            return f"small-gain ({norm})", None
        loop_rho, loop_cells = _worst_loop(gm)
        entry["failing"] = f"loop gain {loop_rho:.6g} >= 1 through cells {', '.join(loop_cells)}"
        tried[norm] = entry
    details["small_gain"] = tried
    fails = [v["failing"] for v in tried.values()]
    return None, "small-gain: " + "; ".join(fails)


def certify(
    A_family=None,
    box=None,
    *,
    cells: Sequence[CellModel] | None = None,
    wires: Sequence[WireModel] | None = None,
    margin: float = 1e-9,
    max_lyapunov_states: int = 12,
) -> Certificate:
    """Try the proof routes in order and report the strongest one that holds.

    1. Frozen check of A_family (if given): unstable or marginal at an
       evaluated point ⇒ certified False, failing names that point.
    2. Vector small gain (if `cells` and `wires` describe the same network as
       A_family): ℓ∞ first, then ℓ2, one norm at a time ⇒ "any-speed".
    3. Common quadratic Lyapunov function (state ≤ max_lyapunov_states)
       ⇒ "any-speed".
    4. Parameter-dependent storage (`ramp_limited_slope`): δ ≥ 1 ⇒
       "any-speed", 0 < δ < 1 ⇒ "ramp-limited" with that slope.
    5. Otherwise False with the "frozen-stable only" warning.
    """
    details: dict = {}
    failures: list[str] = []
    frozen = None
    fam = None
    if A_family is not None:
        fam = _as_family(A_family)
        frozen = frozen_stability(fam, box, margin)
        details["frozen"] = {"status": frozen.status, "radius_max": frozen.radius_max,
                             "worst_corner": frozen.worst_corner}
        if not frozen.stable:
            word = "unstable" if frozen.status == "unstable" else "not strictly stable (lossless)"
            details["warning"] = f"{word} with parameters fixed"
            where = "corner" if max(frozen.points, key=lambda q: q.radius).is_corner else "box centre"
            return Certificate(False, "frozen", None, details,
                               f"{where} {frozen.worst_corner}: spectral radius {frozen.radius_max:.12g} ({word})")
    if cells is not None and wires is not None:
        route, fail = _small_gain_route(list(cells), list(wires), details)
        if route is not None:
            return Certificate("any-speed", route, None, details, None)
        failures.append(fail)
    if fam is not None:
        n = fam.shape[0]
        b = _family_box(fam, box)
        if n <= max_lyapunov_states:
            As = [_dense(fam.at(c)) for c in corners(b)]
            P = common_quadratic_lyapunov(As, max_states=max_lyapunov_states)
            if P is not None:
                details["lyapunov"] = {"P": P, "margin": lyapunov_margin(P, As)}
                return Certificate("any-speed", "common quadratic Lyapunov", None, details, None)
            failures.append("common Lyapunov: none found over the corners")
            varying = [nm for nm, (lo, hi) in b.items() if lo != hi]
            if len(varying) <= MAX_RAMP_PARAMETERS:
                ramp = ramp_limited_slope(fam, b, max_states=max_lyapunov_states)
                if ramp is not None:
                    details["ramp"] = {"per_parameter": ramp.per_parameter, "margin": ramp.margin,
                                       "P0": ramp.P0, "P": ramp.P, "G": ramp.G}
                    if ramp.per_sample >= 1.0:
                        return Certificate("any-speed", "parameter-dependent Lyapunov (any jump)",
                                           None, details, None)
                    return Certificate("ramp-limited", "parameter-dependent Lyapunov", ramp.per_sample,
                                       details, None)
                failures.append("ramp-limited: no slope proven")
            else:
                failures.append(f"ramp-limited: {len(varying)} parameters vary (max {MAX_RAMP_PARAMETERS})")
        else:
            failures.append(f"Lyapunov routes: {n} states exceed {max_lyapunov_states}")
    details["warning"] = FROZEN_ONLY if frozen is not None else "nothing proven"
    return Certificate(False, "none", None, details, "; ".join(failures) or "no route applicable")


# --------------------------------------------------------------------------
# Normalized lattice (Gray & Markel 1975)
# --------------------------------------------------------------------------


def allpass1_to_lattice(a: float) -> float:
    """Reflection coefficient k of H(z) = (a + z⁻¹)/(1 + a z⁻¹): k = a.

    The section's update [s⁺; y] = [[−k, c], [c, k]] [s; x], c = √(1 − k²),
    is an orthogonal matrix, so ‖s⁺‖² + y² = ‖s‖² + x² for any k in (−1, 1)
    at every sample, however k moves.
    """
    a = float(a)
    if not (abs(a) < 1.0):
        raise AnalysisError(f"allpass coefficient {a} must satisfy |a| < 1 for a stable lattice")
    return a


@dataclass(frozen=True)
class NormalizedLattice:
    """Normalized lattice: reflection coefficients k[0..M−1] (section m+1 uses
    k[m]) and tap weights v[0..M] on the backward signals g_0..g_M."""

    k: np.ndarray
    v: np.ndarray


def lattice_sections(k) -> list[np.ndarray]:
    """The 2×2 rotation of each section: [f_{m−1}; g_m] = [[c, −k], [k, c]] [f_m; g_{m−1}(n−1)]."""
    out = []
    for km in np.atleast_1d(np.asarray(k, dtype=float)):
        if not (abs(km) < 1.0):
            raise AnalysisError(f"reflection coefficient {km} must satisfy |k| < 1")
        c = math.sqrt(1.0 - km * km)
        out.append(np.array([[c, -km], [km, c]]))
    return out


def _lattice_step(k, s, x):
    """One sample: returns (new state, backward signals g_0..g_M)."""
    M = len(k)
    rots = lattice_sections(k)
    g = np.zeros(M + 1)
    f = x
    for m in range(M, 0, -1):  # section m: inputs f_m and g_{m-1}(n-1) = s[m-1]
        f, g[m] = rots[m - 1] @ np.array([f, s[m - 1]])
    g[0] = f
    return g[:M].copy(), g


def lattice_state_space(k, v=None):
    """(A, B, C, D) of a normalized lattice; state s = [g_0..g_{M−1}](n−1).

    v: tap weights on g_0..g_M (default: only g_M, the allpass output).
    The map (s, x) ↦ (s⁺, g_M) is orthogonal for every |k_m| < 1, so with
    x = 0 the state energy ‖s‖² never grows, whatever the coefficients do.
    """
    k = np.atleast_1d(np.asarray(k, dtype=float))
    M = len(k)
    if M == 0:
        raise AnalysisError("a lattice needs at least one section")
    v = np.eye(M + 1)[M] if v is None else np.asarray(v, dtype=float)
    if v.shape != (M + 1,):
        raise AnalysisError(f"tap weights must have {M + 1} entries, got {v.shape}")
    A = np.zeros((M, M))
    Cg = np.zeros((M + 1, M))
    for j in range(M):
        e = np.zeros(M)
        e[j] = 1.0
        A[:, j], Cg[:, j] = _lattice_step(k, e, 0.0)
    B, Dg = _lattice_step(k, np.zeros(M), 1.0)
    return A, B.reshape(M, 1), (v @ Cg).reshape(1, M), np.array([[v @ Dg]])


def biquad_to_lattice(b, a) -> NormalizedLattice:
    """Normalized lattice (Gray & Markel 1975) for H(z) = b(z⁻¹)/a(z⁻¹).

    b, a: up to 3 coefficients each in powers of z⁻¹ (a[0] ≠ 0).  Reflection
    coefficients by the step-down recursion (k_2 = a_2, k_1 = a_1/(1 + a_2)
    for the sign convention of `lattice_sections`); tap weights by matching
    the numerator against the transfer functions to g_0..g_2.  Raises
    AnalysisError if the denominator is not strictly stable (|k| ≥ 1).
    """
    b = np.atleast_1d(np.asarray(b, dtype=float))
    a = np.atleast_1d(np.asarray(a, dtype=float))
    if a.size == 0 or a[0] == 0.0:
        raise AnalysisError("denominator a[0] must be nonzero")
    if a.size > 3 or b.size > 3:
        raise AnalysisError("a biquad has at most 3 coefficients in b and in a")
    b, a = b / a[0], a / a[0]
    a = np.r_[a, np.zeros(3 - a.size)]
    bb = np.r_[b, np.zeros(3 - b.size)]
    order = 2 if a[2] != 0.0 or bb[2] != 0.0 else 1
    if order == 2:
        k2 = a[2]
        if not (abs(k2) < 1.0):
            raise AnalysisError(f"biquad denominator {a.tolist()} is not stable (k2 = {k2})")
        k1 = a[1] / (1.0 + k2)
        k = np.array([k1, k2])
    else:
        k = np.array([a[1]])
    if not np.all(np.abs(k) < 1.0):
        raise AnalysisError(f"biquad denominator {a.tolist()} is not stable (k = {k.tolist()})")
    M = len(k)
    from scipy.signal import ss2tf  # noqa: PLC0415

    A, B, _, _ = lattice_state_space(k)
    # numerator of the transfer function to each g_m (common denominator a)
    nums = []
    for m in range(M + 1):
        e = np.eye(M + 1)[m]
        _, _, C, D = lattice_state_space(k, e)
        num, den = ss2tf(A, B, C, D)
        nums.append(np.atleast_2d(num)[0][: M + 1])
    den = np.atleast_1d(den)[: M + 1]
    if not np.allclose(den, a[: M + 1], atol=1e-12):
        raise AnalysisError("internal: lattice denominator does not match")  # pragma: no cover
    N = np.array(nums).T  # columns: numerators of g_0..g_M
    v = np.linalg.solve(N, bb[: M + 1])
    return NormalizedLattice(k=k, v=v)

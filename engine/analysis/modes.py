"""Modes of a linear network: the partials a listener hears, their decay, tuning, drift.

Input is the one-sample update matrix A (n×n, dense or scipy.sparse), an
output map C (p×n), optionally the input map B (n×1, the ``excite`` input)
and the sample rate fs in Hz.  Each eigenvalue z of A is a mode: frequency
f = arg(z)·fs/(2π) Hz and amplitude factor r = |z| per sample.

* T60 is the time for a 60 dB decay (the reverberation-time definition of
  ISO 3382-1), so from the pole radius r:

      T60 = 60 dB / (−20·log10(r) · fs)   seconds.

* Modal amplitude: with right eigenvector v and left eigenvector w
  (wᴴv = 1) the impulse response from the input to the output is
  y[n] = D·δ[n] + Σ (C v)(wᴴ B) z^(n−1); a conjugate pair sounds as a
  decaying sinusoid whose envelope at n = 1 (the first output sample after
  the impulse) is 2·|(C v)(wᴴ B)|, reported in dB re a unit impulse.  Equal eigenvalues (the degenerate pairs of a square drum)
  are one partial: their residues are summed, which is what the output hears.
* Notes are MIDI-numbered with A4 = 440 Hz: f = 440·2^((n − 69)/12).

One concept, a little over 500 lines: the eigen-solve (dense, or sparse
shift-invert probes), the modal amplitudes and the listing belong together.
The picture of the result is engine.analysis.plot.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import partial
from typing import Mapping

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla


from sheafsynth.engine.errors import AnalysisError
from sheafsynth.engine.model.dense import DENSE_MAX
from sheafsynth.engine.model.spectra import start_vector

__all__ = [
    "Mode",
    "DriftMode",
    "RANKINGS",
    "LISTED_DEFAULT",
    "modes",
    "drift_modes",
    "all_poles",
    "note_name",
    "t60_from_radius",
]

NOTE_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
#: How many partials ``sheafsynth check`` lists by default.
LISTED_DEFAULT = 8
#: How ``modes`` chooses which partials to list (see its docstring).
RANKINGS = ("heard", "slowest")
#: Partials quieter than this, relative to the strongest, are not heard (dB).
AUDIBLE_RANGE_DB = 60.0
#: Eigenvalues closer than this (relative) are one partial.
CLUSTER_TOL = 1e-8


@dataclass(frozen=True)
class Mode:
    """One partial (one of a conjugate pair, or one cluster of equal eigenvalues).

    freq_hz: Hz; t60_s: s (inf if |z| ≥ 1); radius: |z| per sample;
    amplitude_db: peak amplitude of the partial in the impulse response from
    the input B to the output C, dB re a unit impulse (None without B);
    energy_db: the partial's energy at the output over its whole decay,
    a²/(2(1 − r²)) for envelope a, dB re a unit impulse (None without B);
    strength_rank: 1 = the strongest at the output (by that energy; without
    B, by observability in its place); lowest: listed as one of the lowest;
    harmonic_number / cents_from_harmonic: nearest harmonic of the
    fundamental and the distance to it (cents); note_name / cents_from_note:
    nearest equal-tempered note (A4 = 440 Hz) and the distance (cents);
    energy_by_cell: share of the eigenvector's squared norm per cell (0..1);
    observability: |C v| for unit-norm eigenvector v (output weight);
    multiplicity: how many equal eigenvalues make this partial;
    is_fundamental: this mode is the chosen fundamental.
    """

    freq_hz: float
    t60_s: float
    radius: float
    cents_from_harmonic: float
    harmonic_number: int
    note_name: str
    cents_from_note: float
    energy_by_cell: dict = field(default_factory=dict)
    eigenvalue: complex = 0j
    observability: float = 1.0
    is_fundamental: bool = False
    amplitude_db: float | None = None
    energy_db: float | None = None
    strength_rank: int = 0
    lowest: bool = False
    multiplicity: int = 1

    def growth_db_per_s(self, fs: float) -> float:
        """Level change per second in dB (negative = decaying), fs in Hz."""
        return 20.0 * float(fs) * math.log10(self.radius) if self.radius > 0 else -math.inf


@dataclass(frozen=True)
class DriftMode:
    """An eigenvalue at z = 1 (a DC level that never decays).

    dominant_cells: (cell, energy share) pairs, largest first, share ≥ 0.1;
    grows: the eigenvalue 1 is defective (a Jordan block), so the level
    grows linearly with time instead of holding.
    """

    eigenvalue: complex
    vector: np.ndarray
    dominant_cells: list
    grows: bool = False


@dataclass
class _Cluster:
    """Equal eigenvalues z of A: right eigenvectors (columns of V, unit norm) and
    y = Σ v (wᴴB), the part of B in their eigenspace (None when unknown), so
    that the residue at the output is C·y; err: relative uncertainty of y."""

    z: complex
    V: np.ndarray
    y: np.ndarray | None
    err: float = 0.0


def t60_from_radius(radius: float, fs: float) -> float:
    """T60 in seconds of a mode with amplitude factor `radius` per sample.

    T60 = 60 dB / (−20·log10(radius)·fs): the time for a 60 dB decay
    (ISO 3382-1 reverberation time definition).
    """
    if radius <= 0.0:
        return 0.0
    if radius >= 1.0:
        return math.inf
    return 60.0 / (-20.0 * math.log10(radius) * float(fs))


def note_name(freq_hz: float) -> tuple[str, float]:
    """Nearest MIDI note name (C4 = 60, A4 = 69 = 440 Hz) and cents from it."""
    if not (freq_hz > 0.0):
        raise AnalysisError(f"note name needs a positive frequency, got {freq_hz}")
    m = 69.0 + 12.0 * math.log2(freq_hz / 440.0)
    n = int(round(m))
    return f"{NOTE_NAMES[n % 12]}{n // 12 - 1}", 100.0 * (m - n)


def _as_op(A):
    if sp.issparse(A):
        A = sp.csr_matrix(A, dtype=float)
    else:
        A = np.atleast_2d(np.asarray(A, dtype=float))
    if A.shape[0] != A.shape[1]:
        raise AnalysisError(f"A must be square, got shape {A.shape}")
    data = A.data if sp.issparse(A) else A
    if not np.all(np.isfinite(data)):
        raise AnalysisError("A has non-finite entries")
    return A


def _as_dense(M, n: int, what: str, *, rows: bool) -> np.ndarray:
    """C (p×n, rows=True) or B (n×m, rows=False) as a dense 2-D array, shape checked."""
    out = M.toarray() if sp.issparse(M) else np.atleast_2d(np.asarray(M, dtype=float))
    if not rows and out.ndim == 2 and out.shape[0] == 1 and n != 1:
        out = out.T
    size = out.shape[1] if rows else out.shape[0]
    if size != n:
        raise AnalysisError(f"{what} has {size} {'columns' if rows else 'rows'} for {n} states")
    return out


def _partition(partition, n) -> dict[str, np.ndarray]:
    out = {}
    for name, ix in (partition or {}).items():
        idx = np.arange(n)[ix] if isinstance(ix, slice) else np.atleast_1d(np.asarray(ix))
        if idx.dtype.kind not in "iu":
            raise AnalysisError(f"partition[{name!r}]: state indices must be integers")
        if idx.size and (idx.min() < -n or idx.max() >= n):
            raise AnalysisError(f"partition[{name!r}]: index out of range for {n} states")
        out[str(name)] = idx
    return out


def _shares(V, part) -> dict[str, float]:
    e = np.abs(V) ** 2
    if e.ndim == 2:
        e = e.sum(axis=1)
    tot = float(e.sum())
    if tot == 0.0:
        return {k: 0.0 for k in part}
    return {k: float(e[ix].sum()) / tot for k, ix in part.items()}


def _group(z: np.ndarray) -> list[list[int]]:
    """Indices of z grouped into clusters of equal eigenvalues (within CLUSTER_TOL, relative)."""
    order = np.argsort(z.real, kind="stable")
    group_of = np.full(len(z), -1)
    groups: list[list[int]] = []
    for pos, i in enumerate(order):
        tol = CLUSTER_TOL * max(1.0, abs(z[i]))
        j = pos - 1
        while j >= 0 and z[i].real - z[order[j]].real <= tol:
            if abs(z[order[j]] - z[i]) <= tol:
                group_of[i] = group_of[order[j]]
                groups[group_of[i]].append(int(i))
                break
            j -= 1
        if group_of[i] < 0:
            group_of[i] = len(groups)
            groups.append([int(i)])
    return groups


def _clusters(z, V, images=None) -> list[_Cluster]:
    """Cluster eigenpairs (z, V); ``images(groups)`` gives each group's (y, err) (no B: None)."""
    groups = _group(np.asarray(z))
    ys = images(groups) if images is not None else [(None, 0.0)] * len(groups)
    out = []
    for g, (y, e) in zip(groups, ys):
        out.append(_Cluster(complex(np.mean(np.asarray(z)[g])), V[:, g], y if e <= 1e-3 else None, e))
    return out


def _sparse_probe_eigs(A, freqs_hz, fs, k, B=None) -> list[_Cluster]:
    """Eigen-clusters of sparse A nearest to e^{iω} at each probe frequency.

    Shift-invert: one sparse LU of A − σI per probe serves the eigenvectors
    and, when B is given, their modal inputs (``_modal_images``).  With B the
    Krylov search starts from B, so each eigenspace is entered along the
    direction B excites (a degenerate pair's excited mix is always found).
    """
    n = A.shape[0]
    v0 = start_vector(n)
    if B is not None and np.linalg.norm(B) > 0:
        b = np.asarray(B, dtype=float)[:, 0]
        v0 = b / np.linalg.norm(b) + 1e-6 * v0 / np.linalg.norm(v0)
    Ac = sp.csc_matrix(A, dtype=complex)
    I = sp.identity(n, dtype=complex, format="csc")
    found: list[_Cluster] = []
    for f in freqs_hz:
        sigma = complex(np.exp(2j * np.pi * f / fs)) * (1.0 + 1e-9)
        try:
            lu = spla.splu((Ac - sigma * I).tocsc())
        except RuntimeError:
            continue
        mu, V = _arpack(lu, n, k, v0)
        if len(mu) == 0:
            continue
        images = None
        if B is not None:
            images = partial(_modal_images, lu, V, mu, B)
        for c in _clusters(sigma + 1.0 / mu, V, images):
            _merge(found, c)
    if not found:
        raise AnalysisError("sparse eigensolver found no modes")
    return found


#: Shift-invert steps between two estimates of the modal inputs, and the most steps.
PROJECTION_STRIDE, PROJECTION_STEPS = 3, 36


def _modal_images(lu, V, mu, B, groups) -> list[tuple[np.ndarray | None, float]]:
    """Each group's part of B in its eigenspace, y = Σ v (wᴴB), without left eigenvectors.

    x_m = (A − σI)⁻ᵐ B = Σ_j v_j (w_jᴴB) μ_jᵐ over all modes; projected on
    span(V) the found modes' terms outgrow the others by (|μ_rest|/|μ_j|)ᵐ,
    so the coefficient divided by μ_jᵐ converges to w_jᴴB, until rounding
    (10⁻¹⁶ of the largest term, growing as (|μ_max|/|μ_j|)ᵐ) takes over.
    A group's y is unique even when its vectors are not independent.
    Estimates every PROJECTION_STRIDE steps; each group keeps the one that
    agrees best with the one before.  Returns (y, relative disagreement);
    a disagreement ≤ 10⁻³ means known.
    """
    x = np.asarray(B, dtype=complex)[:, 0].copy()
    log_scale = 0.0
    log_mu = np.log(mu)
    best: list[np.ndarray | None] = [None] * len(groups)
    err = [math.inf] * len(groups)
    prev: list[np.ndarray] | None = None
    for m in range(1, PROJECTION_STEPS + 1):
        x = lu.solve(x)
        s = float(np.linalg.norm(x))
        if not (s > 0.0 and math.isfinite(s)):
            break
        x /= s
        log_scale += math.log(s)
        if m % PROJECTION_STRIDE:
            continue
        c = np.linalg.lstsq(V, x, rcond=1e-12)[0]
        with np.errstate(over="ignore", invalid="ignore"):
            coef = c * np.exp(log_scale - m * log_mu)
        est = [V[:, g] @ coef[g] for g in groups]
        if prev is not None:
            for i, (y, y0) in enumerate(zip(est, prev)):
                ny = float(np.linalg.norm(y))
                e = float(np.linalg.norm(y - y0)) / ny if ny > 0 and math.isfinite(ny) else math.inf
                if math.isfinite(e) and e < err[i]:
                    best[i], err[i] = y, e
        prev = est
    return list(zip(best, err))


def _arpack(lu, n: int, k: int, v0: np.ndarray):
    """k eigenpairs of largest magnitude of (A − σI)⁻¹, applied through its LU factors."""
    op = spla.LinearOperator((n, n), matvec=lambda x: lu.solve(np.asarray(x, dtype=complex)), dtype=complex)
    try:
        return spla.eigs(op, k=k, which="LM", tol=1e-10, ncv=min(n - 1, 3 * k + 1), maxiter=300, v0=v0)
    except spla.ArpackNoConvergence as exc:  # keep what did converge
        return exc.eigenvalues, exc.eigenvectors
    except (RuntimeError, spla.ArpackError):
        return np.zeros(0, complex), np.zeros((n, 0), complex)


def _merge(found: list[_Cluster], c: _Cluster) -> None:
    """Add cluster c unless a neighbouring probe found it already (keep the fuller copy: all of its
    equal eigenvalues, then known modal inputs)."""
    for i, old in enumerate(found):
        if abs(old.z - c.z) <= 10 * CLUSTER_TOL * max(1.0, abs(c.z)):
            if (c.V.shape[1], c.y is not None, -c.err) > (old.V.shape[1], old.y is not None, -old.err):
                found[i] = c
            return
    found.append(c)


def _eig_clusters(A, B, *, dense_max, fs, f_lo, f_hi, count) -> list[_Cluster]:
    n = A.shape[0]
    if n <= dense_max or not sp.issparse(A):
        dense = A.toarray() if sp.issparse(A) else A
        w, V = np.linalg.eig(dense)
        if B is None:
            return _clusters(w, V)
        try:
            bt = np.linalg.solve(V, B.astype(complex))[:, 0]
        except np.linalg.LinAlgError:
            bt = np.linalg.lstsq(V, B.astype(complex), rcond=None)[0][:, 0]
        return _clusters(w, V, lambda groups: [(V[:, g] @ bt[g], 0.0) for g in groups])
    n_probe = 12
    freqs = np.geomspace(max(f_lo, 1.0), max(f_hi, f_lo * 1.01, 2.0), n_probe)
    k = max(1, min(n - 2, max(2 * count, 16)))
    return _sparse_probe_eigs(A, freqs, fs, k, B)


def modes(
    A,
    C,
    fs: float,
    *,
    B=None,
    count: int = 12,
    rank: str = "heard",
    partition: Mapping[str, object] | None = None,
    f_lo_hz: float = 20.0,
    f_hi_hz: float | None = None,
    include_edges: bool = False,
    strong_fraction: float = 0.1,
    dense_max: int = DENSE_MAX,
) -> list[Mode]:
    """The partials of x⁺ = Ax + Bu, y = Cx that a listener hears, lowest first.

    C may be None (every mode weighted 1); B may be None (no amplitudes:
    observability |C v| stands in for the amplitude); fs in Hz.  A mode's
    strength is the root of its energy at the output, a/√(2(1 − r²)) for
    amplitude a and radius r, so a loud blip that dies in milliseconds
    does not outrank a partial that rings.

    Audible: f_lo_hz ≤ f ≤ f_hi_hz (default min(20 kHz, 0.499·fs)); with
    include_edges, every mode including f = 0 and f = fs/2 (real
    eigenvalues).  Only the upper one of each conjugate pair; equal
    eigenvalues are one partial; modes weaker than 10⁻⁶ (−120 dB) of the
    strongest (10⁻⁹ without B) are dropped (nothing reaches the output).

    Fundamental: "strong" modes have strength ≥ strong_fraction × the
    strongest and T60 ≥ strong_fraction × the longest (a body resonance
    that dies in 0.2 s under a string ringing 7 s is heard, listed, but not
    the pitch); the fundamental is the lowest-frequency strong mode (the
    lowest loud one when no loud mode lasts).  Harmonic number = round(f / f0) (≥ 1).

    rank "heard" (default): the ⌈count/2⌉ lowest partials within
    AUDIBLE_RANGE_DB of the strongest (the fundamental always among them),
    then the strongest of the rest up to ``count``; returned by frequency.
    Ties in T60 therefore never hide the fundamental.  rank "slowest": the
    ``count`` slowest-decaying (largest |z|), slowest first — the stability
    probe's question, not a listener's.

    Large sparse A (> dense_max states): eigenvalues nearest to 12 probe
    points e^{iω} log-spaced over the audible band (shift-invert, one sparse
    LU per probe); the lowest probe finds the lowest partials, the others a
    sample of the band, not a guaranteed global ranking.
    partition: {cell name: slice or index array} over state indices.
    """
    if not (fs > 0.0):
        raise AnalysisError(f"sample rate must be positive, got {fs}")
    if count < 1:
        raise AnalysisError(f"count must be >= 1, got {count}")
    if rank not in RANKINGS:
        raise AnalysisError(f"rank must be one of {', '.join(RANKINGS)}, got {rank!r}")
    A = _as_op(A)
    n = A.shape[0]
    part = _partition(partition, n)
    f_hi = min(20000.0, 0.499 * fs) if f_hi_hz is None else float(f_hi_hz)
    if n == 0:
        return []
    Cm = None if C is None else _as_dense(C, n, "C", rows=True)
    Bm = None if B is None else _as_dense(B, n, "B", rows=False)
    clusters = _eig_clusters(A, Bm, dense_max=dense_max, fs=fs, f_lo=f_lo_hz, f_hi=f_hi, count=count)
    cand = []
    for c in clusters:
        z = c.z
        tol = 1e-12 * max(1.0, abs(z))
        if z.imag < -tol:
            continue  # the conjugate partner is kept instead
        f = float(abs(np.angle(z))) * fs / (2.0 * np.pi)
        if not include_edges and not (f_lo_hz <= f <= f_hi):
            continue
        if not include_edges and (abs(z.imag) <= tol):
            continue
        V = c.V / np.maximum(np.linalg.norm(c.V, axis=0), 1e-300)
        seen = 1.0 if Cm is None else float(np.linalg.norm(Cm @ V[:, 0]))
        amp = None
        if Bm is not None and c.y is not None:
            res = (np.ones((1, n)) if Cm is None else Cm) @ c.y
            amp = float(np.linalg.norm(res)) * (2.0 if abs(z.imag) > tol else 1.0)
        cand.append((z, f, V, seen, amp))
    if not cand:
        return []
    with_amp = Bm is not None and any(c[4] is not None for c in cand)
    level = np.array([(c[4] if c[4] is not None else 0.0) if with_amp else c[3] for c in cand])
    ring = np.array([1.0 / math.sqrt(2.0 * max(1.0 - abs(c[0]) ** 2, 1e-15)) for c in cand])
    strength = level * ring
    floor = (1e-6 if with_amp else 1e-9) * float(strength.max())
    keep = [i for i, c in enumerate(cand) if strength[i] >= floor or (with_amp and c[4] is None)]
    cand = [cand[i] for i in keep]
    strength = strength[keep]
    ring = ring[keep]
    radii = np.array([abs(c[0]) for c in cand])
    t60s = np.array([t60_from_radius(r, fs) for r in radii])
    freqs = np.array([c[1] for c in cand])
    tmax = float(np.max(t60s))
    lasting = np.isinf(t60s) if math.isinf(tmax) else (t60s >= strong_fraction * tmax)
    loud = strength >= strong_fraction * strength.max()
    positive = loud & lasting & (freqs > 0)
    if not positive.any():      # the loud ones all die early: the loudest stand in
        positive = loud & (freqs > 0)
    i0 = int(np.flatnonzero(positive)[np.argmin(freqs[positive])]) if positive.any() else None
    f0 = float(freqs[i0]) if i0 is not None else None
    by_strength = np.argsort(-strength, kind="stable")
    strength_rank = np.empty(len(cand), dtype=int)
    strength_rank[by_strength] = np.arange(1, len(cand) + 1)
    lowest: set[int] = set()
    if rank == "slowest":
        chosen = list(np.argsort(-radii, kind="stable")[:count])
    else:
        heard = strength >= 10.0 ** (-AUDIBLE_RANGE_DB / 20.0) * strength.max()
        low = [int(i) for i in np.argsort(freqs, kind="stable") if heard[i]][: (count + 1) // 2]
        if i0 is not None and i0 not in low:
            low = low[:-1] + [i0]
        lowest = set(low)
        rest = [int(i) for i in by_strength if int(i) not in lowest][: count - len(low)]
        chosen = sorted(low + rest, key=lambda i: freqs[i])
    out = []
    for i in chosen:
        z, f, V, o, amp = cand[i]
        if f0 and f > 0:
            h = max(1, int(round(f / f0)))
            cents_h = 1200.0 * math.log2(f / (h * f0))
        else:
            h, cents_h = 0, 0.0
        if f > 0:
            name, cents_n = note_name(f)
        else:
            name, cents_n = "", 0.0
        out.append(Mode(
            freq_hz=f, t60_s=float(t60s[i]), radius=float(radii[i]),
            cents_from_harmonic=cents_h, harmonic_number=h,
            note_name=name, cents_from_note=cents_n,
            energy_by_cell=_shares(V, part), eigenvalue=complex(z), observability=o,
            is_fundamental=bool(i == i0),
            amplitude_db=None if amp is None else (20.0 * math.log10(amp) if amp > 0 else -math.inf),
            energy_db=None if amp is None else (20.0 * math.log10(amp * ring[i]) if amp > 0 else -math.inf),
            strength_rank=int(strength_rank[i]), lowest=i in lowest, multiplicity=V.shape[1],
        ))
    return out


def all_poles(A, *, dense_max: int = 2000) -> np.ndarray:
    """Every eigenvalue of A (dense solve; for plots), up to dense_max states."""
    A = _as_op(A)
    if A.shape[0] > dense_max:
        raise AnalysisError(f"{A.shape[0]} states: too many to list every pole (max {dense_max})")
    return np.linalg.eigvals(A.toarray() if sp.issparse(A) else A)


def drift_modes(A, tol: float = 1e-9, *, partition=None, dense_max: int = DENSE_MAX) -> list[DriftMode]:
    """Eigenvalues of A within `tol` of z = 1, with the cells that carry them.

    Dense: an orthonormal basis of the null space of A − I (one DriftMode per
    basis vector); `grows` is set when more eigenvalues lie within
    max(tol, 1e-6) of 1 than the null space has dimensions (a Jordan block:
    linear growth).  Sparse large A: shift-invert near z = 1.
    """
    A = _as_op(A)
    n = A.shape[0]
    part = _partition(partition, n)
    if n == 0:
        return []
    if n <= dense_max or not sp.issparse(A):
        dense = A.toarray() if sp.issparse(A) else A
        M = dense - np.eye(n)
        _, s, Vh = np.linalg.svd(M)
        null = Vh[s <= tol * max(1.0, float(np.linalg.norm(dense, 2)))].conj().T
        ev = np.linalg.eigvals(dense)
        alg = int(np.sum(np.abs(ev - 1.0) <= max(tol, 1e-6)))
        grows = alg > null.shape[1]
        out = []
        for j in range(null.shape[1]):
            v = null[:, j]
            out.append(DriftMode(1.0 + 0j, v, _dominant(v, part), grows))
        return out
    k = min(6, n - 2)
    try:
        vals, vecs = spla.eigs(A, k=k, sigma=1.0 + 1e-7, which="LM", v0=start_vector(A.shape[0]))
    except (RuntimeError, spla.ArpackError, spla.ArpackNoConvergence) as exc:
        raise AnalysisError(f"drift-mode search did not converge: {exc}") from None
    out = []
    for z, v in zip(vals, vecs.T):
        if abs(z - 1.0) <= tol:
            out.append(DriftMode(complex(z), v, _dominant(v, part), False))
    return out


def _dominant(v, part) -> list:
    sh = _shares(v, part)
    return sorted(((c, s) for c, s in sh.items() if s >= 0.1), key=lambda cs: -cs[1])

"""FieldModel: one parsed field cell and the spectra of its operators.

A field cell's JSON, ports and examples are described in
:mod:`sheafsynth.engine.model.cells.field`; its stability check in
:mod:`.field_stability`.  This module holds the parsed model the lowering,
the C emitter, the NumPy reference and the analysis read.

Update (one formula for the C kernel, the NumPy reference and the assembly)
---------------------------------------------------------------------------
With lambda = speed, sigma = loss, eta = hf_loss, beta = stiffness, the
per-voice pitch factor k2 (1 unless tuned) and the release factor rho
(1 while held)::

    wave / stiff:  u+ = rho * (2u - (1 - sigma) u_prev - L w - k2 beta^2 S u) / (1 + sigma) + b x
                   w  = (k2 lambda^2 + eta) u - eta u_prev
    diffusion:     u+ = rho * ((1 - sigma) u - k2 nu L u) + b x

with L the boundary-treated sheaf Laplacian, S the bending operator and
``b x`` the strike weights times the input samples (Bilbao 2009's damped leapfrog
scheme; derivation in engine.model.cells.field_stability).

Stability
---------
wave/stiff: (k2 lambda^2 + 2 eta) mu_max(L) + k2 beta^2 mu_max(S) <= 4,
diffusion: nu mu_max(L) + sigma <= 2, with sigma, eta >= 0, checked at
every corner of the box of the parameters the entries use (the left sides
are convex in the parameters, so the corners cover the box).  A field that
fails is refused with the corner named, e.g.
``cells[0].speed: unstable at tension=0.9: lambda^2 mu_max = 4.3 > 4``.
Untuned fields are checked when the preset loads; tuned fields when the
preset is lowered for a sample rate (k2 depends on it), over the playable
range ``notes`` plus the pitch-bend range.

Pitch (``tune``)
----------------
``"tune": "pitch"`` (or ``{"ratio": r, "cents": c}``) ties the field's
time scale to the played note: the kernel multiplies lambda^2 and beta^2 by

    k2 = 4 sin^2(pi f / fs) / q1,      f = note frequency * r * 2^(c/1200),

where q1 is the lowest non-zero eigenvalue of lambda^2 L + beta^2 S at the
preset's *default* parameter values.  At the defaults the lowest mode of the
lossless field then rings exactly at f (4 sin^2(w/2) = k2 q1); speed and
stiffness knobs act like tension and stiffness from there (speed x1.06 is
about a semitone up).  Losses detune by O(sigma^2) and O(eta mu).  k2 is
clamped at its value for the highest playable note plus the bend range,
the value the stability check used.  A tuned field must not be "diffusion".

Release
-------
A note-off (pedal up) multiplies the field update by rho: wave/stiff
rho = decay^(2/P), diffusion rho = decay^(1/P), P = the played note's
period in samples and decay = the preset's ``release.decay``; every mode
then loses the factor ``decay`` per period, as a delay loop does through
its per-trip gain relg = decay^(len/P).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import scipy.sparse as sp

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.complexes import CellComplex
from sheafsynth.engine.model.field_sheaf import FieldSheaf
from sheafsynth.engine.model.positions import position_weights
from sheafsynth.engine.model.spectra import gershgorin_bound, largest_eigenvalue, lowest_eigenvalues, rayleigh_at
from sheafsynth.engine.preset.affine import Affine

__all__ = ["f32", "Point", "TuneSpec", "FieldModel"]


def f32(x: float) -> float:
    """Round to float32 as the kernel stores the value."""
    return float(np.float32(x))


@dataclass(frozen=True)
class Point:
    """A strike, pickup or ``at`` point: a vertex or fractions (entries) per axis."""

    path: str
    vertex: int | None = None
    coords: tuple[Affine, ...] = ()
    direction: tuple[float, ...] = (1.0,)
    scalar: bool = False                 # a path position given as a bare entry

    @property
    def parametric(self) -> bool:
        return any(not c.is_const for c in self.coords)

    @property
    def symbols(self) -> set[str]:
        out: set[str] = set()
        for c in self.coords:
            out.update(c.symbols)
        return out


@dataclass(frozen=True)
class TuneSpec:
    ratio: float = 1.0
    cents: float = 0.0


@dataclass
class FieldModel:
    """Everything the lowering needs about one field cell (see module doc)."""

    name: str
    path: str
    complex: CellComplex
    sheaf: FieldSheaf
    boundary: str
    dynamics: str
    speed: Affine
    loss: Affine
    hf_loss: Affine
    stiffness: Affine
    tune: TuneSpec | None
    inputs: list[Point]
    outputs: list[Point]
    defaults: dict[str, float]
    holonomy: list = field(default_factory=list)
    precision: str = "auto"
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def stalk(self) -> int:
        return self.sheaf.stalk

    @property
    def kept(self) -> np.ndarray:
        if "kept" not in self._cache:
            self._cache["kept"] = self.complex.kept_vertices(self.boundary, self.path + ".boundary")
        return self._cache["kept"]

    @property
    def n_dof(self) -> int:
        return int(self.kept.size) * self.stalk

    @property
    def stiff(self) -> bool:
        return self.dynamics == "stiff"

    def laplacian(self) -> sp.csr_matrix:
        if "L" not in self._cache:
            self._cache["L"] = self.sheaf.laplacian(self.boundary, self.path + ".boundary")
        return self._cache["L"]

    def stiffness_op(self) -> sp.csr_matrix | None:
        if not self.stiff:
            return None
        if "S" not in self._cache:
            self._cache["S"] = self.sheaf.stiffness(self.boundary, self.path + ".boundary")
        return self._cache["S"]

    def mu_max(self, bound: bool = False) -> float:
        """Largest eigenvalue of L; ``bound=True``: the cheap Gershgorin upper bound."""
        key = "mu_bound" if bound else "mu_max"
        if key not in self._cache:
            lap = self.laplacian()
            self._cache[key] = gershgorin_bound(lap) if bound else largest_eigenvalue(lap)
        return self._cache[key]

    def s_max(self, bound: bool = False) -> float:
        if not self.stiff:
            return 0.0
        key = "s_bound" if bound else "s_max"
        if key not in self._cache:
            op = self.stiffness_op()
            self._cache[key] = gershgorin_bound(op) if bound else largest_eigenvalue(op)
        return self._cache[key]

    def has_drift(self) -> bool:
        """True when the update has a mode at z = 1 (a kernel of lambda^2 L + beta^2 S)."""
        if "drift" not in self._cache:
            op = self.laplacian() if not self.speed.is_zero else None
            if self.stiff and not self.stiffness.is_zero:
                op = self.stiffness_op() if op is None else op + self.stiffness_op()
            if op is None:
                self._cache["drift"] = True
            else:
                op = sp.csr_matrix(op)
                low = float(lowest_eigenvalues(op, 1)[0])
                self._cache["drift"] = low < 1e-9 * max(1.0, gershgorin_bound(op))
        return self._cache["drift"]

    def h0(self) -> int:
        """dim H^0 of the field's sheaf after the boundary treatment (drift modes of L)."""
        if "h0" not in self._cache:
            self._cache["h0"] = self.sheaf.h0_dim(self.boundary, path=self.path + ".boundary")
        return self._cache["h0"]

    def q1(self) -> float:
        """Lowest non-zero eigenvalue of lambda^2 L + beta^2 S at the default values."""
        return self.tuned_mode()[0]

    def tuned_mode(self) -> tuple[float, float]:
        """(q1, p1): the tuned mode's eigenvalue of lambda^2 L + beta^2 S at the defaults,
        and its Rayleigh quotient x^T L x (the L-eigenvalue that the eta loss sees)."""
        if "q1" not in self._cache:
            lam = f32(self.speed.value(self.defaults))
            beta = f32(self.stiffness.value(self.defaults))
            if lam == 0.0 and beta == 0.0:
                raise PresetError("a tuned field needs a non-zero speed or stiffness at the parameters' "
                                  "default values", self.path + ".tune")
            op = lam * lam * self.laplacian()
            s_op = self.stiffness_op()          # None unless stiff
            if s_op is not None and beta != 0.0:
                op = op + beta * beta * s_op
            op = sp.csr_matrix(op)
            n = op.shape[0]
            scale = max(1.0, float(abs(op).sum(axis=1).max()))
            k = min(6, n)
            q1 = None
            while q1 is None:
                ev = lowest_eigenvalues(op, k)
                nz = ev[ev > 1e-9 * scale]
                if nz.size:
                    q1 = float(nz[0])
                elif k >= n:
                    raise PresetError("a tuned field needs a mode that rings: every mode of this field "
                                      "is a drift mode", self.path + ".tune")
                else:
                    k = min(2 * k, n)
            self._cache["q1"] = q1
            exact = not self.stiff or beta == 0.0        # K is lambda^2 L: p1 = q1 / lambda^2
            self._cache["p1"] = q1 / (lam * lam) if exact else rayleigh_at(op, self.laplacian(), q1)
        return self._cache["q1"], self._cache["p1"]

    def weights(self, point: Point, env: Mapping[str, float] | None = None) -> np.ndarray:
        """Weight vector over the kept DOFs (order v*d + a) of ``point`` at ``env``."""
        if not point.parametric:
            key = ("w", id(point))
            if key in self._cache:
                return self._cache[key]
        cx = self.complex
        if point.vertex is not None:
            vw = np.zeros(cx.n_vertices)
            vw[point.vertex] = 1.0
        else:
            fr = [min(1.0, max(0.0, f32(c.value(env or self.defaults)))) for c in point.coords]
            at = fr[0] if point.scalar else fr
            vw = position_weights(cx, at, point.path, sheaf=self.sheaf)
        d = np.asarray(point.direction, dtype=float)
        w = (vw[self.kept][:, None] * d[None, :]).ravel()
        if not point.parametric:
            self._cache[("w", id(point))] = w
        return w

    def summary(self) -> dict:
        """Facts for reports: size, dim H^0, mu_max, holonomy of inconsistent faces."""
        out = {"cell": self.name, "complex": self.complex.kind, "wrap": self.complex.wrap,
               "vertices": int(self.complex.n_vertices), "dofs": self.n_dof, "stalk": self.stalk,
               "boundary": self.boundary, "dynamics": self.dynamics, "h0": self.h0(),
               "mu_max": self.mu_max(), "tuned": self.tune is not None,
               "inconsistent_faces": [h.describe() for h in self.holonomy]}
        if self.stiff:
            out["s_max"] = self.s_max()
        return out

"""``field``: a cellular sheaf on a 1- or 2-complex driven by its sheaf Laplacian.

A field cell is a surface or line (plate, membrane, bar, twisted strip,
bridge) carried as a sheaf with stalk R^d on every vertex and edge of a cell
complex (engine.model.complexes).  Its state is the displacement ``u`` and the
previous displacement ``u_prev`` on every kept vertex (V*d floats each, per
voice); one sample advances it by one leapfrog (or diffusion) step.  The
geometry, the twists, the boundary treatment and the update formula are
those of engine.model.complexes; this module parses the JSON, checks stability
and consistency, and describes the ports.  Lowering, C generation and the
NumPy reference live in engine.ir.fields and engine.backends.c.emit_field.

JSON shape
----------
::

    {"id": "plate", "kind": "field",
     "complex": {"grid": [32, 32], "wrap": "torus"},   # or {"path": N, "wrap": ...}
                                                        # or {"vertices": V, "edges": [...], "faces": [...]}
     "boundary": "free",            # "fixed" | "free" (open edges; default "free")
     "stalk": 1,                    # d >= 1 (default 1)
     "twist": {"seam": -1},         # optional restriction-map twists (engine.model.complexes)
     "consistency": "refuse",       # "refuse" | "report" inconsistent faces (default "refuse")
     "dynamics": "wave",            # "wave" | "stiff" | "diffusion" (default "wave")
     "speed": "tension",            # entry: Courant number lambda (diffusion: nu)
     "loss": 0.0001,                # entry: sigma, loss per sample (default 0)
     "hf_loss": 0.0002,             # entry: eta, frequency-dependent loss (default 0)
     "stiffness": 0.2,              # entry: beta (dynamics "stiff" only)
     "strike": [0.31, 0.27],        # point: where input port 0 drives the field
     "pickup": [0.62, {"param": "pick", "scale": 0.5, "offset": 0.25}],
     "tune": "pitch",               # optional: the played note sets the time scale
     "precision": "auto"}           # optional: kernel state "single" | "double" | "auto"

An *entry* is a number, a parameter name or ``{"param", "scale",
"offset"}`` (engine.preset.affine): CCs can move every one of them.

A *position* is a fraction in [0, 1] for a path (or ``[p]``), ``[p0, p1]``
for a grid (fractions along axis 0 and axis 1), or ``{"vertex": id}`` on any
complex; every fraction may be an entry, so a knob moves the point.
Weights interpolate linearly (path) or bilinearly (grid) between
neighbouring vertices (engine.model.complexes.position_weights), so the point
moves smoothly; moving a pickup changes only output weights and moving a
strike only input weights, neither touches stability.  A *point* is a
position or ``{"at": position, "direction": [a_1, ..., a_d]}``; the
direction (default the first stalk axis) says which stalk component the
port drives or reads.  Points on a fixed rim are silent and refused when
they are constant.

Defaults: ``strike`` at 0.23 (path) / [0.23, 0.31] (grid), ``pickup`` at
0.71 / [0.71, 0.62]; explicit complexes must give both.

``precision``: the kernel keeps the state in float32 ("single") or double.
"auto" (default) picks double for fields of at most 512 DOFs and for fields
with drift modes (a free plate's translation, a free bar's rigid motions:
modes at z = 1 add up float32 rounding without bound); single otherwise.
Double costs about half the speed of a large field.

Ports
-----
Input port 0 is the strike point, output port 0 the pickup point (both of
dimension 1).  A wire into or out of a field may carry ``"at": point``:
the wire then gets a port of its own at that point, numbered after the
existing ones in wire order (inputs 1, 2, ... and outputs 1, 2, ...).
That is how a bridge is built: a wire from a string's loop into the field
``at`` a vertex, and a wire from the field ``at`` the same vertex back
into the loop.  A wire with ``at`` must have exactly one field end and
must not also name a port (``plate.1``).  Example::

    {"from": "string1", "to": "bridge", "at": [0.5, 0.2], "gain": 0.02},
    {"from": "bridge", "to": "string1", "at": [0.5, 0.2], "gain": 0.4}

Update (one formula for the C kernel, the NumPy reference and the assembly)
---------------------------------------------------------------------------
With lambda = speed, sigma = loss, eta = hf_loss, beta = stiffness, the
per-voice pitch factor k2 (1 unless tuned) and the release factor rho
(1 while held)::

    wave / stiff:  u+ = rho * (2u - (1 - sigma) u_prev - L w - k2 beta^2 S u) / (1 + sigma) + b x
                   w  = (k2 lambda^2 + eta) u - eta u_prev
    diffusion:     u+ = rho * ((1 - sigma) u - k2 nu L u) + b x

with L the boundary-treated sheaf Laplacian, S the bending operator and
``b x`` the strike weights times the input samples (engine.model.complexes:
Bilbao 2009's damped leapfrog scheme).

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

Examples
--------
A tuned drum head with fixed rim::

    {"id": "head", "kind": "field", "complex": {"grid": [42, 42]}, "boundary": "fixed",
     "speed": "tension", "loss": 0.00012, "strike": [0.4, 0.37], "pickup": [0.55, 0.6],
     "tune": "pitch"}

A free-free bar::

    {"id": "bar", "kind": "field", "complex": {"path": 16}, "boundary": "free",
     "dynamics": "stiff", "speed": 0, "stiffness": 0.4, "loss": 0.00005,
     "strike": 0.5, "pickup": 0.02, "tune": "pitch"}

A twisted gong (the Mobius seam carries the sign twist by default)::

    {"id": "gong", "kind": "field", "complex": {"grid": [10, 40], "wrap": "mobius"},
     "boundary": "fixed", "speed": 0.5, "loss": "damp", "strike": [0.3, 0.1],
     "pickup": [0.6, "orbit"]}
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field, replace
from typing import Mapping

import numpy as np
import scipy.sparse as sp

from sheafsynth.engine.preset.affine import Affine, parse_entry
from sheafsynth.engine.model.complexes import (CellComplex, FieldSheaf, check_consistency, complex_from_spec, gershgorin_bound,
                         position_weights, STABILITY_RTOL)
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel

DYNAMICS = ("wave", "stiff", "diffusion")
KEYS = ("id", "kind", "about", "complex", "boundary", "stalk", "twist", "consistency", "dynamics",
        "speed", "loss", "hf_loss", "stiffness", "strike", "pickup", "tune", "precision")
PRECISIONS = ("auto", "single", "double")
MAX_CORNER_PARAMS = 16
DEFAULT_STRIKE = {"path": 0.23, "grid": [0.23, 0.31]}
DEFAULT_PICKUP = {"path": 0.71, "grid": [0.71, 0.62]}


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
            self._cache[key] = gershgorin_bound(lap) if bound else _largest(lap)
        return self._cache[key]

    def s_max(self, bound: bool = False) -> float:
        if not self.stiff:
            return 0.0
        key = "s_bound" if bound else "s_max"
        if key not in self._cache:
            op = self.stiffness_op()
            self._cache[key] = gershgorin_bound(op) if bound else _largest(op)
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
                low = float(_lowest(op, 1)[0])
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
            if self.stiff and beta != 0.0:
                op = op + beta * beta * self.stiffness_op()
            op = sp.csr_matrix(op)
            n = op.shape[0]
            scale = max(1.0, float(abs(op).sum(axis=1).max()))
            k = min(6, n)
            q1 = None
            while q1 is None:
                ev = _lowest(op, k)
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
            self._cache["p1"] = q1 / (lam * lam) if exact else _rayleigh(op, self.laplacian(), q1)
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


SMALL = 48   # operators up to this size are solved densely (cheap and threading-proof)


def _largest(op) -> float:
    """Largest eigenvalue of symmetric PSD ``op`` (ARPACK; Gershgorin if it fails)."""
    op = sp.csr_matrix(op)
    if op.shape[0] <= SMALL:
        return float(np.linalg.eigvalsh(op.toarray())[-1])
    import scipy.sparse.linalg as spla

    try:
        return float(spla.eigsh(op, k=1, which="LA", return_eigenvectors=False, tol=1e-10)[0])
    except spla.ArpackNoConvergence:
        return gershgorin_bound(op)


def _lowest(op, k: int) -> np.ndarray:
    """The ``k`` smallest eigenvalues of symmetric PSD ``op`` (shift-invert ARPACK)."""
    op = sp.csr_matrix(op)
    n = op.shape[0]
    if n <= SMALL or k >= n - 1:
        return np.linalg.eigvalsh(op.toarray())[:k]
    import scipy.sparse.linalg as spla

    shift = -1e-6 * max(1.0, gershgorin_bound(op))      # keeps op - shift I definite
    ev = spla.eigsh(op.tocsc(), k=k, sigma=shift, which="LM", return_eigenvectors=False)
    return np.sort(ev)


def _rayleigh(op: sp.csr_matrix, lap: sp.csr_matrix, q: float) -> float:
    """x^T L x for the unit eigenvector x of ``op`` with eigenvalue ``q``."""
    n = op.shape[0]
    if n <= SMALL:
        ev, vec = np.linalg.eigh(op.toarray())
        x = vec[:, int(np.argmin(np.abs(ev - q)))]
    else:
        import scipy.sparse.linalg as spla

        _, vec = spla.eigsh(op.tocsc(), k=1, sigma=q * (1.0 - 1e-9), which="LM")
        x = vec[:, 0]
    x = x / np.linalg.norm(x)
    return float(x @ (lap @ x))


# --------------------------------------------------------------------------
# parsing

def _entry(spec: dict, key: str, path: str, parameters, default: float | None) -> Affine:
    if key not in spec:
        if default is None:
            raise PresetError(f'a field with this dynamics needs "{key}"', path)
        return Affine.number(default)
    return parse_entry(spec[key], f"{path}.{key}", parameters)


def _range(e: Affine, parameters) -> tuple[float, float]:
    """Smallest and largest value of an affine entry over the parameter box."""
    lo = hi = e.const
    for s, c in e.terms:
        p = parameters[s]
        a, b = c * p.lo, c * p.hi
        lo += min(a, b)
        hi += max(a, b)
    return lo, hi


def parse_point(raw, path: str, cx: CellComplex, stalk: int, boundary: str, parameters) -> Point:
    """Parse a point (module doc) and check it stays on the complex over the parameter box."""
    direction = (1.0,) + (0.0,) * (stalk - 1)
    pos, ppath = raw, path
    if isinstance(raw, dict) and "at" in raw:
        for key in raw:
            if key not in ("at", "direction"):
                raise PresetError(f"unknown key {key!r} (expected at, direction)", f"{path}.{key}")
        pos, ppath = raw["at"], path + ".at"
        if "direction" in raw:
            dr = raw["direction"]
            if not isinstance(dr, list) or len(dr) != stalk:
                raise PresetError(f"a direction is a list of {stalk} number(s) (the stalk dimension)",
                                  path + ".direction")
            vals = []
            for k, x in enumerate(dr):
                if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
                    raise PresetError(f"must be a finite number, got {x!r}", f"{path}.direction[{k}]")
                vals.append(float(x))
            if not any(vals):
                raise PresetError("a direction must not be all zeros", path + ".direction")
            direction = tuple(vals)
    if isinstance(pos, dict) and "vertex" in pos:
        if set(pos) != {"vertex"}:
            extra = sorted(set(pos) - {"vertex"})[0]
            raise PresetError(f"unknown key {extra!r} (expected vertex)", f"{ppath}.{extra}")
        v = pos["vertex"]
        if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < cx.n_vertices:
            raise PresetError(f"vertex must be an integer in 0..{cx.n_vertices - 1}, got {v!r}",
                              ppath + ".vertex")
        if boundary == "fixed" and cx.boundary[v]:
            raise PresetError(f"vertex {v} is on the fixed rim: it never moves", ppath + ".vertex")
        return Point(path, vertex=int(v), direction=direction)
    if cx.kind == "explicit":
        raise PresetError('positions on an explicit complex are {"vertex": id}', ppath)
    n_axes = len(cx.shape)
    scalar = not isinstance(pos, list)
    items = [pos] if scalar else pos
    if len(items) != n_axes or (scalar and n_axes != 1):
        raise PresetError(f"needs {n_axes} fraction(s) for a {cx.kind}, got {pos!r}", ppath)
    coords = []
    for k, x in enumerate(items):
        cp = ppath if scalar else f"{ppath}[{k}]"
        e = parse_entry(x, cp, parameters)
        lo, hi = _range(e, parameters)
        if lo < 0.0 or hi > 1.0:
            where = f"{lo:g}" if lo < 0.0 else f"{hi:g}"
            raise PresetError(f"a position is a fraction in [0, 1]; this one reaches {where} over the "
                              "parameter range", cp)
        coords.append(e)
    return Point(path, coords=tuple(coords), direction=direction, scalar=scalar)


def _parse_tune(raw, path: str) -> TuneSpec | None:
    if raw is None:
        return None
    if raw == "pitch":
        return TuneSpec()
    if isinstance(raw, dict):
        for key in raw:
            if key not in ("ratio", "cents"):
                raise PresetError(f"unknown key {key!r} (expected ratio, cents)", f"{path}.{key}")
        vals = {}
        for key, default in (("ratio", 1.0), ("cents", 0.0)):
            x = raw.get(key, default)
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
                raise PresetError(f"must be a finite number, got {x!r}", f"{path}.{key}")
            vals[key] = float(x)
        if not 0.0 < vals["ratio"] <= 64.0:
            raise PresetError(f"ratio {vals['ratio']:g} must lie in (0, 64]", path + ".ratio")
        if abs(vals["cents"]) > 2400.0:
            raise PresetError(f"cents {vals['cents']:g} must lie within +-2400", path + ".cents")
        return TuneSpec(vals["ratio"], vals["cents"])
    raise PresetError('tune is "pitch" or {"ratio": r, "cents": c}', path)


def build(spec: dict, path: str, parameters: Mapping) -> CellModel:
    """Build a field cell: parse, check consistency and (untuned) stability."""
    for key in spec:
        if key not in KEYS:
            raise PresetError(f"unknown key {key!r} in a field cell", f"{path}.{key}")
    if "complex" not in spec:
        raise PresetError('a field cell needs a "complex"', path)
    cx = complex_from_spec(spec["complex"], path + ".complex")
    sheaf = FieldSheaf.from_spec(cx, spec.get("stalk", 1), spec.get("twist"), path)
    boundary = spec.get("boundary", "free")
    if boundary not in ("fixed", "free"):
        raise PresetError(f'must be "fixed" or "free", got {boundary!r}', path + ".boundary")
    cx.kept_vertices(boundary, path + ".boundary")
    holonomy = check_consistency(sheaf, spec.get("consistency", "refuse"), path + ".consistency")
    dynamics = spec.get("dynamics", "wave")
    if dynamics not in DYNAMICS:
        raise PresetError(f"must be one of {', '.join(DYNAMICS)}, got {dynamics!r}", path + ".dynamics")
    speed = _entry(spec, "speed", path, parameters, 0.0 if dynamics == "stiff" else None)
    loss = _entry(spec, "loss", path, parameters, 0.0)
    if dynamics == "diffusion" and "hf_loss" in spec:
        raise PresetError("hf_loss belongs to wave and stiff dynamics", path + ".hf_loss")
    hf = _entry(spec, "hf_loss", path, parameters, 0.0)
    if dynamics != "stiff" and "stiffness" in spec:
        raise PresetError('stiffness needs "dynamics": "stiff"', path + ".stiffness")
    stiffness = _entry(spec, "stiffness", path, parameters, None if dynamics == "stiff" else 0.0)
    tune = _parse_tune(spec.get("tune"), path + ".tune")
    if tune is not None and dynamics == "diffusion":
        raise PresetError("a diffusion field has no pitch to tune", path + ".tune")
    d = sheaf.stalk
    points = []
    for key, defaults in (("strike", DEFAULT_STRIKE), ("pickup", DEFAULT_PICKUP)):
        raw = spec.get(key)
        if raw is None:
            if cx.kind == "explicit":
                raise PresetError(f'a field on an explicit complex needs "{key}": {{"vertex": id}}', path)
            raw = defaults[cx.kind]
        points.append(parse_point(raw, f"{path}.{key}", cx, d, boundary, parameters))
    precision = spec.get("precision", "auto")
    if precision not in PRECISIONS:
        raise PresetError(f"must be one of {', '.join(PRECISIONS)}, got {precision!r}", path + ".precision")
    model = FieldModel(spec["id"], path, cx, sheaf, boundary, dynamics, speed, loss, hf, stiffness, tune,
                       [points[0]], [points[1]], {n: p.value for n, p in parameters.items()}, holonomy,
                       precision)
    for pt in points:
        _check_audible(model, pt)
    if tune is None:
        check_stability(model, parameters)
    return CellModel(spec["id"], "field", 1, 1, extra={"field": model})


def _check_audible(model: FieldModel, pt: Point) -> None:
    if not pt.parametric and not np.any(model.weights(pt)):
        raise PresetError("this point lies on the fixed rim: it never moves", pt.path)


# --------------------------------------------------------------------------
# stability

def _corners(symbols: list[str], parameters, path: str):
    if len(symbols) > MAX_CORNER_PARAMS:
        raise PresetError(f"the field's entries use {len(symbols)} parameters; at most "
                          f"{MAX_CORNER_PARAMS} can be checked corner by corner", path)
    if not symbols:
        yield {}
        return
    for combo in itertools.product(*[(parameters[s].lo, parameters[s].hi) for s in symbols]):
        yield dict(zip(symbols, combo))


def _corner_text(corner: dict, note: str | None) -> str:
    parts = ([note] if note else []) + [f"{k}={v:g}" for k, v in corner.items()]
    return "at " + ", ".join(parts) if parts else "at its fixed values"


def check_stability(model: FieldModel, parameters, k2_max: float = 1.0, note: str | None = None) -> None:
    """Refuse (PresetError naming the corner) a field that can blow up (module doc)."""
    try:
        _check_stability(model, parameters, k2_max, note, bound=True)
    except PresetError:
        _check_stability(model, parameters, k2_max, note, bound=False)


def _check_stability(model: FieldModel, parameters, k2_max: float, note: str | None, bound: bool) -> None:
    entries = {"speed": model.speed, "loss": model.loss, "hf_loss": model.hf_loss,
               "stiffness": model.stiffness}
    symbols = sorted({s for e in entries.values() for s in e.symbols})
    mu = model.mu_max(bound)
    smax = model.s_max(bound)
    p = model.path
    for corner in _corners(symbols, parameters, p):
        env = dict(model.defaults)
        env.update(corner)
        lam, sig, eta, beta = (f32(e.value(env)) for e in entries.values())
        where = _corner_text(corner, note)
        if sig < 0.0:
            raise PresetError(f"loss {sig:g} < 0 is a gain, unstable {where}", p + ".loss")
        if model.dynamics == "diffusion":
            q = lam * mu + sig
            if lam < 0.0:
                raise PresetError(f"a negative diffusion number {lam:g} is unstable {where}", p + ".speed")
            if q > 2.0 * (1.0 + STABILITY_RTOL):
                raise PresetError(f"unstable {where}: nu*mu_max + sigma = {q:.4g} > 2", p + ".speed")
            continue
        if eta < 0.0:
            raise PresetError(f"hf_loss {eta:g} < 0 is a gain, unstable {where}", p + ".hf_loss")
        parts = {"speed": k2_max * lam * lam * mu, "hf_loss": 2.0 * eta * mu,
                 "stiffness": k2_max * beta * beta * smax}
        q = sum(parts.values())
        if q > 4.0 * (1.0 + STABILITY_RTOL):
            worst = max(parts, key=parts.get)
            k = "k2*" if k2_max != 1.0 else ""
            if model.stiff or eta != 0.0:
                formula = f"({k}lambda^2 + 2 eta) mu_max + {k}beta^2 s_max"
            else:
                formula = f"{k}lambda^2 mu_max"
            raise PresetError(f"unstable {where}: {formula} = {q:.4g} > 4", f"{p}.{worst}")


# --------------------------------------------------------------------------
# ports made by wires with "at"

def _field_end(raw: str, index: Mapping[str, int], cells: list[CellModel]):
    name, _, port = raw.partition(".")
    ci = index.get(name)
    if ci is None or cells[ci].kind != "field":
        return None, port
    return ci, port


def attach_ports(cells: list[CellModel], index: Mapping[str, int], wires: list, parameters) -> dict:
    """Give every wire with ``at`` a port of its own on its field end.

    Replaces the field cells in ``cells`` (more ports) and returns
    ``{wire index: ("to" | "from", port)}``.
    """
    ports: dict[int, tuple[str, int]] = {}
    for i, w in enumerate(wires):
        if "at" not in w:
            continue
        path = f"wires[{i}]"
        src, sport = _field_end(str(w.get("from", "")), index, cells)
        dst, dport = _field_end(str(w.get("to", "")), index, cells)
        if src is None and dst is None:
            raise PresetError('"at" places a wire on a field; neither end of this wire is a field cell',
                              path + ".at")
        if src is not None and dst is not None:
            raise PresetError('both ends are fields, so "at" is ambiguous; route the wire through a gain '
                              'cell', path + ".at")
        role, ci, port = ("to", dst, dport) if dst is not None else ("from", src, sport)
        if port:
            raise PresetError(f'give either a port ("{w[role]}") or "at", not both', f"{path}.{role}")
        cell = cells[ci]
        model: FieldModel = cell.extra["field"]
        pt = parse_point(w["at"], path + ".at", model.complex, model.stalk, model.boundary, parameters)
        if role == "to":
            model = replace(model, inputs=model.inputs + [pt])
            new = replace(cell, n_in=cell.n_in + 1, extra={"field": model})
            ports[i] = ("to", cell.n_in)
        else:
            model = replace(model, outputs=model.outputs + [pt])
            new = replace(cell, n_out=cell.n_out + 1, extra={"field": model})
            ports[i] = ("from", cell.n_out)
        _check_audible(model, pt)
        cells[ci] = new
    return ports


# --------------------------------------------------------------------------
# display (engine.model.sheaf.NetworkSheaf.restriction_maps / parameter_dependence)

def field_symbols(cell: CellModel) -> set[str]:
    """Parameters a field cell's update and points depend on."""
    m: FieldModel = cell.extra["field"]
    out: set[str] = set()
    for e in (m.speed, m.loss, m.hf_loss, m.stiffness):
        out.update(e.symbols)
    for pt in m.inputs + m.outputs:
        out.update(pt.symbols)
    return out


def field_maps(cell: CellModel) -> list[dict]:
    """The field's restriction maps and update in words, for ``inspect``."""
    m: FieldModel = cell.extra["field"]
    cx = m.complex
    twisted = int(np.sum(np.any(np.abs(m.sheaf.tail_maps - np.eye(m.stalk)) > 0, axis=(1, 2))))
    rows = [{"cell": m.name, "map": "restriction maps",
             "form": f"R^{m.stalk} stalks on {cx.n_vertices} vertices and {cx.n_edges} edges of a "
                     f"{cx.kind} ({cx.wrap}); identity except {twisted} twisted edge(s); dim H^0 = {m.h0()}"},
            {"cell": m.name, "map": "state update",
             "form": f"{m.dynamics} step on {m.n_dof} DOFs, {m.boundary} boundary; speed {m.speed.describe()}, "
                     f"loss {m.loss.describe()}, hf_loss {m.hf_loss.describe()}, "
                     f"stiffness {m.stiffness.describe()}" + ("; tuned to the played note" if m.tune else "")}]
    for h in m.holonomy:
        rows.append({"cell": m.name, "map": "holonomy", "form": h.describe()})
    return rows

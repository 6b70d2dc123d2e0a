"""Field blocks of the step program: types, layout, lowering, update coefficients.

A field cell (engine.model.cells.field) lowers to a :class:`FieldProgram` attached
to its Block (``Block.field``, kind ``"field"``).  This module holds the
types and the rules the update obeys (the coefficient arithmetic below);
the three consumers of the step program read it:

* engine.backends.c.emitters.field prints the C update: a
  *stencil* over a padded array for regular generators whose restriction
  maps are identities except a scalar sign on the seam (grid none / torus /
  cylinder / mobius, path none / ring, stalk 1), and a *CSR* loop over the
  sheaf Laplacian (and bending operator) otherwise (explicit complexes,
  rotations, edge twists, stalk > 1);
* engine.backends.reference.field steps the same update with the sparse operators of
  engine.model.complexes in double precision (the one Python implementation);
* engine.analysis.assemble_field places states [u; u_prev] in the sparse closed-loop A.

Per sample a field behaves like a cell without feedthrough: step 2 reads
the pickups from u, step 4 gathers the strike inputs, step 5 advances
(u_prev, u) <- (u, u+) with u+ from the update formula of
engine.model.cells.field and adds the strike weights times the inputs.

Velocity form.  The kernel keeps u and v = u - u_prev (the same state as
[u; u_prev], the same update): written as ``2u - (1 - sigma) u_prev ...``
the float32 rounding of 2/(1 + sigma) alone detunes a low mode by a cent;
written as an increment every coefficient that sets a frequency is small
and exact to float32 precision.  Coefficients (kernel and reference round
them to float32 the same way), with lambda, sigma, eta, beta the field's
entries (float32), k2 the pitch factor and rho the release factor::

    den = 1 / (1 + sigma)
    cv = rho (1 - sigma) den,  cl = rho k2 lambda^2 den,  ce = rho eta den,
    cf = rho k2 beta^2 den,    cr = rho - 1
    v+ = cv v - L (cl u + ce v) - cf S u + cr u + b x;   u+ = u + v+     (wave, stiff)
    v+ = cd0 u - cd1 L u + b x;  u+ = u + v+,  cd0 = rho (1 - sigma) - 1,
                                               cd1 = rho k2 nu          (diffusion)

Substituting v = u - u_prev gives back the update of engine.model.cells.field
exactly; the assembly writes it for the states [u; u_prev].

Stencil layout: the active vertices (all of them, or the interior of a
fixed rim) sit in a row-major array padded by one ghost cell on every side
(width Ni + 2; a path has no ghost rows).  Each step fills the ghosts from
the active cells -- zero at a fixed rim, a mirror copy at a free edge (the
missing edge term vanishes), the opposite side times the seam sign on a
wrapped axis, and the opposite side of the flipped row across a Mobius
seam -- then runs the 5-point (3-point) Laplacian over contiguous rows.
:func:`stencil_operators` rebuilds the operators the stencil applies as
sparse matrices; the lowering checks them against the sheaf's own L and S
and falls back to CSR if they ever differ.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import scipy.sparse as sp

from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir.program import StepProgram, note_hz
from sheafsynth.engine.model.cells.field_model import FieldModel, Point, f32
from sheafsynth.engine.model.cells.field_stability import check_stability
from sheafsynth.engine.preset.affine import Affine

__all__ = [
    "DEFAULT_BEND", "DOUBLE_DOFS", "Stencil", "FieldProgram", "stencil_operators", "lower_field",
    "bend_range", "finish_fields", "k2_raw", "kappa2", "release_rho", "coefficients",
]

DEFAULT_BEND = 2.0      # semitones: MIDI's default pitch-bend range (MMA)
DOUBLE_DOFS = 512       # fields up to this many DOFs keep double-precision state in the kernel
# Fields with drift modes (z = 1: a free plate's translation, a free bar's rigid
# motions) keep double-precision state at any size: a z = 1 mode sums float32
# rounding without bound, which the reference (double) does not.


@dataclass(frozen=True)
class Stencil:
    """Padded-array description of a regular field (module doc).

    ``rule0`` / ``rule1`` are the ghost rules of axis 0 (rows; None for a
    path) and axis 1 (columns): "clamp", "mirror", "periodic" or "mobius";
    ``scale0`` / ``scale1`` the seam sign.  ``off0`` / ``off1`` are 1 where
    a fixed rim is cut off.  ``stiff_zero_ends``: a free path's bending pass
    (D2 u is zero at the two end vertices and outside).
    """

    dims: int
    rows: int
    cols: int
    rule0: str | None
    rule1: str
    scale0: float
    scale1: float
    off0: int
    off1: int
    stiff_zero_ends: bool = False

    @property
    def width(self) -> int:
        return self.cols + 2

    @property
    def size(self) -> int:
        return self.width * (self.rows + 2 if self.dims == 2 else 1)

    def index(self, r: int, c: int) -> int:
        return (r + 1) * self.width + c + 1 if self.dims == 2 else c + 1


@dataclass
class FieldProgram:
    """What the C generator, the reference and the assembly need for one field."""

    model: FieldModel
    layout: str                       # "stencil" or "csr"
    stencil: Stencil | None
    n_dof: int
    size: int                         # floats per state buffer in the kernel
    storage: np.ndarray               # kernel storage index of every kept DOF
    vertex_base: np.ndarray           # kernel storage index of each vertex's stalk, -1 if clamped
    L: sp.csr_matrix
    S: sp.csr_matrix | None
    speed: Affine
    loss: Affine
    hf_loss: Affine
    stiffness: Affine
    inputs: list[Point]
    outputs: list[Point]
    q1: float = 0.0
    p1: float = 0.0
    k2_max: float = 1.0
    release_power: float = 2.0
    ctype: str = "float"              # kernel element type of the state (double for small fields)
    _w: dict = field(default_factory=dict, repr=False)

    @property
    def dynamics(self) -> str:
        return self.model.dynamics

    @property
    def stalk(self) -> int:
        return self.model.stalk

    @property
    def tuned(self) -> bool:
        return self.model.tune is not None

    @property
    def uses_eta(self) -> bool:
        return self.dynamics != "diffusion" and not self.hf_loss.is_zero

    @property
    def uses_stiff(self) -> bool:
        return self.dynamics == "stiff" and not self.stiffness.is_zero

    def weights(self, point: Point, env: Mapping[str, float]) -> np.ndarray:
        return self.model.weights(point, env)

    def operator_matrix(self) -> sp.csr_matrix:
        """The Laplacian the kernel applies, rebuilt from its layout (kept-DOF order)."""
        if self.layout == "stencil" and self.stencil is not None:
            return stencil_operators(self.stencil)[0]
        return self.L


# --------------------------------------------------------------------------
# layout

def _seam_sign(model: FieldModel, axis: int) -> float | None:
    """The scalar sign on every seam edge of ``axis`` if the maps allow a stencil, else None."""
    cx, sh = model.complex, model.sheaf
    ids = np.flatnonzero(cx.seam == axis)
    if ids.size == 0:
        return 1.0
    heads = sh.head_maps[ids, 0, 0]
    tails = sh.tail_maps[ids, 0, 0]
    if not np.all(heads == 1.0):
        return None
    c = float(tails[0])
    if c not in (1.0, -1.0) or not np.all(tails == c):
        return None
    return c


def _grid_shape(model: FieldModel) -> tuple[int, ...]:
    """Shape of a generated (grid or path) complex; every generated complex has one."""
    shape = model.complex.shape
    if shape is None:
        raise BuildError("internal: a generated complex without a shape")
    return shape


def _stencil_for(model: FieldModel) -> Stencil | None:
    cx, sh = model.complex, model.sheaf
    if cx.kind not in ("grid", "path") or sh.stalk != 1 or cx.seam is None:
        return None
    plain = cx.seam < 0
    if not (np.all(sh.tail_maps[plain] == 1.0) and np.all(sh.head_maps[plain] == 1.0)):
        return None
    fixed = model.boundary == "fixed"
    open_rule = "clamp" if fixed else "mirror"
    off = 1 if fixed else 0
    if cx.kind == "path":
        n = _grid_shape(model)[0]
        ring = cx.wrapped[0]
        c = _seam_sign(model, 0)
        if c is None:
            return None
        o = 0 if ring else off
        st = Stencil(1, 1, n - 2 * o, None, "periodic" if ring else open_rule, 1.0, c, 0, o,
                     stiff_zero_ends=(not ring and not fixed))
    else:
        m, n = _grid_shape(model)
        w0, w1 = cx.wrapped
        c0 = _seam_sign(model, 0) if w0 else 1.0
        c1 = _seam_sign(model, 1) if w1 else 1.0
        if c0 is None or c1 is None:
            return None
        o0 = 0 if w0 else off
        o1 = 0 if w1 else off
        rule1 = ("mobius" if cx.wrap == "mobius" else "periodic") if w1 else open_rule
        st = Stencil(2, m - 2 * o0, n - 2 * o1, "periodic" if w0 else open_rule, rule1, c0, c1, o0, o1)
    if st.rows < 1 or st.cols < 1 or (st.stiff_zero_ends and st.cols < 3):
        return None
    return st


def _neighbours(st: Stencil, r: int, c: int):
    """Active neighbours (r2, c2, scale) the ghost rules resolve, one list per direction."""
    steps = [(0, -1), (0, 1)] + ([(-1, 0), (1, 0)] if st.dims == 2 else [])
    out = []
    for dr, dc in steps:
        r2, c2 = r + dr, c + dc
        if 0 <= r2 < st.rows and 0 <= c2 < st.cols:
            out.append([(r2, c2, 1.0)])
            continue
        rule, scale = (st.rule0, st.scale0) if not 0 <= r2 < st.rows else (st.rule1, st.scale1)
        if rule == "clamp":
            out.append([])
        elif rule == "mirror":
            out.append([(r, c, 1.0)])
        elif rule == "periodic":
            out.append([(r2 % st.rows, c2 % st.cols, scale)])
        else:                                    # mobius: across the axis-1 seam, flipped row
            out.append([(st.rows - 1 - r, c2 % st.cols, scale)])
    return out


def stencil_operators(st: Stencil) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """(L, S) the stencil applies, in active row-major order (= kept-DOF order)."""
    n = st.rows * st.cols
    rows, cols, vals = [], [], []
    for r in range(st.rows):
        for c in range(st.cols):
            i = r * st.cols + c
            rows.append(i); cols.append(i); vals.append(2.0 * st.dims)
            for nb in _neighbours(st, r, c):
                for r2, c2, s in nb:
                    rows.append(i); cols.append(r2 * st.cols + c2); vals.append(-s)
    lap = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
    if st.stiff_zero_ends:
        keep = np.ones(n)
        keep[[0, n - 1]] = 0.0
        zero_ghost = sp.diags([-np.ones(n - 1), 2.0 * np.ones(n), -np.ones(n - 1)], [-1, 0, 1])
        stiff = (zero_ghost @ sp.diags(keep) @ lap).tocsr()
    else:
        stiff = (lap @ lap).tocsr()
    return lap, stiff


def _close(a: sp.spmatrix, b: sp.spmatrix) -> bool:
    d = (sp.csr_matrix(a) - sp.csr_matrix(b))
    return d.nnz == 0 or float(abs(d).max()) <= 1e-12


def lower_field(cell) -> FieldProgram:
    """The field block's program (layout chosen, operators checked)."""
    model: FieldModel = cell.extra["field"]
    L = model.laplacian()
    S = model.stiffness_op()
    st = _stencil_for(model)
    if st is not None:
        lap_st, stiff_st = stencil_operators(st)
        if lap_st.shape != L.shape or not _close(lap_st, L) or (S is not None and not _close(stiff_st, S)):
            st = None
    cx = model.complex
    d = model.stalk
    kept = model.kept
    vbase = np.full(cx.n_vertices, -1, dtype=np.int64)
    if st is not None:
        storage = np.empty(kept.size, dtype=np.int64)
        if cx.kind == "path":
            ii, jj = np.zeros(kept.size, dtype=np.int64), kept
        else:
            ii, jj = np.divmod(kept, _grid_shape(model)[1])
        for k, (i, j) in enumerate(zip(ii, jj)):
            storage[k] = st.index(int(i) - st.off0, int(j) - st.off1)
        vbase[kept] = storage
        layout, size = "stencil", st.size
    else:
        storage = np.arange(kept.size * d, dtype=np.int64)
        vbase[kept] = np.arange(kept.size, dtype=np.int64) * d
        layout, size = "csr", kept.size * d
    return FieldProgram(model, layout, st, model.n_dof, int(size), storage, vbase, L, S,
                        model.speed, model.loss, model.hf_loss, model.stiffness,
                        list(model.inputs), list(model.outputs),
                        release_power=1.0 if model.dynamics == "diffusion" else 2.0,
                        ctype=_ctype(model))


def _ctype(model: FieldModel) -> str:
    if model.precision != "auto":
        return "double" if model.precision == "double" else "float"
    return "double" if model.n_dof <= DOUBLE_DOFS or model.has_drift() else "float"


def bend_range(preset) -> float:
    """Largest pitch-bend range (semitones) the preset declares (MIDI default 2)."""
    ranges = [c.range_semitones for c in preset.controls if c.source == "pitchbend"]
    return max(ranges) if ranges else DEFAULT_BEND


def finish_fields(prog: StepProgram, preset: Any) -> None:
    """Pitch constants and the tuned stability check (needs the sample rate)."""
    for b in prog.blocks:
        fp: FieldProgram | None = getattr(b, "field", None)
        if fp is None or not fp.tuned:
            continue
        fp.q1, fp.p1 = fp.model.tuned_mode()
        bend = bend_range(preset)
        top = prog.notes[1] + bend
        syms = sorted(set(fp.loss.symbols) | set(fp.hf_loss.symbols))
        k2 = 0.0
        for corner in itertools.product(*[(preset.parameters[s].lo, preset.parameters[s].hi) for s in syms]):
            env = {p.name: p.value for p in prog.params}
            env.update(zip(syms, corner))
            k2 = max(k2, k2_raw(fp, top, prog.rate, env))
        fp.k2_max = k2
        note = f"note {top:g} (highest playable {prog.notes[1]} + bend {bend:g}) at {prog.rate:g} Hz"
        check_stability(fp.model, preset.parameters, fp.k2_max, note)


def k2_raw(fp: FieldProgram, pitch: float, rate: float, env: Mapping[str, float]) -> float:
    """k2 putting the tuned mode's damped root at angle w = 2 pi f / fs.

    The mode (K-eigenvalue q, L-eigenvalue p1) has roots of
    (1+s) z^2 - (2 - q - e p1) z + (1 - s - e p1); z = r e^{jw} needs
    q = 2 - e p1 - 2 cos(w) sqrt((1+s)(1-s-e p1))  (lossless: 4 sin^2(w/2)).
    """
    t = fp.model.tune
    if t is None:
        raise BuildError("internal: k2_raw of an untuned field")
    f = note_hz(pitch) * t.ratio * 2.0 ** (t.cents / 1200.0)
    w = 2.0 * math.pi * f / rate
    sg = f32(fp.loss.value(env))
    et = f32(fp.hf_loss.value(env)) if fp.uses_eta else 0.0
    r2 = (1.0 + sg) * (1.0 - sg - et * fp.p1)
    q = 2.0 - et * fp.p1 - 2.0 * math.cos(w) * math.sqrt(r2) if r2 > 0.0 else 2.0 - 2.0 * math.cos(w)
    return max(q, 0.0) / fp.q1


def kappa2(fp: FieldProgram, pitch: float, rate: float, env: Mapping[str, float]) -> float:
    """The per-voice pitch factor k2 (float32), as the kernel's tuning computes it."""
    if not fp.tuned:
        return 1.0
    return f32(min(k2_raw(fp, pitch, rate, env), fp.k2_max))


def release_rho(fp: FieldProgram, period: float, decay: float) -> float:
    """Per-sample release factor (float32): decay^(2/P) (wave, stiff), decay^(1/P) (diffusion)."""
    return f32(decay ** (fp.release_power / period))


def coefficients(fp: FieldProgram, env: Mapping[str, float], k2: float, rho: float) -> dict:
    """Update coefficients (float32) exactly as the kernel computes them (module doc)."""
    lam = f32(fp.speed.value(env))
    sg = f32(fp.loss.value(env))
    if fp.dynamics == "diffusion":
        return {"cd0": f32(rho * (1.0 - sg) - 1.0), "cd1": f32(rho * k2 * lam)}
    et = f32(fp.hf_loss.value(env)) if fp.uses_eta else 0.0
    bt = f32(fp.stiffness.value(env)) if fp.uses_stiff else 0.0
    den = 1.0 / (1.0 + sg)
    return {"cv": f32(rho * (1.0 - sg) * den), "cl": f32(rho * k2 * lam * lam * den),
            "ce": f32(rho * et * den), "cf": f32(rho * k2 * bt * bt * den), "cr": f32(rho - 1.0)}

"""The sheaf on a cell complex: stalks, twisted restriction maps, coboundary, Laplacian, H^0.

A ``field`` cell carries a cellular sheaf with stalk R^d on every vertex and
edge of its complex (:mod:`.complexes`).  This module parses the twist,
builds the coboundary delta, the sheaf Laplacian L = delta^T delta and the
bending operator S, counts dim H^0 and checks consistency around faces.

``stalk`` -- d >= 1 (int).

``twist`` -- restriction maps are identity unless twisted.  A twist T on edge
e = i -> j sets F_{i<e} = T, F_{j<e} = I, so a section is carried across e
by x_j = T x_i.  One spec or a list of specs (applied in order, composing):

* ``{"seam": -1}`` / ``{"seam": 1}``: sign on every seam edge;
* ``{"seam": {"rotate": 90}}``: rotation by degrees (d = 2 only);
* ``{"seam": {"matrix": [[...]]}}``: any invertible d x d matrix;
* ``"axis": 0|1`` inside a seam spec picks one seam of a torus;
* ``{"edges": [3, 7], "sign": -1}`` / ``{"edges": [...], "rotate": 45}`` /
  ``{"edges": [...], "matrix": [[...]]}``: the same on chosen edges.

``mobius`` carries ``{"seam": -1}`` by default (the twisted line field); a
seam spec given in ``twist`` replaces that default (``{"seam": 1}`` removes
it).  cylinder/torus/ring seams are identity unless twisted.

``consistency`` (explicit 2-complexes) -- ``"refuse"`` (default) or
``"report"``: see :func:`check_consistency`.

Stiffness (the bending energy |D2 u|^2 -> S = D2^T D2)
------------------------------------------------------
Path: D2 is the second difference at every vertex with two neighbours on
the line, carried through the sheaf: for a -e1- k -e2- b,
(D2 x)_k = F_{b<e2} x_b - 2 F_{k<e2} x_k + F_{k<e2} F_{k<e1}^-1 F_{a<e1} x_a
(x_b - 2x_k + x_a for identity maps; S = L^2 on a ring with orthogonal
maps).  Free ends: Bilbao's ghost-point free conditions (D_xx u = 0 and
D_x. D_xx u = 0 at the end node) give the operator W^-1 D2^T D2 with
W = diag(1/2, 1, ..., 1, 1/2); we use the symmetric D2^T D2 (end mass 1
instead of 1/2), which keeps one inner product for L and S (needed by the
update and its energy) and gives the same free-free bar to O(h).  Fixed
ends: clamped vertices removed from D2^T D2 (u = 0 and D_xx u = 0, simply
supported).  Grids and explicit complexes: S = L_b^2 with L_b the
boundary-treated Laplacian (isotropic discrete biharmonic; fixed rim =
simply supported plate; free rim also penalises edge slope, it is not the
Kirchhoff free plate).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import scipy.sparse as sp

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.complexes import CellComplex, check_boundary, complex_from_spec
from sheafsynth.engine.model.dense import DENSE_MAX
from sheafsynth.engine.model.json_checks import index_arg, int_at_least, is_int, is_num, no_extra_keys
from sheafsynth.engine.model.spectra import gershgorin_bound, lowest_eigenvalues

__all__ = ["CONSISTENCY", "FaceHolonomy", "FieldSheaf", "field_sheaf_from_cell", "check_consistency",
           "seam_scale"]

CONSISTENCY = ("refuse", "report")



def _twist_matrix(spec, d: int, path: str) -> np.ndarray:
    """The d x d matrix of a sign / rotate / matrix spec (bare number = sign)."""
    if is_num(spec):
        spec = {"sign": spec}
    if not isinstance(spec, dict):
        raise PresetError(f"expected a sign or {{\"rotate\"|\"sign\"|\"matrix\": ...}}, got {spec!r}",
                          path)
    keys = [k for k in ("sign", "rotate", "matrix") if k in spec]
    if len(keys) != 1:
        raise PresetError("needs exactly one of \"sign\", \"rotate\" or \"matrix\"", path)
    key = keys[0]
    val = spec[key]
    p = f"{path}.{key}" if path else key
    if key == "sign":
        if not is_num(val) or float(val) not in (1.0, -1.0):
            raise PresetError(f"a sign is 1 or -1, got {val!r}", p)
        return float(val) * np.eye(d)
    if key == "rotate":
        if d != 2:
            raise PresetError(f"a rotation needs stalk dimension 2, this field has {d}", p)
        if not is_num(val):
            raise PresetError(f"rotation angle in degrees must be a number, got {val!r}", p)
        a = math.radians(float(val))
        return np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    if (not isinstance(val, list) or len(val) != d
            or any(not isinstance(r, list) or len(r) != d for r in val)):
        raise PresetError(f"must be a {d} x {d} list of rows", p)
    for r, row in enumerate(val):
        for c, x in enumerate(row):
            if not is_num(x):
                raise PresetError(f"must be a number, got {x!r}", f"{p}[{r}][{c}]")
    mat = np.array(val, dtype=float)
    if np.linalg.cond(mat) > 1e12:
        raise PresetError("restriction map must be invertible", p)
    return mat


def _parse_twist(twist, cx: CellComplex, d: int, path: str):
    """List of (edge ids, matrix) and whether a seam spec was given."""
    if twist is None:
        return [], False
    specs = twist if isinstance(twist, list) else [twist]
    out, seam_given = [], False
    for k, spec in enumerate(specs):
        p = f"{path}[{k}]" if isinstance(twist, list) else path
        if not isinstance(spec, dict):
            raise PresetError(f"a twist is an object, got {spec!r}", p)
        if ("seam" in spec) == ("edges" in spec):
            raise PresetError("a twist needs exactly one of \"seam\" or \"edges\"", p)
        if "seam" in spec:
            no_extra_keys(spec, ("seam", "axis"), p)
            seam = cx.seam if cx.seam is not None else np.full(cx.n_edges, -1)
            if not np.any(seam >= 0):
                raise PresetError(f"this complex ({cx.kind}, wrap {cx.wrap!r}) has no seam",
                                  f"{p}.seam")
            if "axis" in spec:
                ax = spec["axis"]
                if not is_int(ax) or not np.any(seam == ax):
                    axes = sorted({int(a) for a in seam if a >= 0})
                    raise PresetError(f"no seam on axis {ax!r} (seams: {axes})", f"{p}.axis")
                ids = np.flatnonzero(seam == ax)
            else:
                ids = np.flatnonzero(seam >= 0)
            out.append((ids, _twist_matrix(spec["seam"], d, f"{p}.seam")))
            seam_given = True
        else:
            ids_raw = spec["edges"]
            if not isinstance(ids_raw, list) or not ids_raw:
                raise PresetError("must be a non-empty list of edge ids", f"{p}.edges")
            ids = np.array([index_arg(x, cx.n_edges, f"{p}.edges[{q}]", "edge")
                            for q, x in enumerate(ids_raw)])
            no_extra_keys(spec, ("edges", "sign", "rotate", "matrix"), p)
            mat_spec = {key: spec[key] for key in ("sign", "rotate", "matrix") if key in spec}
            out.append((ids, _twist_matrix(mat_spec, d, p)))
    return out, seam_given



@dataclass
class FaceHolonomy:
    """A face whose transport around the loop is not the identity."""

    face: int
    edges: tuple[int, ...]
    vertices: tuple[int, ...]
    holonomy: np.ndarray
    deviation: float          # Frobenius norm of holonomy - I

    def describe(self) -> str:
        loop = "->".join(str(v) for v in self.vertices + self.vertices[:1])
        return (f"face {self.face} (edges {', '.join(map(str, self.edges))}; vertices {loop}): "
                f"holonomy differs from I by {self.deviation:.3g}")


@dataclass
class FieldSheaf:
    """Stalk R^d on every cell of ``complex`` with restriction maps per edge.

    ``tail_maps[e]`` is F_{i<e}, ``head_maps[e]`` is F_{j<e} for e = i -> j
    (both E x d x d).  Operators act on stacked vertex stalks, DOF v*d + a.
    """

    complex: CellComplex
    stalk: int
    tail_maps: np.ndarray
    head_maps: np.ndarray

    # ---- construction
    @classmethod
    def from_spec(cls, cx: CellComplex, stalk=1, twist=None, path: str = "") -> "FieldSheaf":
        """Sheaf with identity maps, then ``twist`` (module doc) applied."""
        sp_path = f"{path}.stalk" if path else "stalk"
        tw_path = f"{path}.twist" if path else "twist"
        d = int_at_least(stalk, 1, sp_path, "stalk dimension")
        tail = np.tile(np.eye(d), (cx.n_edges, 1, 1))
        head = np.tile(np.eye(d), (cx.n_edges, 1, 1))
        twists, seam_given = _parse_twist(twist, cx, d, tw_path)
        if cx.wrap == "mobius" and not seam_given:
            twists.insert(0, (np.flatnonzero(cx.seam == 1), -np.eye(d)))
        for ids, mat in twists:
            tail[ids] = mat @ tail[ids]
        return cls(cx, d, tail, head)

    # ---- maps
    def restriction(self, v: int, e: int) -> np.ndarray:
        """F_{v<e} for an endpoint v of edge e."""
        t, h = self.complex.edges[e]
        if v == t:
            return self.tail_maps[e]
        if v == h:
            return self.head_maps[e]
        raise ValueError(f"vertex {v} is not an end of edge {e}")

    def transport(self, e: int) -> np.ndarray:
        """Map carrying a section from tail to head of e: F_{j<e}^-1 F_{i<e}."""
        return np.linalg.solve(self.head_maps[e], self.tail_maps[e])

    def holonomy(self, edges: Sequence[int], signs: Sequence[int]) -> np.ndarray:
        """Composition of transports around a closed walk (+1 along, -1 against).

        ValueError if the edges do not form a closed walk in that order.
        """
        ed = self.complex.edges
        ends = [(ed[e][0], ed[e][1]) if s > 0 else (ed[e][1], ed[e][0])
                for e, s in zip(edges, signs)]
        if not ends or any(a[1] != b[0] for a, b in zip(ends, ends[1:] + ends[:1])):
            raise ValueError("edges and signs do not form a closed walk")
        hol = np.eye(self.stalk)
        for e, s in zip(edges, signs):
            p = self.transport(e)
            hol = (p if s > 0 else np.linalg.inv(p)) @ hol
        return hol

    def face_holonomies(self, tol: float = 1e-9) -> list[FaceHolonomy]:
        """Faces whose holonomy differs from I by more than ``tol`` (Frobenius)."""
        bad = []
        for k, f in enumerate(self.complex.faces):
            hol = self.holonomy(f.edges, f.signs)
            dev = float(np.linalg.norm(hol - np.eye(self.stalk)))
            if dev > tol:
                bad.append(FaceHolonomy(k, f.edges, f.vertices, hol, dev))
        return bad

    # ---- operators
    @property
    def n_dofs(self) -> int:
        return self.complex.n_vertices * self.stalk

    def dofs(self, boundary: str = "free", path: str = "boundary") -> np.ndarray:
        """DOF indices (v*d + a) kept under ``boundary``."""
        kept = self.complex.kept_vertices(boundary, path)
        d = self.stalk
        return (kept[:, None] * d + np.arange(d)[None, :]).ravel()

    def coboundary(self) -> sp.csr_matrix:
        """delta, (E d) x (V d): (delta x)_e = F_{j<e} x_j - F_{i<e} x_i."""
        d, ed = self.stalk, self.complex.edges
        ne = self.complex.n_edges
        a = np.arange(d)
        shape = (ne, d, d)                      # [edge, row in e-stalk, col in v-stalk]
        rows = np.broadcast_to(np.arange(ne)[:, None, None] * d + a[None, :, None], shape)
        cols_h = np.broadcast_to(ed[:, 1][:, None, None] * d + a[None, None, :], shape)
        cols_t = np.broadcast_to(ed[:, 0][:, None, None] * d + a[None, None, :], shape)
        r = np.concatenate([rows.ravel(), rows.ravel()])
        c = np.concatenate([cols_h.ravel(), cols_t.ravel()])
        v = np.concatenate([self.head_maps.ravel(), -self.tail_maps.ravel()])
        return sp.csr_matrix((v, (r, c)), shape=(ne * d, self.n_dofs))

    def laplacian(self, boundary: str = "free", path: str = "boundary") -> sp.csr_matrix:
        """Sheaf Laplacian delta^T delta; "fixed" keeps only unclamped DOFs."""
        check_boundary(boundary, path)
        dl = self.coboundary()
        lap = (dl.T @ dl).tocsr()
        if boundary == "free":
            return lap
        keep = self.dofs(boundary, path)
        return lap[keep][:, keep].tocsr()

    def second_difference(self) -> sp.csr_matrix:
        """Sheaf-transported D2 of a path (rows: interior vertices' e2 stalks)."""
        cx = self.complex
        if cx.kind != "path":
            raise ValueError("second_difference is defined for path complexes")
        n, d = cx.n_vertices, self.stalk
        ring = cx.wrap == "ring"
        rows, cols, vals = [], [], []
        r = 0
        for k in range(n):
            e1 = k - 1 if k >= 1 else (n - 1 if ring else None)
            e2 = k if k <= n - 2 else (n - 1 if ring else None)
            if e1 is None or e2 is None:
                continue
            a = int(cx.edges[e1][0] if cx.edges[e1][1] == k else cx.edges[e1][1])
            b = int(cx.edges[e2][1] if cx.edges[e2][0] == k else cx.edges[e2][0])
            fk2 = self.restriction(k, e2)
            blocks = ((b, self.restriction(b, e2)), (k, -2.0 * fk2),
                      (a, fk2 @ np.linalg.solve(self.restriction(k, e1), self.restriction(a, e1))))
            for v, blk in blocks:
                for i in range(d):
                    for j in range(d):
                        rows.append(r * d + i); cols.append(v * d + j); vals.append(blk[i, j])
            r += 1
        return sp.csr_matrix((vals, (rows, cols)), shape=(r * d, self.n_dofs))

    def stiffness(self, boundary: str = "free", path: str = "boundary") -> sp.csr_matrix:
        """Bending operator S (module doc): D2^T D2 on paths, L_b^2 otherwise."""
        if self.complex.kind == "path":
            d2 = self.second_difference()
            s = (d2.T @ d2).tocsr()
            if check_boundary(boundary, path) == "free":
                return s
            keep = self.dofs(boundary, path)
            return s[keep][:, keep].tocsr()
        lap = self.laplacian(boundary, path)
        return (lap @ lap).tocsr()

    # ---- spectra
    def h0_dim(self, boundary: str = "free", tol: float | None = None,
               path: str = "boundary") -> int:
        """dim H^0 = dim ker delta (with "fixed": drift modes left after clamping).

        Counts eigenvalues of L below ``tol`` (default 1e-9 * max(1, bound)).
        """
        lap = self.laplacian(boundary, path)
        if tol is None:
            tol = 1e-9 * max(1.0, gershgorin_bound(lap))
        n = lap.shape[0]
        if n <= DENSE_MAX:
            return int(np.sum(np.linalg.eigvalsh(lap.toarray()) < tol))
        k = min(8, n - 2)
        while True:
            ev = lowest_eigenvalues(lap, k)
            count = int(np.sum(ev < tol))
            if count < k or k >= n - 2:
                return count
            k = min(2 * k, n - 2)


def field_sheaf_from_cell(cell: dict, path: str) -> FieldSheaf:
    """FieldSheaf from a field cell's ``complex``, ``stalk`` and ``twist`` keys."""
    if "complex" not in cell:
        raise PresetError("a field cell needs a \"complex\"", path)
    cx = complex_from_spec(cell["complex"], f"{path}.complex")
    return FieldSheaf.from_spec(cx, cell.get("stalk", 1), cell.get("twist"), path)


def check_consistency(sheaf: FieldSheaf, policy: str = "refuse", path: str = "consistency",
                      tol: float = 1e-9) -> list[FaceHolonomy]:
    """Refuse (PresetError listing faces) or return the inconsistent faces."""
    if policy not in CONSISTENCY:
        raise PresetError(f"must be \"refuse\" or \"report\", got {policy!r}", path)
    bad = sheaf.face_holonomies(tol)
    if bad and policy == "refuse":
        shown = "; ".join(b.describe() for b in bad[:5])
        more = f" (and {len(bad) - 5} more)" if len(bad) > 5 else ""
        raise PresetError(f"restriction maps are inconsistent around {len(bad)} face(s): "
                          f"{shown}{more}; set \"consistency\": \"report\" to accept", path)
    return bad


def seam_scale(sheaf: FieldSheaf | None, e: int) -> float:
    """Weight factor for a point read across seam edge ``e``: 1/c if its transport is c*I, else 1.

    Positions (:mod:`.positions`) and the C emitter of strike and pickup
    stencils multiply the far vertex's weight by it, so a value read across a
    sign-twisted seam stays continuous; rotation seams get no correction.
    ``sheaf=None`` (no twist known) gives 1.
    """
    if sheaf is None:
        return 1.0
    t = sheaf.transport(e)
    c = t[0, 0]
    if abs(c) > 1e-12 and np.allclose(t, c * np.eye(sheaf.stalk)):
        return 1.0 / c
    return 1.0

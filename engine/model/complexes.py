"""Cell complexes and field sheaves: the geometry behind ``field`` cells.

A ``field`` cell is a cellular sheaf with stalk R^d on every vertex and edge
of a 1- or 2-complex.  Its coboundary delta and sheaf Laplacian L = delta^T
delta drive a wave (leapfrog), stiff (leapfrog + bending) or diffusion update.
Pure numpy/scipy; nothing here generates C.

JSON shapes (keys of a field cell; ``path`` arguments name them in errors)
-------------------------------------------------------------------------
``complex`` -- exactly one generator:

* ``{"grid": [M, N], "wrap": "none"|"torus"|"cylinder"|"mobius"}``: vertex
  (m, n) has id ``m*N + n``; axis 0 has M vertices, axis 1 has N.  cylinder
  and mobius wrap axis 1 (the seam joins column N-1 to column 0; mobius
  joins row m to row M-1-m), torus wraps both.  M, N >= 2.
* ``{"path": N, "wrap": "none"|"ring"}``: vertices 0..N-1, N >= 2.
* ``{"vertices": V, "edges": [[i, j], ...], "faces": [[e1, e2, e3, ...], ...],
  "rim": [v, ...]}``: edge k is oriented i -> j (i != j, parallel edges
  allowed); each face lists distinct edge ids in loop order and must close
  into a loop; ``faces`` and ``rim`` are optional.  Without ``rim`` the
  boundary is: vertices of edges lying on exactly one face, and vertices of
  degree <= 1.

Generator edge order (for ``twist.edges``): path edge k = k -> k+1, ring adds
edge N-1 = N-1 -> 0 (the seam).  Grid: first axis-1 edges (m,n)->(m,n+1) in
row-major order, then the axis-1 seam edges (m,N-1)->(m,0) (mobius:
->(M-1-m,0)) for m = 0..M-1, then axis-0 edges (m,n)->(m+1,n) row-major,
then the axis-0 seam edges (M-1,n)->(0,n) (torus only).  ``CellComplex.seam``
tells which edges are seam edges and of which axis.

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

``boundary`` -- ``"fixed"``: boundary (rim) vertices are clamped to 0 and
removed from the state (Dirichlet; a bar is then simply supported);
``"free"``: all vertices stay (Neumann-like).

``consistency`` (explicit 2-complexes) -- ``"refuse"`` (default) or
``"report"``: see :func:`check_consistency`.

positions (``strike.at`` / ``pickup.at``) -- a path takes a fraction p in
[0, 1] (or ``[p]``), a grid ``[p0, p1]`` (fractions along axis 0, axis 1),
any complex ``{"vertex": id}``.  Open axis: x = p*(n-1); wrapped axis:
x = p*n mod n.  Weights interpolate linearly between the two neighbouring
vertices of a path, bilinearly between the four of a grid cell, so moving p
moves the point smoothly (weights sum to 1).  Across a seam whose transport
is a scalar c*I (sign twists) the far vertex gets weight / c, so the read
value stays continuous; across rotation seams no transport is applied.

Update formulas (one formula for the C generator and the NumPy reference)
-------------------------------------------------------------------------
T = 1/fs.  L = boundary-treated sheaf Laplacian, S = stiffness operator
(:meth:`FieldSheaf.stiffness`), lam = Courant number, beta = stiffness
number (kappa*T/h^2), sigma = frequency-independent loss per sample
(sigma = sigma0*T), eta = frequency-dependent loss per sample
(eta = 2*sigma1*T/h^2), nu = diffusion number.

wave / stiff (leapfrog; stiff has beta > 0, wave beta = 0)::

    w   = (lam^2 + eta) * u - eta * u_prev
    u+  = (2 u - (1 - sigma) u_prev - L w - beta^2 S u) / (1 + sigma)

This is Bilbao 2009's damped scheme  (u+ - 2u + u-) = -lam^2 L u -
beta^2 S u - sigma (u+ - u-) - eta L (u - u-).  Mode by mode (L, S sharing
an eigenvector with L-eigenvalue p and K = lam^2 L + beta^2 S eigenvalue q):
(1+sigma) z^2 - (2 - q - eta p) z + (1 - sigma - eta p) = 0.  The Jury
conditions give  q >= 0,  q + 2 eta p <= 4,  eta p <= 2: sigma >= 0 never
changes the bound, eta tightens it.  Without shared eigenvectors the same
follows from the discrete energy with mass I - (eta/2) L:  stable iff
mu_max(lam^2 L + beta^2 S + 2 eta L) <= 4, implied by
(lam^2 + 2 eta) mu_max(L) + beta^2 mu_max(S) <= 4 (:func:`stable`).

diffusion (explicit Euler)::

    u+  = (1 - sigma) u - nu L u          stable iff nu*mu_max + sigma <= 2

(no overshoot iff nu*mu_max + sigma <= 1).

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
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from sheafsynth.engine.errors import PresetError

__all__ = [
    "Face", "CellComplex", "FaceHolonomy", "FieldSheaf",
    "complex_from_spec", "grid_complex", "path_complex", "explicit_complex",
    "field_sheaf_from_cell", "check_boundary", "check_consistency",
    "position_weights", "gershgorin_bound", "operator_mu_max",
    "lowest_eigenvalues", "mode_frequency", "mode_response", "stable",
    "diffusion_stable", "leapfrog_step", "diffusion_step",
    "GRID_WRAPS", "PATH_WRAPS", "BOUNDARIES",
]

GRID_WRAPS = ("none", "torus", "cylinder", "mobius")
PATH_WRAPS = ("none", "ring")
BOUNDARIES = ("fixed", "free")
CONSISTENCY = ("refuse", "report")

DENSE_LIMIT = 600        # DOFs up to which spectra are computed densely
STABILITY_RTOL = 1e-12   # relative slack in the <= 4 tests (rounding only)
MAX_VERTICES = 16384     # per complex: bounds load time and per-voice state (128 x 128 grid)


# --------------------------------------------------------------------------
# JSON helpers

def _is_int(x) -> bool:
    return isinstance(x, (int, np.integer)) and not isinstance(x, bool)


def _is_num(x) -> bool:
    return (isinstance(x, (int, float, np.integer, np.floating))
            and not isinstance(x, bool) and math.isfinite(float(x)))


def _int_at_least(x, low: int, path: str, what: str) -> int:
    if not _is_int(x):
        raise PresetError(f"{what} must be an integer, got {x!r}", path)
    if x < low:
        raise PresetError(f"{what} must be at least {low}, got {x}", path)
    return int(x)


def _vertex_cap(nv: int, path: str) -> None:
    if nv > MAX_VERTICES:
        raise PresetError(f"{nv} vertices; a field has at most {MAX_VERTICES}", path)


def _index(x, n: int, path: str, what: str) -> int:
    if not _is_int(x):
        raise PresetError(f"{what} must be an integer, got {x!r}", path)
    if not 0 <= x < n:
        raise PresetError(f"{what} {x} out of range 0..{n - 1}", path)
    return int(x)


def _no_extra_keys(spec: dict, allowed: Sequence[str], path: str) -> None:
    for key in spec:
        if key not in allowed:
            raise PresetError(
                f"unknown key {key!r} (expected one of {', '.join(allowed)})",
                f"{path}.{key}")


# --------------------------------------------------------------------------
# Complexes

@dataclass(frozen=True)
class Face:
    """A 2-cell: edge ids in loop order with orientation signs.

    ``signs[k]`` is +1 if the loop runs along edge ``edges[k]`` (tail to
    head), -1 against it; ``vertices[k]`` is where step k starts.
    """

    edges: tuple[int, ...]
    signs: tuple[int, ...]
    vertices: tuple[int, ...]


@dataclass
class CellComplex:
    """A 1- or 2-complex with the metadata later stages need.

    ``edges`` is E x 2 (tail, head).  ``kind`` is "grid", "path" or
    "explicit"; ``shape`` (M, N) or (N,) and ``wrap`` describe generators
    (for stencil code); ``wrapped`` flags the periodic axes.  ``coords`` are
    vertex positions as fractions along each axis (None for explicit);
    ``boundary`` marks rim vertices; ``seam[e]`` is the wrapped axis of a
    seam edge or -1; ``edge_axis[e]`` the axis an edge runs along (-1 for
    explicit).
    """

    n_vertices: int
    edges: np.ndarray
    faces: list[Face] = field(default_factory=list)
    kind: str = "explicit"
    shape: tuple[int, ...] | None = None
    wrap: str = "none"
    wrapped: tuple[bool, ...] = ()
    coords: np.ndarray | None = None
    boundary: np.ndarray | None = None
    seam: np.ndarray | None = None
    edge_axis: np.ndarray | None = None

    @property
    def n_edges(self) -> int:
        return int(self.edges.shape[0])

    @property
    def dimension(self) -> int:
        """1 for a graph, 2 when the complex has faces."""
        return 2 if self.faces else 1

    def degree(self) -> np.ndarray:
        deg = np.zeros(self.n_vertices, dtype=int)
        np.add.at(deg, self.edges.ravel(), 1)
        return deg

    def kept_vertices(self, boundary: str = "free", path: str = "boundary") -> np.ndarray:
        """Vertex ids that stay in the state under ``boundary``."""
        check_boundary(boundary, path)
        if boundary == "free":
            return np.arange(self.n_vertices)
        kept = np.flatnonzero(~self.boundary)
        if kept.size == 0:
            raise PresetError("boundary \"fixed\" clamps every vertex; no state is left", path)
        return kept


def check_boundary(boundary, path: str = "boundary") -> str:
    """Validate a ``boundary`` value ("fixed" or "free")."""
    if boundary not in BOUNDARIES:
        raise PresetError(f"must be \"fixed\" or \"free\", got {boundary!r}", path)
    return boundary


def _orient_loop(edges: np.ndarray, loop: Sequence[int]):
    """Signs and start vertices making ``loop`` a closed walk, or None."""
    for first_sign in (1, -1):
        t, h = edges[loop[0]]
        start, cur = (t, h) if first_sign == 1 else (h, t)
        signs, verts = [first_sign], [start]
        ok = True
        for e in loop[1:]:
            a, b = edges[e]
            verts.append(cur)
            if a == cur:
                signs.append(1)
                cur = b
            elif b == cur:
                signs.append(-1)
                cur = a
            else:
                ok = False
                break
        if ok and cur == start:
            return tuple(signs), tuple(int(v) for v in verts)
    return None


def _make_face(edges: np.ndarray, loop: Sequence[int], path: str) -> Face:
    oriented = _orient_loop(edges, loop)
    if oriented is None:
        shown = ", ".join(f"{e}={list(map(int, edges[e]))}" for e in loop)
        raise PresetError(f"edges {shown} do not close into a loop", path)
    signs, verts = oriented
    return Face(tuple(int(e) for e in loop), signs, verts)


def path_complex(n: int, wrap: str = "none", path: str = "complex") -> CellComplex:
    """Path of ``n`` vertices (``wrap="ring"`` closes it with seam edge n-1)."""
    n = _int_at_least(n, 2, f"{path}.path", "path length")
    _vertex_cap(n, f"{path}.path")
    if wrap not in PATH_WRAPS:
        raise PresetError(f"must be one of {', '.join(PATH_WRAPS)} for a path, got {wrap!r}",
                          f"{path}.wrap")
    ring = wrap == "ring"
    edges = [(k, k + 1) for k in range(n - 1)]
    if ring:
        edges.append((n - 1, 0))
    e = np.array(edges, dtype=np.int64)
    seam = np.full(len(edges), -1)
    if ring:
        seam[-1] = 0
    boundary = np.zeros(n, dtype=bool)
    if not ring:
        boundary[[0, n - 1]] = True
    coords = (np.arange(n) / (n if ring else n - 1))[:, None]
    return CellComplex(n, e, [], "path", (n,), wrap, (ring,), coords, boundary,
                       seam, np.zeros(len(edges), dtype=int))


def grid_complex(m: int, n: int, wrap: str = "none", path: str = "complex") -> CellComplex:
    """M x N grid, vertex (i, j) = i*N + j, with square faces (see module doc)."""
    m = _int_at_least(m, 2, f"{path}.grid[0]", "grid size")
    n = _int_at_least(n, 2, f"{path}.grid[1]", "grid size")
    _vertex_cap(m * n, f"{path}.grid")
    if wrap not in GRID_WRAPS:
        raise PresetError(f"must be one of {', '.join(GRID_WRAPS)} for a grid, got {wrap!r}",
                          f"{path}.wrap")
    wrap0 = wrap == "torus"
    wrap1 = wrap in ("torus", "cylinder", "mobius")
    vid = lambda i, j: i * n + j  # noqa: E731
    edges, seam, axis = [], [], []
    h, v = {}, {}                   # (i, j) -> edge id leaving (i, j) along axis 1 / 0
    for i in range(m):
        for j in range(n - 1):
            h[i, j] = len(edges)
            edges.append((vid(i, j), vid(i, j + 1))); seam.append(-1); axis.append(1)
    if wrap1:
        for i in range(m):
            h[i, n - 1] = len(edges)
            far = m - 1 - i if wrap == "mobius" else i
            edges.append((vid(i, n - 1), vid(far, 0))); seam.append(1); axis.append(1)
    for i in range(m - 1):
        for j in range(n):
            v[i, j] = len(edges)
            edges.append((vid(i, j), vid(i + 1, j))); seam.append(-1); axis.append(0)
    if wrap0:
        for j in range(n):
            v[m - 1, j] = len(edges)
            edges.append((vid(m - 1, j), vid(0, j))); seam.append(0); axis.append(0)
    e = np.array(edges, dtype=np.int64)

    faces = []
    for i in range(m if wrap0 else m - 1):
        for j in range(n if wrap1 else n - 1):
            i1 = (i + 1) % m
            if j == n - 1 and wrap == "mobius":
                # seam square: rows i, i+1 at column N-1 meet rows M-1-i, M-2-i at column 0
                loop = [h[i, j], v[m - 2 - i, 0], h[i + 1, j], v[i, j]]
            else:
                j1 = (j + 1) % n
                loop = [h[i, j], v[i, j1], h[i1, j], v[i, j]]
            faces.append(_make_face(e, loop, f"{path}.grid"))

    ii, jj = np.divmod(np.arange(m * n), n)
    coords = np.column_stack([ii / (m if wrap0 else m - 1), jj / (n if wrap1 else n - 1)])
    boundary = np.zeros(m * n, dtype=bool)
    if not wrap0:
        boundary |= (ii == 0) | (ii == m - 1)
    if not wrap1:
        boundary |= (jj == 0) | (jj == n - 1)
    return CellComplex(m * n, e, faces, "grid", (m, n), wrap, (wrap0, wrap1), coords,
                       boundary, np.array(seam), np.array(axis))


def explicit_complex(spec: dict, path: str = "complex") -> CellComplex:
    """Complex from ``{"vertices": V, "edges": [...], "faces": [...], "rim": [...]}``."""
    _no_extra_keys(spec, ("vertices", "edges", "faces", "rim"), path)
    nv = _int_at_least(spec["vertices"], 2, f"{path}.vertices", "vertex count")
    _vertex_cap(nv, f"{path}.vertices")
    raw_edges = spec.get("edges")
    if not isinstance(raw_edges, list) or not raw_edges:
        raise PresetError("must be a non-empty list of [i, j] pairs", f"{path}.edges")
    edges = []
    for k, pair in enumerate(raw_edges):
        p = f"{path}.edges[{k}]"
        if not isinstance(pair, list) or len(pair) != 2:
            raise PresetError(f"an edge is a pair [i, j], got {pair!r}", p)
        i = _index(pair[0], nv, f"{p}[0]", "vertex")
        j = _index(pair[1], nv, f"{p}[1]", "vertex")
        if i == j:
            raise PresetError(f"edge joins vertex {i} to itself", p)
        edges.append((i, j))
    e = np.array(edges, dtype=np.int64)
    raw_faces = spec.get("faces", [])
    if not isinstance(raw_faces, list):
        raise PresetError("must be a list of edge loops", f"{path}.faces")
    faces = []
    for k, loop in enumerate(raw_faces):
        p = f"{path}.faces[{k}]"
        if not isinstance(loop, list) or len(loop) < 2:
            raise PresetError(f"a face is a list of at least 2 edge ids, got {loop!r}", p)
        ids = [_index(x, len(edges), f"{p}[{q}]", "edge") for q, x in enumerate(loop)]
        if len(set(ids)) != len(ids):
            raise PresetError("a face uses an edge twice", p)
        faces.append(_make_face(e, ids, p))
    if "rim" in spec:
        rim = spec["rim"]
        if not isinstance(rim, list):
            raise PresetError("must be a list of vertex ids", f"{path}.rim")
        boundary = np.zeros(nv, dtype=bool)
        for q, x in enumerate(rim):
            boundary[_index(x, nv, f"{path}.rim[{q}]", "vertex")] = True
    else:
        boundary = np.zeros(nv, dtype=bool)
        if faces:
            count = np.zeros(len(edges), dtype=int)
            for f in faces:
                count[list(f.edges)] += 1
            boundary[e[count == 1].ravel()] = True
        deg = np.zeros(nv, dtype=int)
        np.add.at(deg, e.ravel(), 1)
        boundary |= deg <= 1
    return CellComplex(nv, e, faces, "explicit", None, "none", (), None, boundary,
                       np.full(len(edges), -1), np.full(len(edges), -1))


def complex_from_spec(spec, path: str = "complex") -> CellComplex:
    """Build a :class:`CellComplex` from a preset's ``complex`` value."""
    if not isinstance(spec, dict):
        raise PresetError(f"must be an object, got {type(spec).__name__}", path)
    kinds = [k for k in ("grid", "path", "vertices") if k in spec]
    if len(kinds) != 1:
        raise PresetError("needs exactly one of \"grid\", \"path\" or \"vertices\"", path)
    if kinds[0] == "grid":
        _no_extra_keys(spec, ("grid", "wrap"), path)
        g = spec["grid"]
        if not isinstance(g, list) or len(g) != 2:
            raise PresetError(f"must be [M, N], got {g!r}", f"{path}.grid")
        return grid_complex(g[0], g[1], spec.get("wrap", "none"), path)
    if kinds[0] == "path":
        _no_extra_keys(spec, ("path", "wrap"), path)
        return path_complex(spec["path"], spec.get("wrap", "none"), path)
    return explicit_complex(spec, path)


# --------------------------------------------------------------------------
# Twists

def _twist_matrix(spec, d: int, path: str) -> np.ndarray:
    """The d x d matrix of a sign / rotate / matrix spec (bare number = sign)."""
    if _is_num(spec):
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
        if not _is_num(val) or float(val) not in (1.0, -1.0):
            raise PresetError(f"a sign is 1 or -1, got {val!r}", p)
        return float(val) * np.eye(d)
    if key == "rotate":
        if d != 2:
            raise PresetError(f"a rotation needs stalk dimension 2, this field has {d}", p)
        if not _is_num(val):
            raise PresetError(f"rotation angle in degrees must be a number, got {val!r}", p)
        a = math.radians(float(val))
        return np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    if (not isinstance(val, list) or len(val) != d
            or any(not isinstance(r, list) or len(r) != d for r in val)):
        raise PresetError(f"must be a {d} x {d} list of rows", p)
    for r, row in enumerate(val):
        for c, x in enumerate(row):
            if not _is_num(x):
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
            _no_extra_keys(spec, ("seam", "axis"), p)
            seam = cx.seam if cx.seam is not None else np.full(cx.n_edges, -1)
            if not np.any(seam >= 0):
                raise PresetError(f"this complex ({cx.kind}, wrap {cx.wrap!r}) has no seam",
                                  f"{p}.seam")
            if "axis" in spec:
                ax = spec["axis"]
                if not _is_int(ax) or not np.any(seam == ax):
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
            ids = np.array([_index(x, cx.n_edges, f"{p}.edges[{q}]", "edge")
                            for q, x in enumerate(ids_raw)])
            _no_extra_keys(spec, ("edges", "sign", "rotate", "matrix"), p)
            mat_spec = {key: spec[key] for key in ("sign", "rotate", "matrix") if key in spec}
            out.append((ids, _twist_matrix(mat_spec, d, p)))
    return out, seam_given


# --------------------------------------------------------------------------
# Field sheaf

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
        d = _int_at_least(stalk, 1, sp_path, "stalk dimension")
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
    def mu_max_bound(self, boundary: str = "free", path: str = "boundary") -> float:
        """Gershgorin upper bound on the largest eigenvalue of L (cheap)."""
        return gershgorin_bound(self.laplacian(boundary, path))

    def mu_max(self, boundary: str = "free", path: str = "boundary") -> float:
        """Largest eigenvalue of L (eigsh; Gershgorin bound if it fails)."""
        return operator_mu_max(self.laplacian(boundary, path))

    def h0_dim(self, boundary: str = "free", tol: float | None = None,
               path: str = "boundary") -> int:
        """dim H^0 = dim ker delta (with "fixed": drift modes left after clamping).

        Counts eigenvalues of L below ``tol`` (default 1e-9 * max(1, bound)).
        """
        lap = self.laplacian(boundary, path)
        if tol is None:
            tol = 1e-9 * max(1.0, gershgorin_bound(lap))
        n = lap.shape[0]
        if n <= DENSE_LIMIT:
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


# --------------------------------------------------------------------------
# Spectral helpers

def gershgorin_bound(a) -> float:
    """max_i sum_j |A_ij|: an upper bound on every eigenvalue of symmetric A."""
    a = sp.csr_matrix(a)
    if a.shape[0] == 0:
        return 0.0
    return float(np.max(np.asarray(abs(a).sum(axis=1)).ravel()))


def operator_mu_max(a) -> float:
    """Largest eigenvalue of symmetric PSD ``a`` (dense when small, else eigsh).

    Falls back to the Gershgorin bound (safe: never below the true value)
    when the iterative solver does not converge.
    """
    a = sp.csr_matrix(a)
    n = a.shape[0]
    if n <= DENSE_LIMIT:
        return float(np.linalg.eigvalsh(a.toarray())[-1])
    try:
        val = spla.eigsh(a, k=1, which="LA", return_eigenvectors=False, tol=1e-12)
        return float(val[0])
    except spla.ArpackNoConvergence:
        return gershgorin_bound(a)


def lowest_eigenvalues(a, k: int) -> np.ndarray:
    """The ``k`` smallest eigenvalues of symmetric PSD ``a``, ascending."""
    a = sp.csr_matrix(a)
    n = a.shape[0]
    if n <= DENSE_LIMIT or k >= n - 1:
        return np.linalg.eigvalsh(a.toarray())[:k]
    shift = -1e-6 * max(1.0, gershgorin_bound(a))      # keeps A - shift*I definite
    ev = spla.eigsh(a.tocsc(), k=k, sigma=shift, which="LM", return_eigenvectors=False)
    return np.sort(ev)


# --------------------------------------------------------------------------
# Leapfrog / diffusion

def mode_frequency(mu, lam: float, fs: float):
    """Hz at which a mode of L-eigenvalue ``mu`` rings: 4 sin^2(w T/2) = lam^2 mu.

    Lossless leapfrog; ``fs`` in Hz.  ValueError if lam^2 mu > 4 (unstable).
    """
    q = lam * lam * np.asarray(mu, dtype=float)
    if np.any(q > 4.0 * (1 + STABILITY_RTOL)) or np.any(q < 0):
        raise ValueError("lam^2 * mu must lie in [0, 4] for a ringing mode")
    return fs / math.pi * np.arcsin(np.sqrt(np.clip(q, 0.0, 4.0)) / 2.0)


def mode_response(q: float, fs: float, sigma: float = 0.0, eta: float = 0.0,
                  p: float = 0.0) -> tuple[float, float]:
    """(frequency Hz, T60 s) of one mode of the lossy leapfrog update.

    ``q`` is the mode's eigenvalue of lam^2 L + beta^2 S, ``p`` its
    L-eigenvalue (for eta).  Roots of (1+s) z^2 - (2 - q - eta p) z +
    (1 - s - eta p); the larger-modulus root sets both numbers.
    """
    roots = np.roots([1.0 + sigma, -(2.0 - q - eta * p), 1.0 - sigma - eta * p])
    z = roots[np.argmax(np.abs(roots))]
    freq = abs(np.angle(z)) * fs / (2 * math.pi)
    mag = abs(z)
    t60 = math.inf if mag >= 1.0 else 3.0 * math.log(10.0) / (-math.log(mag) * fs)
    return float(freq), float(t60)


def stable(lam: float, mu_max: float, *, eta: float = 0.0, beta: float = 0.0,
           s_max: float = 0.0, sigma: float = 0.0) -> bool:
    """Leapfrog stability: (lam^2 + 2 eta) mu_max + beta^2 s_max <= 4.

    ``mu_max``/``s_max``: largest eigenvalues (or upper bounds) of L and S.
    sigma >= 0 does not move the bound; negative losses are gains and are
    reported unstable.  Equality counts as stable (up to rounding).
    """
    if sigma < 0 or eta < 0:
        return False
    q = (lam * lam + 2.0 * eta) * mu_max + beta * beta * s_max
    return q <= 4.0 * (1.0 + STABILITY_RTOL)


def diffusion_stable(nu: float, mu_max: float, sigma: float = 0.0) -> bool:
    """Explicit diffusion stability: nu mu_max + sigma <= 2 (nu, sigma >= 0)."""
    if nu < 0 or sigma < 0:
        return False
    return nu * mu_max + sigma <= 2.0 * (1.0 + STABILITY_RTOL)


def leapfrog_step(u, u_prev, lap, lam: float, sigma: float = 0.0, eta: float = 0.0,
                  stiff=None, beta: float = 0.0):
    """One wave/stiff step (module doc): returns u+.

    w = (lam^2 + eta) u - eta u_prev;
    u+ = (2u - (1 - sigma) u_prev - L w - beta^2 S u) / (1 + sigma).
    """
    w = (lam * lam + eta) * u - eta * u_prev
    acc = 2.0 * u - (1.0 - sigma) * u_prev - lap @ w
    if stiff is not None and beta != 0.0:
        acc = acc - (beta * beta) * (stiff @ u)
    return acc / (1.0 + sigma)


def diffusion_step(u, lap, nu: float, sigma: float = 0.0):
    """One diffusion step: u+ = (1 - sigma) u - nu L u."""
    return (1.0 - sigma) * u - nu * (lap @ u)


# --------------------------------------------------------------------------
# Strike / pickup positions

def _axis_stencil(p: float, n: int, periodic: bool):
    """[(index, weight, crossed_seam)] for fraction p along an axis of n vertices."""
    if periodic:
        x = (p * n) % n
        i0 = min(int(math.floor(x)), n - 1)
        f = x - i0
        i1 = i0 + 1
        return [(i0, 1.0 - f, False), (i1 % n, f, i1 == n)]
    x = p * (n - 1)
    i0 = min(int(math.floor(x)), n - 2)
    f = x - i0
    return [(i0, 1.0 - f, False), (i0 + 1, f, False)]


def _seam_scale(sheaf: FieldSheaf | None, e: int) -> float:
    """1/c if the transport across seam edge e is c*I, else 1."""
    if sheaf is None:
        return 1.0
    t = sheaf.transport(e)
    c = t[0, 0]
    if abs(c) > 1e-12 and np.allclose(t, c * np.eye(sheaf.stalk)):
        return 1.0 / c
    return 1.0


def position_weights(cx: CellComplex, at, path: str = "at",
                     sheaf: FieldSheaf | None = None) -> np.ndarray:
    """Vertex weight vector (length V) for a strike/pickup position (module doc).

    Pass ``sheaf`` to carry sign twists across a seam.  Under "fixed" the
    caller keeps ``w[cx.kept_vertices("fixed")]`` (clamped points are silent).
    """
    w = np.zeros(cx.n_vertices)
    if isinstance(at, dict):
        _no_extra_keys(at, ("vertex",), path)
        if "vertex" not in at:
            raise PresetError("needs \"vertex\"", path)
        w[_index(at["vertex"], cx.n_vertices, f"{path}.vertex", "vertex")] = 1.0
        return w
    if cx.kind == "explicit":
        raise PresetError("positions on an explicit complex are {\"vertex\": id}", path)
    n_axes = len(cx.shape)
    frac = at if isinstance(at, list) else [at]
    if len(frac) != n_axes:
        raise PresetError(f"needs {n_axes} fraction(s) for a {cx.kind}, got {at!r}", path)
    for k, p in enumerate(frac):
        pk = f"{path}[{k}]" if isinstance(at, list) else path
        if not _is_num(p) or not 0.0 <= float(p) <= 1.0:
            raise PresetError(f"a position is a fraction in [0, 1], got {p!r}", pk)
    stencils = [_axis_stencil(float(p), n, per)
                for p, n, per in zip(frac, cx.shape, cx.wrapped)]
    if cx.kind == "path":
        n = cx.shape[0]
        for i, wt, crossed in stencils[0]:
            w[i] += wt * (_seam_scale(sheaf, n - 1) if crossed else 1.0)
        return w
    m, n = cx.shape
    for i, wi, cross0 in stencils[0]:
        for j, wj, cross1 in stencils[1]:
            wt, row = wi * wj, i
            if wt == 0.0:
                continue
            if cross1:      # stepped over the axis-1 seam from (row, N-1)
                src = i if not cross0 else m - 1
                e = int(np.flatnonzero((cx.seam == 1) & (cx.edges[:, 0] == src * n + n - 1))[0])
                wt *= _seam_scale(sheaf, e)
                row = (m - 1 - i) if cx.wrap == "mobius" else i
            if cross0:      # stepped over the axis-0 seam from (M-1, col)
                e = int(np.flatnonzero((cx.seam == 0) & (cx.edges[:, 0] == (m - 1) * n + j))[0])
                wt *= _seam_scale(sheaf, e)
            w[row * n + j] += wt
    return w

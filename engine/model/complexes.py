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

``boundary`` -- ``"fixed"``: boundary (rim) vertices are clamped to 0 and
removed from the state (Dirichlet; a bar is then simply supported);
``"free"``: all vertices stay (Neumann-like).

The sheaf on a complex is in :mod:`.field_sheaf`, strike and pickup
positions in :mod:`.positions`, the update schemes in :mod:`.schemes`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.json_checks import index_arg, int_at_least, no_extra_keys

__all__ = ["Face", "CellComplex", "complex_from_spec", "grid_complex", "path_complex", "explicit_complex",
           "check_boundary", "GRID_WRAPS", "PATH_WRAPS", "BOUNDARIES", "MAX_VERTICES"]

GRID_WRAPS = ("none", "torus", "cylinder", "mobius")
PATH_WRAPS = ("none", "ring")
BOUNDARIES = ("fixed", "free")
MAX_VERTICES = 16384     # per complex: bounds load time and per-voice state (128 x 128 grid)


def _vertex_cap(nv: int, path: str) -> None:
    if nv > MAX_VERTICES:
        raise PresetError(f"{nv} vertices; a field has at most {MAX_VERTICES}", path)



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
        if self.boundary is None:
            raise PresetError("boundary \"fixed\" needs a rim; this complex marks none", path)
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
    n = int_at_least(n, 2, f"{path}.path", "path length")
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
    m = int_at_least(m, 2, f"{path}.grid[0]", "grid size")
    n = int_at_least(n, 2, f"{path}.grid[1]", "grid size")
    _vertex_cap(m * n, f"{path}.grid")
    if wrap not in GRID_WRAPS:
        raise PresetError(f"must be one of {', '.join(GRID_WRAPS)} for a grid, got {wrap!r}",
                          f"{path}.wrap")
    wrap0 = wrap == "torus"
    wrap1 = wrap in ("torus", "cylinder", "mobius")
    vid = lambda i, j: i * n + j  # noqa: E731
    edges: list[tuple[int, int]] = []
    seam: list[int] = []
    axis: list[int] = []
    h: dict[tuple[int, int], int] = {}
    v: dict[tuple[int, int], int] = {}                   # (i, j) -> edge id leaving (i, j) along axis 1 / 0
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
    no_extra_keys(spec, ("vertices", "edges", "faces", "rim"), path)
    nv = int_at_least(spec["vertices"], 2, f"{path}.vertices", "vertex count")
    _vertex_cap(nv, f"{path}.vertices")
    raw_edges = spec.get("edges")
    if not isinstance(raw_edges, list) or not raw_edges:
        raise PresetError("must be a non-empty list of [i, j] pairs", f"{path}.edges")
    edges = []
    for k, pair in enumerate(raw_edges):
        p = f"{path}.edges[{k}]"
        if not isinstance(pair, list) or len(pair) != 2:
            raise PresetError(f"an edge is a pair [i, j], got {pair!r}", p)
        i = index_arg(pair[0], nv, f"{p}[0]", "vertex")
        j = index_arg(pair[1], nv, f"{p}[1]", "vertex")
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
        ids = [index_arg(x, len(edges), f"{p}[{q}]", "edge") for q, x in enumerate(loop)]
        if len(set(ids)) != len(ids):
            raise PresetError("a face uses an edge twice", p)
        faces.append(_make_face(e, ids, p))
    if "rim" in spec:
        rim = spec["rim"]
        if not isinstance(rim, list):
            raise PresetError("must be a list of vertex ids", f"{path}.rim")
        boundary = np.zeros(nv, dtype=bool)
        for q, x in enumerate(rim):
            boundary[index_arg(x, nv, f"{path}.rim[{q}]", "vertex")] = True
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
        no_extra_keys(spec, ("grid", "wrap"), path)
        g = spec["grid"]
        if not isinstance(g, list) or len(g) != 2:
            raise PresetError(f"must be [M, N], got {g!r}", f"{path}.grid")
        return grid_complex(g[0], g[1], spec.get("wrap", "none"), path)
    if kinds[0] == "path":
        no_extra_keys(spec, ("path", "wrap"), path)
        return path_complex(spec["path"], spec.get("wrap", "none"), path)
    return explicit_complex(spec, path)

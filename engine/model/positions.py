"""Strike and pickup positions on a field: vertex weight vectors.

positions (``strike.at`` / ``pickup.at``) -- a path takes a fraction p in
[0, 1] (or ``[p]``), a grid ``[p0, p1]`` (fractions along axis 0, axis 1),
any complex ``{"vertex": id}``.  Open axis: x = p*(n-1); wrapped axis:
x = p*n mod n.  Weights interpolate linearly between the two neighbouring
vertices of a path, bilinearly between the four of a grid cell, so moving p
moves the point smoothly (weights sum to 1).  Across a seam whose transport
is a scalar c*I (sign twists) the far vertex gets weight / c, so the read
value stays continuous; across rotation seams no transport is applied.
"""

from __future__ import annotations

import math

import numpy as np

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.complexes import CellComplex
from sheafsynth.engine.model.field_sheaf import FieldSheaf, seam_scale
from sheafsynth.engine.model.json_checks import index_arg, is_num, no_extra_keys

__all__ = ["position_weights"]



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


def position_weights(cx: CellComplex, at, path: str = "at",
                     sheaf: FieldSheaf | None = None) -> np.ndarray:
    """Vertex weight vector (length V) for a strike/pickup position (module doc).

    Pass ``sheaf`` to carry sign twists across a seam.  Under "fixed" the
    caller keeps ``w[cx.kept_vertices("fixed")]`` (clamped points are silent).
    """
    w = np.zeros(cx.n_vertices)
    if isinstance(at, dict):
        no_extra_keys(at, ("vertex",), path)
        if "vertex" not in at:
            raise PresetError("needs \"vertex\"", path)
        w[index_arg(at["vertex"], cx.n_vertices, f"{path}.vertex", "vertex")] = 1.0
        return w
    if cx.kind == "explicit" or cx.shape is None or cx.seam is None:
        raise PresetError("positions on an explicit complex are {\"vertex\": id}", path)
    n_axes = len(cx.shape)
    frac = at if isinstance(at, list) else [at]
    if len(frac) != n_axes:
        raise PresetError(f"needs {n_axes} fraction(s) for a {cx.kind}, got {at!r}", path)
    for k, p in enumerate(frac):
        pk = f"{path}[{k}]" if isinstance(at, list) else path
        if not is_num(p) or not 0.0 <= float(p) <= 1.0:
            raise PresetError(f"a position is a fraction in [0, 1], got {p!r}", pk)
    stencils = [_axis_stencil(float(p), n, per)
                for p, n, per in zip(frac, cx.shape, cx.wrapped)]
    if cx.kind == "path":
        n = cx.shape[0]
        for i, wt, crossed in stencils[0]:
            w[i] += wt * (seam_scale(sheaf, n - 1) if crossed else 1.0)
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
                wt *= seam_scale(sheaf, e)
                row = (m - 1 - i) if cx.wrap == "mobius" else i
            if cross0:      # stepped over the axis-0 seam from (M-1, col)
                e = int(np.flatnonzero((cx.seam == 0) & (cx.edges[:, 0] == (m - 1) * n + j))[0])
                wt *= seam_scale(sheaf, e)
            w[row * n + j] += wt
    return w

"""``statespace`` (A, B, C, D) and ``gain`` (a static matrix) cells."""

from __future__ import annotations

from sheafsynth.engine.preset.affine import AffineMatrix, parse_entry, parse_matrix
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel

__all__ = ["build_statespace", "build_gain"]


def build_statespace(spec: dict, path: str, parameters) -> CellModel:
    A = parse_matrix(spec["A"], path + ".A", parameters)
    k = A.rows
    if A.cols != k:
        raise PresetError(f"A must be square, it is {A.rows}x{A.cols}", path + ".A")
    B = parse_matrix(spec["B"], path + ".B", parameters, (k, None))
    C = parse_matrix(spec["C"], path + ".C", parameters, (None, k))
    D = parse_matrix(spec["D"], path + ".D", parameters, (C.rows, B.cols))
    return CellModel(spec["id"], "statespace", B.cols, C.rows, A, B, C, D)


def build_gain(spec: dict, path: str, parameters) -> CellModel:
    raw = spec["gain"]
    if isinstance(raw, list):
        G = parse_matrix(raw, path + ".gain", parameters)
    else:
        G = AffineMatrix.from_rows([[parse_entry(raw, path + ".gain", parameters)]])
    n_out, n_in = G.rows, G.cols
    return CellModel(spec["id"], "gain", n_in, n_out,
                     AffineMatrix(0, 0, ()), AffineMatrix(0, n_in, ()),
                     AffineMatrix(n_out, 0, tuple(() for _ in range(n_out))), G)

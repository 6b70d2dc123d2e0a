"""``statespace`` (A, B, C, D) and ``gain`` (a static matrix) cells.

Rates (engine.model.timebase): with ``"time": "sample"`` (the default) A,
B, C, D are per sample at the preset's design rate.  At another rate a
block whose A is nilpotent (an FIR: a chain of unit delays) keeps its tap
spacing in time (engine.model.rate_maps.respace_taps); a block whose A is
invertible, with no eigenvalue on the negative real axis, keeps its
continuous-time dynamics (resample_statespace: A' = exp(log(A) fs0/fs),
zero-order-hold input).  With ``"time": "continuous"`` A and B are in
units per second (ds/dt = A s + B u) and are discretized at every rate
(zero-order hold).  A must be numbers in both cases away from the design
rate (a knob inside a matrix exponential would not stay affine); B, C and
D may hold knobs (an FIR's taps may hold knobs in B or in C, not both).
"""

from __future__ import annotations

import numpy as np

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel
from sheafsynth.engine.model.rate_maps import discretize, resample_statespace, respace_taps
from sheafsynth.engine.model.timebase import Timebase
from sheafsynth.engine.preset.affine import Affine, AffineMatrix, parse_entry, parse_matrix

__all__ = ["TIME_BASES", "build_statespace", "build_gain"]

TIME_BASES = ("sample", "continuous")


def _mul_left(m: np.ndarray, x: AffineMatrix) -> AffineMatrix:
    """numeric m (r x k) times affine x (k x c)."""
    rows = []
    for i in range(m.shape[0]):
        row = []
        for j in range(x.cols):
            acc = Affine()
            for k in range(m.shape[1]):
                if m[i, k] != 0.0:
                    acc = acc + x[k, j].scaled(float(m[i, k]))
            row.append(acc)
        rows.append(row)
    return AffineMatrix(m.shape[0], x.cols, tuple(tuple(r) for r in rows))


def _mul_right(x: AffineMatrix, m: np.ndarray) -> AffineMatrix:
    """affine x (r x k) times numeric m (k x c)."""
    rows = []
    for i in range(x.rows):
        row = []
        for j in range(m.shape[1]):
            acc = Affine()
            for k in range(x.cols):
                if m[k, j] != 0.0:
                    acc = acc + x[i, k].scaled(float(m[k, j]))
            row.append(acc)
        rows.append(row)
    return AffineMatrix(x.rows, m.shape[1], tuple(tuple(r) for r in rows))


def _fir_taps(a: np.ndarray, b: AffineMatrix, c: AffineMatrix, d: AffineMatrix, path: str,
              tb: Timebase) -> list[AffineMatrix]:
    """Impulse-response taps D, C B, C A B, ... of a nilpotent block (affine in B or C)."""
    if b.symbols and c.symbols:
        tb.refuse("an FIR block with knobs in both B and C", path,
                  "keep the knobs in B, C or D only, or run at the design rate")
    taps = [d]
    power = np.eye(a.shape[0])
    for _ in range(a.shape[0]):
        if c.symbols:
            taps.append(_mul_right(c, power @ b.value({})))
        else:
            taps.append(_mul_left(c.value({}) @ power, b))
        power = a @ power
    while len(taps) > 1 and taps[-1].is_zero:
        taps.pop()
    return taps


def _fir_block(name: str, taps: list[AffineMatrix]) -> CellModel:
    """A shift register of past inputs with one output row of taps per output."""
    n_out, n_in = taps[0].rows, taps[0].cols
    m = len(taps) - 1
    k = m * n_in
    zero, one = Affine(), Affine.number(1.0)
    A = [[zero] * k for _ in range(k)]
    B = [[zero] * n_in for _ in range(k)]
    for j in range(n_in):
        B[j][j] = one
    for s in range(n_in, k):
        A[s][s - n_in] = one
    C = [[taps[1 + s // n_in][o, s % n_in] for s in range(k)] for o in range(n_out)]
    return CellModel(name, "statespace", n_in, n_out,
                     AffineMatrix(k, k, tuple(tuple(r) for r in A)),
                     AffineMatrix(k, n_in, tuple(tuple(r) for r in B)),
                     AffineMatrix(n_out, k, tuple(tuple(r) for r in C)), taps[0])


def build_statespace(spec: dict, path: str, parameters, tb: Timebase) -> CellModel:
    A = parse_matrix(spec["A"], path + ".A", parameters)
    k = A.rows
    if A.cols != k:
        raise PresetError(f"A must be square, it is {A.rows}x{A.cols}", path + ".A")
    B = parse_matrix(spec["B"], path + ".B", parameters, (k, None))
    C = parse_matrix(spec["C"], path + ".C", parameters, (None, k))
    D = parse_matrix(spec["D"], path + ".D", parameters, (C.rows, B.cols))
    time = spec.get("time", "sample")
    if time not in TIME_BASES:
        raise PresetError(f"time must be one of {', '.join(TIME_BASES)}, got {time!r}", path + ".time")
    name = spec["id"]
    if time == "sample" and tb.native:
        return CellModel(name, "statespace", B.cols, C.rows, A, B, C, D)
    if A.symbols:
        if time == "continuous":
            raise PresetError("a continuous-time A must be numbers (a knob inside the matrix exponential "
                              "would not stay affine)", path + ".A")
        tb.refuse("a knob in A", path + ".A", 'give A as numbers (knobs may sit in B, C and D)')
    a = A.value({})
    if time == "continuous":
        ad, g = discretize(a, tb.rate)
        return CellModel(name, "statespace", B.cols, C.rows, AffineMatrix.from_numbers(ad.tolist()),
                         _mul_left(g, B), C, D)
    if not np.any(np.linalg.matrix_power(a, k)):
        return _fir_block(name, _respaced(_fir_taps(a, B, C, D, path, tb), tb.ratio))
    moved = resample_statespace(a, tb.ratio, tb.design_rate)
    if moved is None:
        tb.refuse("a state matrix with an eigenvalue at 0 or on the negative real axis", path + ".A",
                  'give it in continuous time ("time": "continuous") or as separate cells')
    a2, m = moved
    return CellModel(name, "statespace", B.cols, C.rows, AffineMatrix.from_numbers(a2.tolist()),
                     _mul_left(m, B), C, D)


def _respaced(taps: list[AffineMatrix], ratio: float) -> list[AffineMatrix]:
    """respace_taps entry by entry (every tap matrix has the same shape)."""
    rows, cols = taps[0].rows, taps[0].cols
    per_entry = [[respace_taps([t[i, j] for t in taps], ratio) for j in range(cols)] for i in range(rows)]
    length = max(len(e) for row in per_entry for e in row)
    return [AffineMatrix(rows, cols, tuple(
        tuple(per_entry[i][j][n] if n < len(per_entry[i][j]) else Affine() for j in range(cols))
        for i in range(rows))) for n in range(length)]


def build_gain(spec: dict, path: str, parameters, tb: Timebase) -> CellModel:
    raw = spec["gain"]
    if isinstance(raw, list):
        G = parse_matrix(raw, path + ".gain", parameters)
    else:
        G = AffineMatrix.from_rows([[parse_entry(raw, path + ".gain", parameters)]])
    n_out, n_in = G.rows, G.cols
    return CellModel(spec["id"], "gain", n_in, n_out,
                     AffineMatrix(0, 0, ()), AffineMatrix(0, n_in, ()),
                     AffineMatrix(n_out, 0, tuple(() for _ in range(n_out))), G)

"""Parameter-affine numbers and matrices.

Every coefficient in a preset is affine in the parameters: a number, a
parameter name, or ``{"param": name, "scale": s, "offset": o}``.  Keeping
coefficients affine is what lets the analysis reason at the corners of the
parameter box (DESIGN §5), so this module is the single place that parses
and evaluates them.

Symbols starting with ``@`` are per-voice quantities filled in by the
kernel (for example ``@tune`` is a tuning allpass coefficient set from the
played pitch); they are not user parameters.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

from sheafsynth.engine.errors import PresetError

__all__ = ["Affine", "AffineMatrix", "parse_entry", "parse_matrix"]


@dataclass(frozen=True)
class Affine:
    """``const + sum(coeff * value(symbol))`` over parameter or voice symbols."""

    const: float = 0.0
    terms: tuple[tuple[str, float], ...] = ()

    @staticmethod
    def number(x: float) -> "Affine":
        return Affine(float(x), ())

    @staticmethod
    def symbol(name: str, scale: float = 1.0, offset: float = 0.0) -> "Affine":
        if scale == 0.0:
            return Affine(float(offset), ())
        return Affine(float(offset), ((name, float(scale)),))

    @property
    def is_const(self) -> bool:
        return not self.terms

    @property
    def is_zero(self) -> bool:
        return self.const == 0.0 and not self.terms

    @property
    def symbols(self) -> tuple[str, ...]:
        return tuple(s for s, _ in self.terms)

    def value(self, env: Mapping[str, float]) -> float:
        """Evaluate with ``env`` mapping every symbol to its value."""
        v = self.const
        for s, c in self.terms:
            v += c * env[s]
        return v

    def scaled(self, k: float) -> "Affine":
        return Affine(self.const * k, tuple((s, c * k) for s, c in self.terms if c * k != 0.0))

    def __add__(self, other: "Affine") -> "Affine":
        acc: dict[str, float] = dict(self.terms)
        for s, c in other.terms:
            acc[s] = acc.get(s, 0.0) + c
        return Affine(self.const + other.const, tuple((s, c) for s, c in acc.items() if c != 0.0))

    def describe(self) -> str:
        """Human-readable form, e.g. ``1 - 1*bright``."""
        parts = []
        if self.const != 0.0 or not self.terms:
            parts.append(f"{self.const:g}")
        for s, c in self.terms:
            if c == 1.0:
                parts.append(s)
            elif c == -1.0:
                parts.append(f"-{s}")
            else:
                parts.append(f"{c:g}*{s}")
        return " + ".join(parts).replace("+ -", "- ")


def _finite(x, path: str) -> float:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        raise PresetError(f"expected a number, got {type(x).__name__}", path)
    if not math.isfinite(float(x)):
        raise PresetError("number is not finite", path)
    return float(x)


def parse_entry(raw, path: str, parameters: Mapping[str, object]) -> Affine:
    """Parse one matrix entry or gain; errors name ``path``."""
    if isinstance(raw, bool):
        raise PresetError("expected a number, a parameter name or {param, scale, offset}", path)
    if isinstance(raw, (int, float)):
        return Affine.number(_finite(raw, path))
    if isinstance(raw, str):
        if raw not in parameters:
            raise PresetError(f'unknown parameter "{raw}"', path)
        return Affine.symbol(raw)
    if isinstance(raw, dict):
        extra = set(raw) - {"param", "scale", "offset"}
        if extra:
            raise PresetError(f"unknown key {sorted(extra)[0]!r} in a parameter entry", path)
        name = raw.get("param")
        if not isinstance(name, str):
            raise PresetError('a parameter entry needs "param": a parameter name', path)
        if name not in parameters:
            raise PresetError(f'unknown parameter "{name}"', path + ".param")
        scale = _finite(raw.get("scale", 1.0), path + ".scale")
        offset = _finite(raw.get("offset", 0.0), path + ".offset")
        return Affine.symbol(name, scale, offset)
    raise PresetError("expected a number, a parameter name or {param, scale, offset}", path)


@dataclass(frozen=True)
class AffineMatrix:
    """A dense matrix of Affine entries (small: cell blocks and wire gains)."""

    rows: int
    cols: int
    entries: tuple[tuple[Affine, ...], ...] = field(default=())

    @staticmethod
    def zeros(rows: int, cols: int) -> "AffineMatrix":
        z = Affine()
        return AffineMatrix(rows, cols, tuple(tuple(z for _ in range(cols)) for _ in range(rows)))

    @staticmethod
    def identity(n: int, gain: Affine | None = None) -> "AffineMatrix":
        g = gain if gain is not None else Affine.number(1.0)
        z = Affine()
        return AffineMatrix(n, n, tuple(tuple(g if i == j else z for j in range(n)) for i in range(n)))

    @staticmethod
    def from_rows(rows: Sequence[Sequence[Affine]]) -> "AffineMatrix":
        r = len(rows)
        c = len(rows[0]) if r else 0
        return AffineMatrix(r, c, tuple(tuple(row) for row in rows))

    @staticmethod
    def from_numbers(rows: Sequence[Sequence[float]]) -> "AffineMatrix":
        return AffineMatrix.from_rows([[Affine.number(x) for x in row] for row in rows])

    def __getitem__(self, ij: tuple[int, int]) -> Affine:
        i, j = ij
        return self.entries[i][j]

    @property
    def symbols(self) -> set[str]:
        out: set[str] = set()
        for row in self.entries:
            for e in row:
                out.update(e.symbols)
        return out

    @property
    def is_zero(self) -> bool:
        return all(e.is_zero for row in self.entries for e in row)

    def value(self, env: Mapping[str, float]):
        """Evaluate to a float64 NumPy array."""
        import numpy as np

        out = np.zeros((self.rows, self.cols))
        for i, row in enumerate(self.entries):
            for j, e in enumerate(row):
                out[i, j] = e.value(env)
        return out

    def describe(self) -> list[list[str]]:
        return [[e.describe() for e in row] for row in self.entries]


def parse_matrix(raw, path: str, parameters: Mapping[str, object],
                 shape: tuple[int | None, int | None] = (None, None)) -> AffineMatrix:
    """Parse a list of rows of entries; checks it is rectangular and of ``shape``."""
    if not isinstance(raw, list) or not raw or not all(isinstance(r, list) for r in raw):
        raise PresetError("expected a matrix: a non-empty list of rows", path)
    ncols = len(raw[0])
    rows = []
    for i, r in enumerate(raw):
        if len(r) != ncols:
            raise PresetError(f"row {i} has {len(r)} entries, row 0 has {ncols}", path)
        rows.append([parse_entry(x, f"{path}[{i}][{j}]", parameters) for j, x in enumerate(r)])
    m = AffineMatrix.from_rows(rows)
    want_r, want_c = shape
    if want_r is not None and m.rows != want_r or want_c is not None and m.cols != want_c:
        wr = "?" if want_r is None else want_r
        wc = "?" if want_c is None else want_c
        raise PresetError(f"matrix is {m.rows}x{m.cols}, expected {wr}x{wc}", path)
    return m

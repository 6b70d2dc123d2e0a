"""Statistics of repeated timings: spread (median, quartiles), interleaved sides, rounding, the half-load solve.

Times in s; loads as fractions of real time.
"""

from __future__ import annotations

import math
import statistics
from typing import Callable, Sequence

__all__ = ["spread", "interleave", "round_figures", "solve_half"]


def spread(xs: Sequence[float | None]) -> dict:
    """Median with quartiles, min, max and count of a list of numbers."""
    xs = sorted(float(x) for x in xs if x is not None and math.isfinite(x))
    if not xs:
        return {"median": None, "q1": None, "q3": None, "min": None, "max": None, "n": 0}
    if len(xs) >= 2:
        q = statistics.quantiles(xs, n=4, method="inclusive")
        q1, q3 = q[0], q[2]
    else:
        q1 = q3 = xs[0]
    return {"median": statistics.median(xs), "q1": q1, "q3": q3, "min": xs[0], "max": xs[-1], "n": len(xs)}


def interleave(sides: dict[str, Callable[[], float]], reps: int) -> dict[str, list[float]]:
    """Run every side once per repetition, rotating the order (ab, ba, ...); each returns a time (s)."""
    names = list(sides)
    out: dict[str, list[float]] = {n: [] for n in names}
    for r in range(reps):
        k = r % len(names)
        for n in names[k:] + names[:k]:
            out[n].append(float(sides[n]()))
    return out


def round_figures(x, nd=4):
    """Floats (also inside dicts and lists) to ``nd`` significant figures; non-finite ones become None."""
    if x is None:
        return None
    if isinstance(x, float):
        if not math.isfinite(x):
            return None
        return float(f"{x:.{nd}g}")
    if isinstance(x, dict):
        return {k: round_figures(v, nd) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [round_figures(v, nd) for v in x]
    return x


def solve_half(pts: Sequence[tuple[float, float]]) -> float | None:
    """Voice count at load 0.5 from (voices, load) points: linear interpolation, extrapolated at the ends."""
    pts = [p for p in pts if p[0] > 0]
    if len(pts) < 2:
        if pts and pts[0][1] > 0:
            return 0.5 * pts[0][0] / pts[0][1]
        return None
    seg = None
    for (n0, l0), (n1, l1) in zip(pts[:-1], pts[1:]):
        if l0 <= 0.5 <= l1:
            seg = ((n0, l0), (n1, l1))
            break
    if seg is None:
        seg = (pts[0], pts[1]) if pts[0][1] > 0.5 else (pts[-2], pts[-1])
    (n0, l0), (n1, l1) = seg
    if l1 == l0:
        return None
    return n0 + (0.5 - l0) * (n1 - n0) / (l1 - l0)

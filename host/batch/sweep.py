"""The check over a grid of parameter values: where a design is stable and how it sounds.

Each grid point is checked as the design with the swept parameters *held*
at the point's values: their controls are pinned there (so the check's knob
box is a single value for them) while every other mapped knob keeps its
range.  The full point check is engine.analysis.report.check itself
(stability at every corner and note, the certificate, the partials with
the fundamental and its T60); ``stability_only`` runs just the check's
frozen corner scan (engine.analysis.report.frozen), which is much faster.

A grid may leave a parameter's declared range (to find where the design
stops being stable) only when asked (``beyond_range``): the point's
parameter is then widened to hold the value, and rows say so
(``outside_range``).  Point reports are never cached: the analysis cache is
keyed by the preset document, which does not record the pinned controls.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from sheafsynth.engine.analysis.deadline import Deadline
from sheafsynth.engine.analysis.report import check, check_notes, frozen, mapped_box
from sheafsynth.engine.errors import InputError, NotDecided
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.preset import Preset, atomic_write_text
from sheafsynth.host.batch.cluster import run_tasks

__all__ = ["AXIS_POINTS_MAX", "COLUMNS", "Axis", "parse_axis", "outside_range", "point_preset", "check_point",
           "sweep", "csv_text", "write_csv", "write_parquet"]

#: The most values along one axis.
AXIS_POINTS_MAX = 201
#: Result columns after the swept parameters' own (units: radius per sample, Hz, s, dB/s).
COLUMNS = ("stable", "frozen", "spectral_radius", "decay_db_per_s", "radius_exact", "certified", "route",
           "fundamental_hz", "t60_s", "outside_range")
_AXIS = re.compile(r"^\s*([^=\s]+)\s*=\s*([^:]+?)\s*\.\.\s*([^:]+?)\s*:\s*(\d+)\s*$")


@dataclass(frozen=True)
class Axis:
    """One swept parameter: ``count`` evenly spaced values from ``lo`` to ``hi`` (the preset's units)."""

    name: str
    lo: float
    hi: float
    count: int

    @property
    def values(self) -> list[float]:
        return [float(v) for v in np.linspace(self.lo, self.hi, self.count)]


def parse_axis(text: str, preset: Preset) -> Axis:
    """``--param NAME=LO..HI:N`` for a parameter of ``preset``; InputError naming what is wrong."""
    m = _AXIS.match(text)
    if not m:
        raise InputError(f"--param {text!r}: expected NAME=LO..HI:N, e.g. decay=0.97..1.01:11")
    name = m.group(1)
    if name not in preset.parameters:
        known = ", ".join(preset.parameters) or "none"
        raise InputError(f"--param {text!r}: {preset.name} has no parameter {name!r} (it has {known})")
    try:
        lo, hi = float(m.group(2)), float(m.group(3))
    except ValueError:
        raise InputError(f"--param {text!r}: LO and HI must be numbers") from None
    count = int(m.group(4))
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo > hi:
        raise InputError(f"--param {text!r}: expected finite LO <= HI")
    if not 1 <= count <= AXIS_POINTS_MAX or (count == 1) != (lo == hi):
        raise InputError(f"--param {text!r}: N must be 2 to {AXIS_POINTS_MAX} (1 when LO == HI)")
    return Axis(name, lo, hi, count)


def outside_range(axes: list[Axis], preset: Preset) -> list[str]:
    """One line for every axis that leaves its parameter's declared range."""
    out = []
    for a in axes:
        spec = preset.parameters[a.name]
        if a.lo < spec.lo or a.hi > spec.hi:
            out.append(f"{a.name} {a.lo:g}..{a.hi:g} goes outside its declared range {spec.lo:g}..{spec.hi:g}")
    return out


def point_preset(preset: Preset, values: dict[str, float]) -> Preset:
    """``preset`` with the parameters in ``values`` held there: value set, range widened to include it if
    needed, and every control of theirs pinned to it (module doc)."""
    specs = dict(preset.parameters)
    for name, v in values.items():
        s = specs[name]
        specs[name] = dataclasses.replace(s, lo=min(s.lo, v), hi=max(s.hi, v))
    widened = dataclasses.replace(preset, parameters=specs)
    held = widened.with_values(values)
    controls = [dataclasses.replace(c, lo=values[c.parameter], hi=values[c.parameter])
                if c.parameter in values else c for c in held.controls]
    return dataclasses.replace(held, controls=controls)


def _fundamental(report: dict) -> tuple[float | None, float | None]:
    for m in report.get("modes", []):
        if m.get("fundamental"):
            return float(m["freq_hz"]), m.get("t60_s")
    return None, None


def check_point(preset: Preset, values: dict[str, float], notes: list[int] | None, rate: float,
                stability_only: bool, time_limit_s: float | None) -> dict[str, Any]:
    """One row of the sweep: ``values`` and the check's answers there (runs on a worker)."""
    variant = point_preset(preset, values)
    row: dict[str, Any] = {k: float(v) for k, v in values.items()}
    row.update({c: None for c in COLUMNS})
    row["outside_range"] = any(not preset.parameters[k].lo <= v <= preset.parameters[k].hi
                               for k, v in values.items())
    try:
        if stability_only:
            fz = frozen(lower(variant, rate), mapped_box(variant), check_notes(variant, notes), Deadline(time_limit_s))
            status, radius, exact = fz["status"], fz["radius_max"], fz["exact"]
        else:
            rep = check(variant, notes, rate, use_cache=False, time_limit_s=time_limit_s)
            status, radius, exact = rep["frozen"], rep["spectral_radius_max"], rep["radius_exact"]
            row["certified"] = str(rep["certified"]).lower()
            row["route"] = rep.get("route")
            row["fundamental_hz"], row["t60_s"] = _fundamental(rep)
    except NotDecided:
        row["frozen"] = "not decided"
        return row
    row["stable"] = status in ("stable", "drift")
    row["frozen"] = status
    row["spectral_radius"] = float(radius)
    row["decay_db_per_s"] = 20.0 * math.log10(max(float(radius), 1e-300)) * rate
    row["radius_exact"] = bool(exact)
    return row


def sweep(client: Any, preset: Preset, axes: list[Axis], notes: list[int] | None, rate: float, *,
          stability_only: bool = False, time_limit_s: float | None = None) -> list[dict[str, Any]]:
    """Check every point of the grid ``axes`` span on ``client``'s cluster; rows with the first axis
    varying slowest."""
    grids = np.meshgrid(*[a.values for a in axes], indexing="ij")
    points = [{a.name: float(g.flat[k]) for a, g in zip(axes, grids)} for k in range(grids[0].size)]
    args = [(preset, p, notes, float(rate), stability_only, time_limit_s) for p in points]
    return run_tasks(client, check_point, args, label="sweeping")


def csv_text(rows: list[dict[str, Any]]) -> str:
    """The rows as CSV (a header line, then one line a grid point; empty fields for missing values)."""
    buf = io.StringIO()
    if rows:
        w = csv.DictWriter(buf, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({k: ("" if v is None else v) for k, v in r.items()})
    return buf.getvalue()


def write_parquet(rows: list[dict[str, Any]], path: Path) -> bool:
    """Write the rows as Parquet through a temporary file; False when pyarrow is not installed."""
    try:
        # lazy: pyarrow is optional and heavy
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        return False
    tmp = path.with_name(f".{path.name}.tmp")
    try:
        pq.write_table(pa.Table.from_pylist(rows), str(tmp))
        tmp.replace(path)
    finally:
        tmp.unlink(missing_ok=True)
    return True


def write_csv(rows: list[dict[str, Any]], path: Path) -> None:
    """Write the rows as CSV atomically."""
    atomic_write_text(path, csv_text(rows))

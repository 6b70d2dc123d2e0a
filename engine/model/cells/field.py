"""``field``: a cellular sheaf on a 1- or 2-complex driven by its sheaf Laplacian.

A field cell is a surface or line (plate, membrane, bar, twisted strip,
bridge) carried as a sheaf with stalk R^d on every vertex and edge of a cell
complex (engine.model.complexes).  Its state is the displacement ``u`` and the
previous displacement ``u_prev`` on every kept vertex (V*d floats each, per
voice); one sample advances it by one leapfrog (or diffusion) step.  The
geometry is engine.model.complexes, the twists, the boundary treatment and
the consistency check engine.model.field_sheaf, the parsed model
engine.model.cells.field_model and the stability check (with the update
formula's derivation) engine.model.cells.field_stability; this module parses
the JSON, builds the model and describes the ports.  Lowering, C generation and the
NumPy reference live in engine.ir.fields, engine.backends.reference.field and engine.backends.c.emitters.field.

JSON shape
----------
::

    {"id": "plate", "kind": "field",
     "complex": {"grid": [32, 32], "wrap": "torus"},   # or {"path": N, "wrap": ...}
                                                        # or {"vertices": V, "edges": [...], "faces": [...]}
     "boundary": "free",            # "fixed" | "free" (open edges; default "free")
     "stalk": 1,                    # d >= 1 (default 1)
     "twist": {"seam": -1},         # optional restriction-map twists (engine.model.field_sheaf)
     "consistency": "refuse",       # "refuse" | "report" inconsistent faces (default "refuse")
     "dynamics": "wave",            # "wave" | "stiff" | "diffusion" (default "wave")
     "speed": "tension",            # entry: Courant number lambda (diffusion: nu)
     "loss": 0.0001,                # entry: sigma, loss per sample (default 0)
     "hf_loss": 0.0002,             # entry: eta, frequency-dependent loss (default 0)
     "stiffness": 0.2,              # entry: beta (dynamics "stiff" only)

Rates: speed, loss, hf_loss and stiffness written as plain entries are per
sample at the preset's design rate (engine.model.timebase); at another rate
losses keep their rate per second, and so do the speed and stiffness of an
untuned field (its Courant number follows the rate; a tuned field's speed
is relative).  Physical forms: ``{"per_second": entry}`` for any of them
(for loss: 1/s, amplitude falls as exp(-x t)), ``{"t60": seconds}`` for
loss.  Wires into a field are scaled by :func:`input_scale` so a strike
keeps its force.
     "strike": [0.31, 0.27],        # point: where input port 0 drives the field
     "pickup": [0.62, {"param": "pick", "scale": 0.5, "offset": 0.25}],
     "tune": "pitch",               # optional: the played note sets the time scale
     "precision": "auto"}           # optional: kernel state "single" | "double" | "auto"

An *entry* is a number, a parameter name or ``{"param", "scale",
"offset"}`` (engine.preset.affine): CCs can move every one of them.

A *position* is a fraction in [0, 1] for a path (or ``[p]``), ``[p0, p1]``
for a grid (fractions along axis 0 and axis 1), or ``{"vertex": id}`` on any
complex; every fraction may be an entry, so a knob moves the point.
Weights interpolate linearly (path) or bilinearly (grid) between
neighbouring vertices (engine.model.positions.position_weights), so the point
moves smoothly; moving a pickup changes only output weights and moving a
strike only input weights, neither touches stability.  A *point* is a
position or ``{"at": position, "direction": [a_1, ..., a_d]}``; the
direction (default the first stalk axis) says which stalk component the
port drives or reads.  Points on a fixed rim are silent and refused when
they are constant.

Defaults: ``strike`` at 0.23 (path) / [0.23, 0.31] (grid), ``pickup`` at
0.71 / [0.71, 0.62]; explicit complexes must give both.

``precision``: the kernel keeps the state in float32 ("single") or double.
"auto" (default) picks double for fields of at most 512 DOFs and for fields
with drift modes (a free plate's translation, a free bar's rigid motions:
modes at z = 1 add up float32 rounding without bound); single otherwise.
Double costs about half the speed of a large field.

Ports
-----
Input port 0 is the strike point, output port 0 the pickup point (both of
dimension 1).  A wire into or out of a field may carry ``"at": point``:
the wire then gets a port of its own at that point, numbered after the
existing ones in wire order (inputs 1, 2, ... and outputs 1, 2, ...).
That is how a bridge is built: a wire from a string's loop into the field
``at`` a vertex, and a wire from the field ``at`` the same vertex back
into the loop.  A wire with ``at`` must have exactly one field end and
must not also name a port (``plate.1``).  Example::

    {"from": "string1", "to": "bridge", "at": [0.5, 0.2], "gain": 0.02},
    {"from": "bridge", "to": "string1", "at": [0.5, 0.2], "gain": 0.4}

Examples
--------
A tuned drum head with fixed rim::

    {"id": "head", "kind": "field", "complex": {"grid": [42, 42]}, "boundary": "fixed",
     "speed": "tension", "loss": 0.00012, "strike": [0.4, 0.37], "pickup": [0.55, 0.6],
     "tune": "pitch"}

A free-free bar::

    {"id": "bar", "kind": "field", "complex": {"path": 16}, "boundary": "free",
     "dynamics": "stiff", "speed": 0, "stiffness": 0.4, "loss": 0.00005,
     "strike": 0.5, "pickup": 0.02, "tune": "pitch"}

A twisted gong (the Mobius seam carries the sign twist by default)::

    {"id": "gong", "kind": "field", "complex": {"grid": [10, 40], "wrap": "mobius"},
     "boundary": "fixed", "speed": 0.5, "loss": "damp", "strike": [0.3, 0.1],
     "pickup": [0.6, "orbit"]}
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Mapping

import numpy as np

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.field_model import FieldModel, Point, TuneSpec
from sheafsynth.engine.model.cells.field_stability import check_stability
from sheafsynth.engine.model.cells.model import CellModel
from sheafsynth.engine.model.complexes import CellComplex
from sheafsynth.engine.model.timebase import Timebase
from sheafsynth.engine.model.field_sheaf import check_consistency, field_sheaf_from_cell
from sheafsynth.engine.preset.affine import Affine, parse_entry

__all__ = ["DYNAMICS", "KEYS", "PRECISIONS", "DEFAULT_STRIKE", "DEFAULT_PICKUP", "parse_point", "build", "input_scale",
           "attach_ports", "field_symbols", "field_maps"]

DYNAMICS = ("wave", "stiff", "diffusion")
KEYS = ("id", "kind", "about", "complex", "boundary", "stalk", "twist", "consistency", "dynamics",
        "speed", "loss", "hf_loss", "stiffness", "strike", "pickup", "tune", "precision")
PRECISIONS = ("auto", "single", "double")
DEFAULT_STRIKE = {"path": 0.23, "grid": [0.23, 0.31]}
DEFAULT_PICKUP = {"path": 0.71, "grid": [0.71, 0.62]}


# --------------------------------------------------------------------------
# parsing


def _range(e: Affine, parameters) -> tuple[float, float]:
    """Smallest and largest value of an affine entry over the parameter box."""
    lo = hi = e.const
    for s, c in e.terms:
        p = parameters[s]
        a, b = c * p.lo, c * p.hi
        lo += min(a, b)
        hi += max(a, b)
    return lo, hi


def parse_point(raw, path: str, cx: CellComplex, stalk: int, boundary: str, parameters) -> Point:
    """Parse a point (module doc) and check it stays on the complex over the parameter box."""
    direction = (1.0,) + (0.0,) * (stalk - 1)
    pos, ppath = raw, path
    if isinstance(raw, dict) and "at" in raw:
        for key in raw:
            if key not in ("at", "direction"):
                raise PresetError(f"unknown key {key!r} (expected at, direction)", f"{path}.{key}")
        pos, ppath = raw["at"], path + ".at"
        if "direction" in raw:
            dr = raw["direction"]
            if not isinstance(dr, list) or len(dr) != stalk:
                raise PresetError(f"a direction is a list of {stalk} number(s) (the stalk dimension)",
                                  path + ".direction")
            vals = []
            for k, x in enumerate(dr):
                if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
                    raise PresetError(f"must be a finite number, got {x!r}", f"{path}.direction[{k}]")
                vals.append(float(x))
            if not any(vals):
                raise PresetError("a direction must not be all zeros", path + ".direction")
            direction = tuple(vals)
    if isinstance(pos, dict) and "vertex" in pos:
        if set(pos) != {"vertex"}:
            extra = sorted(set(pos) - {"vertex"})[0]
            raise PresetError(f"unknown key {extra!r} (expected vertex)", f"{ppath}.{extra}")
        v = pos["vertex"]
        if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < cx.n_vertices:
            raise PresetError(f"vertex must be an integer in 0..{cx.n_vertices - 1}, got {v!r}",
                              ppath + ".vertex")
        if boundary == "fixed" and cx.boundary is not None and cx.boundary[v]:
            raise PresetError(f"vertex {v} is on the fixed rim: it never moves", ppath + ".vertex")
        return Point(path, vertex=int(v), direction=direction)
    if cx.kind == "explicit" or cx.shape is None:
        raise PresetError('positions on an explicit complex are {"vertex": id}', ppath)
    n_axes = len(cx.shape)
    scalar = not isinstance(pos, list)
    items = [pos] if scalar else pos
    if len(items) != n_axes or (scalar and n_axes != 1):
        raise PresetError(f"needs {n_axes} fraction(s) for a {cx.kind}, got {pos!r}", ppath)
    coords = []
    for k, x in enumerate(items):
        cp = ppath if scalar else f"{ppath}[{k}]"
        e = parse_entry(x, cp, parameters)
        lo, hi = _range(e, parameters)
        if lo < 0.0 or hi > 1.0:
            where = f"{lo:g}" if lo < 0.0 else f"{hi:g}"
            raise PresetError(f"a position is a fraction in [0, 1]; this one reaches {where} over the "
                              "parameter range", cp)
        coords.append(e)
    return Point(path, coords=tuple(coords), direction=direction, scalar=scalar)


def _parse_tune(raw, path: str) -> TuneSpec | None:
    if raw is None:
        return None
    if raw == "pitch":
        return TuneSpec()
    if isinstance(raw, dict):
        for key in raw:
            if key not in ("ratio", "cents"):
                raise PresetError(f"unknown key {key!r} (expected ratio, cents)", f"{path}.{key}")
        vals = {}
        for key, default in (("ratio", 1.0), ("cents", 0.0)):
            x = raw.get(key, default)
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
                raise PresetError(f"must be a finite number, got {x!r}", f"{path}.{key}")
            vals[key] = float(x)
        if not 0.0 < vals["ratio"] <= 64.0:
            raise PresetError(f"ratio {vals['ratio']:g} must lie in (0, 64]", path + ".ratio")
        if abs(vals["cents"]) > 2400.0:
            raise PresetError(f"cents {vals['cents']:g} must lie within +-2400", path + ".cents")
        return TuneSpec(vals["ratio"], vals["cents"])
    raise PresetError('tune is "pitch" or {"ratio": r, "cents": c}', path)


def _rate_entries(spec: dict, path: str, parameters, dynamics: str, tuned: bool,
                  tb: Timebase) -> tuple[Affine, Affine, Affine, Affine]:
    """speed, loss, hf_loss, stiffness per sample at ``tb.rate``.

    Per-sample values (design rate) keep their rate per second: loss,
    hf_loss, and the speed (Courant number, or diffusion number) and
    stiffness of an untuned field scale by fs0/fs.  A tuned field's speed
    and stiffness are relative (the played note sets the time scale), so
    they are used as written.  ``{"per_second": x}`` is x / fs; loss also
    takes ``{"t60": seconds}``.
    """
    def entry(key: str, default: float | None, t60: bool = False, relative: bool = False) -> Affine:
        if key not in spec:
            if default is None:
                raise PresetError(f'a field with this dynamics needs "{key}"', path)
            return Affine.number(default)
        if relative:
            return parse_entry(spec[key], f"{path}.{key}", parameters)
        return tb.rate_entry(spec[key], f"{path}.{key}", parameters, t60=t60)

    speed = entry("speed", 0.0 if dynamics == "stiff" else None, relative=tuned)
    loss = entry("loss", 0.0, t60=True)
    if dynamics == "diffusion" and "hf_loss" in spec:
        raise PresetError("hf_loss belongs to wave and stiff dynamics", path + ".hf_loss")
    hf = entry("hf_loss", 0.0)
    if dynamics != "stiff" and "stiffness" in spec:
        raise PresetError('stiffness needs "dynamics": "stiff"', path + ".stiffness")
    stiffness = entry("stiffness", None if dynamics == "stiff" else 0.0, relative=tuned)
    return speed, loss, hf, stiffness


def input_scale(dynamics: str, tb: Timebase) -> float:
    """Factor on a field's per-sample input so a strike keeps its force at ``tb.rate``.

    A second-order (wave, stiff) step adds dt^2 times the force, a
    diffusion step dt times it: (fs0/fs)^2 or fs0/fs.  Exactly 1 at the design rate.
    """
    if tb.native:
        return 1.0
    return 1.0 / tb.ratio if dynamics == "diffusion" else 1.0 / (tb.ratio * tb.ratio)


def build(spec: dict, path: str, parameters: Mapping, tb: Timebase) -> CellModel:
    """Build a field cell at ``tb.rate``: parse, check consistency and (untuned) stability."""
    for key in spec:
        if key not in KEYS:
            raise PresetError(f"unknown key {key!r} in a field cell", f"{path}.{key}")
    sheaf = field_sheaf_from_cell(spec, path)
    cx = sheaf.complex
    boundary = spec.get("boundary", "free")
    cx.kept_vertices(boundary, path + ".boundary")      # checks "fixed" / "free" and that state is left
    holonomy = check_consistency(sheaf, spec.get("consistency", "refuse"), path + ".consistency")
    dynamics = spec.get("dynamics", "wave")
    if dynamics not in DYNAMICS:
        raise PresetError(f"must be one of {', '.join(DYNAMICS)}, got {dynamics!r}", path + ".dynamics")
    tune = _parse_tune(spec.get("tune"), path + ".tune")
    speed, loss, hf, stiffness = _rate_entries(spec, path, parameters, dynamics, tune is not None, tb)
    if tune is not None and dynamics == "diffusion":
        raise PresetError("a diffusion field has no pitch to tune", path + ".tune")
    d = sheaf.stalk
    points = []
    for key, defaults in (("strike", DEFAULT_STRIKE), ("pickup", DEFAULT_PICKUP)):
        raw = spec.get(key)
        if raw is None:
            if cx.kind == "explicit":
                raise PresetError(f'a field on an explicit complex needs "{key}": {{"vertex": id}}', path)
            raw = defaults[cx.kind]
        points.append(parse_point(raw, f"{path}.{key}", cx, d, boundary, parameters))
    precision = spec.get("precision", "auto")
    if precision not in PRECISIONS:
        raise PresetError(f"must be one of {', '.join(PRECISIONS)}, got {precision!r}", path + ".precision")
    model = FieldModel(spec["id"], path, cx, sheaf, boundary, dynamics, speed, loss, hf, stiffness, tune,
                       [points[0]], [points[1]], {n: p.value for n, p in parameters.items()}, holonomy,
                       precision)
    for pt in points:
        _check_audible(model, pt)
    if tune is None:
        check_stability(model, parameters)
    return CellModel(spec["id"], "field", 1, 1, extra={"field": model})


def _check_audible(model: FieldModel, pt: Point) -> None:
    if not pt.parametric and not np.any(model.weights(pt)):
        raise PresetError("this point lies on the fixed rim: it never moves", pt.path)


# --------------------------------------------------------------------------
# ports made by wires with "at"

def _field_end(raw: str, index: Mapping[str, int], cells: list[CellModel]):
    name, _, port = raw.partition(".")
    ci = index.get(name)
    if ci is None or cells[ci].kind != "field":
        return None, port
    return ci, port


def attach_ports(cells: list[CellModel], index: Mapping[str, int], wires: list, parameters) -> dict:
    """Give every wire with ``at`` a port of its own on its field end.

    Replaces the field cells in ``cells`` (more ports) and returns
    ``{wire index: ("to" | "from", port)}``.
    """
    ports: dict[int, tuple[str, int]] = {}
    for i, w in enumerate(wires):
        if "at" not in w:
            continue
        path = f"wires[{i}]"
        src, sport = _field_end(str(w.get("from", "")), index, cells)
        dst, dport = _field_end(str(w.get("to", "")), index, cells)
        if src is None and dst is None:
            raise PresetError('"at" places a wire on a field; neither end of this wire is a field cell',
                              path + ".at")
        if src is not None and dst is not None:
            raise PresetError('both ends are fields, so "at" is ambiguous; route the wire through a gain '
                              'cell', path + ".at")
        role, ci, port = ("to", dst, dport) if dst is not None else ("from", src, sport)
        if port:
            raise PresetError(f'give either a port ("{w[role]}") or "at", not both', f"{path}.{role}")
        cell = cells[ci]
        model: FieldModel = cell.extra["field"]
        pt = parse_point(w["at"], path + ".at", model.complex, model.stalk, model.boundary, parameters)
        if role == "to":
            model = replace(model, inputs=model.inputs + [pt])
            new = replace(cell, n_in=cell.n_in + 1, extra={"field": model})
            ports[i] = ("to", cell.n_in)
        else:
            model = replace(model, outputs=model.outputs + [pt])
            new = replace(cell, n_out=cell.n_out + 1, extra={"field": model})
            ports[i] = ("from", cell.n_out)
        _check_audible(model, pt)
        cells[ci] = new
    return ports


# --------------------------------------------------------------------------
# display (engine.model.sheaf.NetworkSheaf.restriction_maps / parameter_dependence)

def field_symbols(cell: CellModel) -> set[str]:
    """Parameters a field cell's update and points depend on."""
    m: FieldModel = cell.extra["field"]
    out: set[str] = set()
    for e in (m.speed, m.loss, m.hf_loss, m.stiffness):
        out.update(e.symbols)
    for pt in m.inputs + m.outputs:
        out.update(pt.symbols)
    return out


def field_maps(cell: CellModel) -> list[dict]:
    """The field's restriction maps and update in words, for ``inspect``."""
    m: FieldModel = cell.extra["field"]
    cx = m.complex
    twisted = int(np.sum(np.any(np.abs(m.sheaf.tail_maps - np.eye(m.stalk)) > 0, axis=(1, 2))))
    rows = [{"cell": m.name, "map": "restriction maps",
             "form": f"R^{m.stalk} stalks on {cx.n_vertices} vertices and {cx.n_edges} edges of a "
                     f"{cx.kind} ({cx.wrap}); identity except {twisted} twisted edge(s); dim H^0 = {m.h0()}"},
            {"cell": m.name, "map": "state update",
             "form": f"{m.dynamics} step on {m.n_dof} DOFs, {m.boundary} boundary; speed {m.speed.describe()}, "
                     f"loss {m.loss.describe()}, hf_loss {m.hf_loss.describe()}, "
                     f"stiffness {m.stiffness.describe()}" + ("; tuned to the played note" if m.tune else "")}]
    for h in m.holonomy:
        rows.append({"cell": m.name, "map": "holonomy", "form": h.describe()})
    return rows

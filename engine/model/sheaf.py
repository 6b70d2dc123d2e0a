"""The network sheaf of a preset: cells, stalks, wires and restriction maps.

Read as a sheaf on the wiring graph (DESIGN §1): the stalk over a cell is
its augmented state ``[inputs ; state]``; the stalk over a wire is the
signal it carries.  The restriction map from a cell to an outgoing wire is
the cell's output map ``[D C]`` (restricted to the chosen port); the map
from the receiving cell to the wire picks the port the wire feeds, scaled by
the wire's gain.  One time step of the whole network is a global section
problem solved in evaluation order.

This object is what ``sheafsynth inspect`` prints and what the lowering
consumes; it is built once per preset and validated as it is built.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import Any

from sheafsynth.engine.preset.affine import AffineMatrix, parse_entry, parse_matrix
from sheafsynth.engine.preset.spec import Preset
from sheafsynth.engine.model.cells import CellModel, build_cell
from sheafsynth.engine.model.cells.field import attach_ports, field_maps, field_symbols, input_scale
from sheafsynth.engine.model.rate_maps import excitation_band
from sheafsynth.engine.model.timebase import Timebase
from sheafsynth.engine.errors import PresetError

__all__ = ["EXCITE", "OUT", "EXCITATION_BAND_CELL", "Wire", "NetworkSheaf", "build_sheaf", "sheaf_of",
           "delay_free_loop", "evaluation_order"]

EXCITE = -1   # the voice's excitation input (an endpoint, not a cell)
OUT = -2      # the voice's output (an endpoint, not a cell)


@dataclass(frozen=True)
class Wire:
    """A wire from a source port to a destination port with a gain matrix.

    ``gain`` is ``dst_dim x src_dim``.  ``src``/``dst`` are cell indices or
    the EXCITE / OUT endpoints; ``*_port`` is None for the whole stalk.
    """

    index: int
    src: int
    src_port: int | None
    dst: int
    dst_port: int | None
    gain: AffineMatrix
    at: object = None

    @property
    def src_dim(self) -> int:
        return self.gain.cols

    @property
    def dst_dim(self) -> int:
        return self.gain.rows


@dataclass
class NetworkSheaf:
    """Cells and wires of one voice, with their stalk dimensions checked."""

    cells: list[CellModel]
    wires: list[Wire]
    index: dict[str, int]

    def name(self, i: int) -> str:
        if i == EXCITE:
            return "excite"
        if i == OUT:
            return "out"
        return self.cells[i].name

    def end_name(self, i: int, port: int | None) -> str:
        return self.name(i) + ("" if port is None else f".{port}")

    def successors(self, i: int) -> list[int]:
        return [w.dst for w in self.wires if w.src == i and w.dst >= 0]

    def restriction_maps(self) -> list[dict]:
        """Every restriction map, with its parameter dependence, for display."""
        out: list[dict[str, Any]] = []
        for c in self.cells:
            if c.delay is not None:
                length = "pitch" if c.delay.pitch else str(c.delay.length)
                out.append({"cell": c.name, "map": "state update",
                            "form": f"shift register of {length} samples (identity chain)"})
                out.append({"cell": c.name, "map": "output", "form": f"u[n - {length}]"})
                continue
            if c.kind == "field":
                out.extend(field_maps(c))
                continue
            if c.n_state:
                out.append({"cell": c.name, "map": "state update [B A]",
                            "rows": _hstack(c.B, c.A)})
            out.append({"cell": c.name, "map": "output [D C]", "rows": _hstack(c.D, c.C)})
        for w in self.wires:
            out.append({"wire": w.index, "from": self.end_name(w.src, w.src_port),
                        "to": self.end_name(w.dst, w.dst_port), "map": "gain",
                        "rows": w.gain.describe()})
        return out

    def parameter_dependence(self) -> dict[str, list[str]]:
        """Parameter name -> the cells and wires whose maps it moves."""
        dep: dict[str, list[str]] = {}
        for c in self.cells:
            syms = set()
            for m in (c.A, c.B, c.C, c.D):
                if m is not None:
                    syms |= m.symbols
            if c.kind == "field":
                syms |= field_symbols(c)
            for s in syms:
                dep.setdefault(s, []).append(c.name)
        for w in self.wires:
            for s in w.gain.symbols:
                dep.setdefault(s, []).append(f"wire {self.end_name(w.src, w.src_port)} -> "
                                             f"{self.end_name(w.dst, w.dst_port)}")
        return dep


def _hstack(left: AffineMatrix | None, right: AffineMatrix | None) -> list[list[str]]:
    """Rows of ``[left | right]`` as text; a missing matrix has no rows."""
    lrows = left.rows if left is not None else 0
    rrows = right.rows if right is not None else 0
    rows = []
    for i in range(max(lrows, rrows)):
        lr = [e.describe() for e in left.entries[i]] if left is not None and i < lrows else []
        rr = [e.describe() for e in right.entries[i]] if right is not None and i < rrows else []
        rows.append(lr + ["|"] + rr)
    return rows


def _parse_end(raw: str, path: str, index: dict[str, int], cells: list[CellModel], role: str):
    name, _, port = raw.partition(".")
    if name == "excite":
        if role != "from":
            raise PresetError('"excite" is the voice input; wires leave it, never enter it', path)
        if port:
            raise PresetError('"excite" has a single port', path)
        return EXCITE, None, 1
    if name == "out":
        if role != "to":
            raise PresetError('"out" is the voice output; wires enter it, never leave it', path)
        if port:
            raise PresetError('"out" has a single port', path)
        return OUT, None, 1
    if name not in index:
        raise PresetError(f'unknown cell "{name}"', path)
    ci = index[name]
    cell = cells[ci]
    n = cell.n_out if role == "from" else cell.n_in
    if port:
        p = int(port)
        if p >= n:
            side = "output" if role == "from" else "input"
            raise PresetError(f'cell "{name}" has {n} {side} port(s); port {p} does not exist', path)
        return ci, p, 1
    return ci, None, n


_SHEAVES: dict[tuple[int, float], tuple[weakref.ref, NetworkSheaf]] = {}


def sheaf_of(preset: Preset, rate: float | None = None) -> NetworkSheaf:
    """The network sheaf of ``preset`` at ``rate`` Hz (default: its design rate).

    Built once per preset object and rate and kept while the preset lives.
    Raises PresetError (with the JSON path) when the cells or wires are
    malformed or a quantity cannot be carried to ``rate``; a failed build
    is not cached.  Not for the audio thread.
    """
    fs = float(preset.design_rate if rate is None else rate)
    key = (id(preset), fs)
    hit = _SHEAVES.get(key)
    if hit is not None and hit[0]() is preset:
        return hit[1]
    sheaf = build_sheaf(preset, Timebase(fs, preset.design_rate))
    _SHEAVES[key] = (weakref.ref(preset), sheaf)
    weakref.finalize(preset, _SHEAVES.pop, key, None)
    return sheaf


def _scaled(m: AffineMatrix, k: float) -> AffineMatrix:
    return AffineMatrix(m.rows, m.cols, tuple(tuple(e.scaled(k) for e in row) for row in m.entries))


def build_sheaf(preset: Preset, tb: Timebase) -> NetworkSheaf:
    """Build and validate a new network sheaf of a parsed preset at ``tb`` (``sheaf_of`` caches it)."""
    raw = preset.raw
    params = preset.parameters
    cells: list[CellModel] = []
    index: dict[str, int] = {}
    for i, spec in enumerate(raw["cells"]):
        path = f"cells[{i}]"
        cid = spec["id"]
        if cid in index:
            raise PresetError(f'cell id "{cid}" is used twice (first at cells[{index[cid]}])', path + ".id")
        cell = build_cell(spec, path, params, tb)
        index[cid] = len(cells)
        cells.append(cell)
    wires: list[Wire] = []
    at_ports = attach_ports(cells, index, raw["wires"], params)   # field ports made by "at"
    for i, w in enumerate(raw["wires"]):
        path = f"wires[{i}]"
        src, sp, sdim = _parse_end(w["from"], path + ".from", index, cells, "from")
        dst, dp, ddim = _parse_end(w["to"], path + ".to", index, cells, "to")
        if i in at_ports:
            role, port = at_ports[i]
            if role == "to":
                dp, ddim = port, 1
            else:
                sp, sdim = port, 1
        graw = w.get("gain", 1.0)
        if isinstance(graw, list):
            gain = parse_matrix(graw, path + ".gain", params)
            if (gain.rows, gain.cols) != (ddim, sdim):
                raise PresetError(
                    f'gain is {gain.rows}x{gain.cols} but {w["from"]} carries {sdim} and '
                    f'{w["to"]} takes {ddim} (expected {ddim}x{sdim})', path + ".gain")
        else:
            g = parse_entry(graw, path + ".gain", params)
            if sdim != ddim:
                raise PresetError(
                    f'stalk mismatch: {w["from"]} has dimension {sdim} but {w["to"]} has '
                    f'dimension {ddim}; give a {ddim}x{sdim} gain matrix or pick ports', path)
            gain = AffineMatrix.identity(sdim, g)
        if dst >= 0 and cells[dst].kind == "field" and not tb.native:
            gain = _scaled(gain, input_scale(cells[dst].extra["field"].dynamics, tb))
        wires.append(Wire(i, src, sp, dst, dp, gain, w.get("at")))
    if tb.ratio > 1.0:
        _band_limit_excitation(cells, wires, tb)
    sheaf = NetworkSheaf(cells, wires, index)
    _check_wiring(sheaf)
    return sheaf


EXCITATION_BAND_CELL = "excite~band"   # the cell the model adds above the design rate (not a JSON id)


def _band_limit_excitation(cells: list[CellModel], wires: list[Wire], tb: Timebase) -> None:
    """Route the excitation through a lowpass at 0.45 fs0 (rate_maps.excitation_band), above the design rate only.

    Filters written per sample at the design rate fs0 repeat their response
    above fs0/2 when they run faster (a two-tap average at 96 kHz passes 48
    kHz again); nothing in the design says what should ring there, so the
    excitation is kept out of that band and every loop rings as designed.
    """
    band = len(cells)
    a, b, c, d = excitation_band(tb.design_rate, tb.rate)
    cells.append(CellModel(EXCITATION_BAND_CELL, "statespace", 1, 1, AffineMatrix.from_numbers(a.tolist()),
                           AffineMatrix.from_numbers(b.tolist()), AffineMatrix.from_numbers(c.tolist()),
                           AffineMatrix.from_numbers(d.tolist())))
    for k, w in enumerate(wires):
        if w.src == EXCITE:
            wires[k] = Wire(w.index, band, None, w.dst, w.dst_port, w.gain, w.at)
    wires.append(Wire(-1, EXCITE, None, band, None, AffineMatrix.identity(1)))


def _check_wiring(sheaf: NetworkSheaf) -> None:
    if not any(w.dst == OUT for w in sheaf.wires):
        raise PresetError('no wire reaches "out": the voice would be silent', "wires")
    if not any(w.src == EXCITE for w in sheaf.wires):
        raise PresetError('no wire leaves "excite": nothing would ever sound', "wires")
    loop = delay_free_loop(sheaf)
    if loop:
        names = " -> ".join(sheaf.cells[i].name for i in loop + [loop[0]])
        raise PresetError(f"loop with no delay in it: {names} (put a delay or a filter state in the loop)",
                          "wires")


def delay_free_loop(sheaf: NetworkSheaf) -> list[int] | None:
    """A cycle made only of cells with direct feedthrough, or None."""
    ft = {i for i, c in enumerate(sheaf.cells) if c.feedthrough}
    adj = {i: sorted({w.dst for w in sheaf.wires if w.src == i and w.dst in ft}) for i in ft}
    colour = dict.fromkeys(ft, 0)
    stack: list[int] = []

    def visit(v: int) -> list[int] | None:
        colour[v] = 1
        stack.append(v)
        for u in adj[v]:
            if colour[u] == 1:
                return stack[stack.index(u):]
            if colour[u] == 0:
                found = visit(u)
                if found:
                    return found
        colour[v] = 2
        stack.pop()
        return None

    for v in sorted(ft):
        if colour[v] == 0:
            found = visit(v)
            if found:
                return list(found)
    return None


def evaluation_order(sheaf: NetworkSheaf) -> list[int]:
    """Cells with feedthrough in dependency order (the others need no order)."""
    ft = [i for i, c in enumerate(sheaf.cells) if c.feedthrough]
    ftset = set(ft)
    deps = {i: {w.src for w in sheaf.wires if w.dst == i and w.src in ftset} for i in ft}
    order: list[int] = []
    done: set[int] = set()
    while len(order) < len(ft):
        for i in ft:
            if i not in done and deps[i] <= done:
                order.append(i)
                done.add(i)
    return order

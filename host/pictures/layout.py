"""What the network picture shows, as plain data: nodes in columns, wires with gains, knobs, tuning loops.

Columns are the longest wire path from the ``excite`` input once the
wires that close loops (found by a depth-first walk) are set aside;
``out`` takes the last column; a wire that runs back to an earlier or the
same column closes a loop and is drawn as an arc.  Gains are the restriction
maps' text (engine.model.sheaf.NetworkSheaf.restriction_maps); knobs are
the parameters each cell or wire depends on, with the MIDI controller that
moves them when the preset maps one; tuning loops come from the step
program (engine.ir.lower).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset import Preset

__all__ = ["NetNode", "NetWire", "NetworkPicture", "network_picture", "EXCITE", "OUT"]

EXCITE, OUT = "excite", "out"


@dataclass
class NetNode:
    """A cell (or the excite input, or the out output) at ``column`` / ``row`` of the picture."""

    name: str
    kind: str
    detail: str = ""
    knobs: list[str] = field(default_factory=list)
    tuned: bool = False
    in_loop: bool = False
    column: int = 0
    row: int = 0


@dataclass
class NetWire:
    """One wire: its gain as text, the knobs it depends on, whether it closes a loop or a tuning loop."""

    src: str
    dst: str
    gain: str
    knobs: list[str] = field(default_factory=list)
    back: bool = False
    tuning: bool = False


@dataclass
class NetworkPicture:
    nodes: dict[str, NetNode]
    wires: list[NetWire]
    loops: list[str]          # one line a tuning loop: "loop -> avg -> tune -> loop (fraction: tune)"
    columns: int


def _knob_label(name: str, ccs: dict[str, list[str]]) -> str:
    return f"{name} ({', '.join(ccs[name])})" if name in ccs else name


def _node_of(end: str, nodes: dict[str, NetNode]) -> str:
    """The node a wire end names: a cell id, or ``cell.port`` (the port is dropped)."""
    if end in nodes:
        return end
    head = end.rpartition(".")[0]
    return head if head in nodes else end


def _columns(names: list[str], edges: list[tuple[str, str]]) -> dict[str, int]:
    """Column of every node: the longest path from excite over the wires a depth-first walk does not find
    running back to a node still on its stack (those close loops)."""
    succ: dict[str, list[str]] = {n: [] for n in names}
    for a, b in edges:
        succ.setdefault(a, []).append(b)
        succ.setdefault(b, [])
    back: set[tuple[str, str]] = set()
    state: dict[str, int] = {}
    for root in [EXCITE] + [n for n in succ if n != EXCITE]:
        if root in state:
            continue
        stack = [(root, iter(succ[root]))]
        state[root] = 1
        while stack:
            node, it = stack[-1]
            nxt = next(it, None)
            if nxt is None:
                state[node] = 2
                stack.pop()
            elif state.get(nxt) == 1:
                back.add((node, nxt))
            elif nxt not in state:
                state[nxt] = 1
                stack.append((nxt, iter(succ[nxt])))
    depth = {n: 0 for n in succ}
    for _ in range(len(succ)):                 # longest path in a DAG: at most |V| relaxation rounds
        changed = False
        for a, b in edges:
            if (a, b) not in back and depth[b] < depth[a] + 1:
                depth[b] = depth[a] + 1
                changed = True
        if not changed:
            break
    return depth


def network_picture(preset: Preset, rate: float = 48000.0) -> NetworkPicture:
    """The network of ``preset`` at ``rate`` Hz as nodes, wires, knobs and tuning loops (module doc)."""
    sheaf = sheaf_of(preset, rate)
    prog = lower(preset, rate)
    ccs: dict[str, list[str]] = {}
    for ctl in preset.controls:
        if ctl.parameter:
            ccs.setdefault(ctl.parameter, []).append(f"CC {ctl.cc}" if ctl.source == "cc" else ctl.source)
    nodes: dict[str, NetNode] = {EXCITE: NetNode(EXCITE, "input"), OUT: NetNode(OUT, "output")}
    for c in sheaf.cells:
        if c.delay is not None:
            detail = "pitch length" if c.delay.pitch else f"{c.delay.length} samples"
        elif "field" in (c.extra or {}):
            cx = c.extra["field"].complex
            shape = " x ".join(str(s) for s in cx.shape) if cx.shape else f"{cx.n_vertices} vertices"
            wrap = f", {cx.wrap}" if cx.wrap not in ("none", "") else ""
            detail = f"{cx.kind} {shape}{wrap}"
        else:
            detail = f"{c.n_state} states"
        tuned = bool(c.tune) or ("field" in (c.extra or {}) and c.extra["field"].tune is not None)
        nodes[c.name] = NetNode(c.name, c.kind, detail, tuned=tuned)
    wires: list[NetWire] = []
    for m in sheaf.restriction_maps():
        if "wire" not in m:
            continue
        entries = m.get("rows") or [[m.get("form", "")]]
        gain = "; ".join(" ".join(r) for r in entries)
        wires.append(NetWire(_node_of(str(m["from"]), nodes), _node_of(str(m["to"]), nodes), gain))
    for param, moved in sheaf.parameter_dependence().items():
        if param.startswith("@"):          # the lowering's own per-note values, not knobs
            continue
        label = _knob_label(param, ccs)
        for what in moved:
            if what.startswith("wire "):
                src, _, dst = what[5:].partition(" -> ")
                src, dst = _node_of(src, nodes), _node_of(dst, nodes)
                for w in wires:
                    if w.src == src and w.dst == dst and label not in w.knobs:
                        w.knobs.append(label)
            elif what in nodes:
                nodes[what].knobs.append(label)
    loops: list[str] = []
    for lp in prog.loops:
        names = [prog.blocks[lp.delay].name] + [prog.blocks[s.block].name for s in lp.steps]
        tuner = prog.blocks[lp.tuner].name if lp.tuner is not None else "none (length rounded)"
        loops.append(" -> ".join(names + [names[0]]) + f"   (fraction: {tuner})")
        ring = list(zip(names, names[1:] + names[:1]))
        for n in names:
            if n in nodes:
                nodes[n].in_loop = True
        for w in wires:
            if (w.src, w.dst) in ring:
                w.tuning = True
    # columns: longest wire path from excite once the wires that close loops are set aside; out last
    depth = _columns(list(nodes), [(w.src, w.dst) for w in wires])
    last = max([d for n, d in depth.items() if n != OUT], default=0) + 1
    depth[OUT] = last
    rows: dict[int, int] = {}
    for name, node in nodes.items():
        node.column = depth[name]
        node.row = rows.get(node.column, 0)
        rows[node.column] = node.row + 1
    for w in wires:
        w.back = depth[w.dst] <= depth[w.src]
    return NetworkPicture(nodes, wires, loops, last + 1)

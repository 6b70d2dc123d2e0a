"""Draw an instrument for ``inspect --plot FILE.png|FILE.svg``: network, each field's complex, its lowest modes.

Visual language (ours): cells are rounded boxes in columns from the
``excite`` input (left) to ``out`` (right); a field is a green box, a delay
a blue one, filters grey; a box with a gold edge is tuned to the played
note; wires are arrows labelled with their gain, arcs when they run back
(a loop), orange when they belong to a tuning loop; knobs (and the MIDI
controller that moves them) are written in violet under the box or wire
they move.  Each field gets a row: its complex (vertices as dots, clamped
rim vertices hollow, wrapped seams dashed, the strike as a red triangle
and the pickup as a blue square; a violet dotted line shows where a knob
moves either), then its lowest mode shapes (eigenvectors of
lambda^2 L + beta^2 S at the defaults, host.pictures.modes) coloured from
-1 (blue) to +1 (red), with each mode's frequency ratio to the lowest.

matplotlib is the optional ``plot`` extra, imported when a picture is
drawn; without it PlotUnavailable is raised before anything is written.
The file is written to a temporary name in the same folder, then renamed.
In the SVG every field's vertex dots form one group with id
``field<k>-vertices`` (k counts the fields from 0).
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np

from sheafsynth.engine.errors import InputError, PlotUnavailable
from sheafsynth.engine.model.cells.field_model import FieldModel, Point, f32
from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset import Preset, atomic_write_bytes
from sheafsynth.host.pictures.layout import NetworkPicture, network_picture
from sheafsynth.host.pictures.modes import lowest_modes

__all__ = ["FORMATS", "MODES_SHOWN", "draw_instrument", "vertex_xy", "point_xy"]

#: File extensions ``inspect --plot`` writes, and matplotlib's format name for each.
FORMATS = {".png": "png", ".svg": "svg"}
#: How many of the lowest ringing modes each field row shows.
MODES_SHOWN = 4

_KIND_COLOUR = {"field": "#cfe8cf", "delay": "#cfdcf0", "input": "#f4f4f4", "output": "#f4f4f4"}
_KNOB, _TUNING, _STRIKE, _PICKUP = "#7a3fa0", "#e07b00", "#c62828", "#1f5fb4"


def _pyplot():
    try:
        import matplotlib  # noqa: PLC0415  (lazy: the optional plot extra, heavy to import)

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise PlotUnavailable("inspect --plot needs matplotlib: pip install sheafsynth[plot] "
                              "(nothing was written)") from None
    return plt


def vertex_xy(model: FieldModel) -> np.ndarray:
    """(n_vertices, 2) drawing positions: grid fractions, a path along x, explicit complexes on a circle."""
    cx = model.complex
    if cx.coords is None:
        t = 2 * np.pi * np.arange(cx.n_vertices) / max(1, cx.n_vertices)
        return np.column_stack([0.5 + 0.45 * np.cos(t), 0.5 + 0.45 * np.sin(t)])
    c = np.asarray(cx.coords, dtype=float)
    if c.shape[1] == 1:
        return np.column_stack([c[:, 0], np.zeros(len(c))])
    sy, sx = _spans(model)
    return np.column_stack([c[:, 1] * sx, sy * (1.0 - c[:, 0])])   # axis 1 across, axis 0 down (grid rows)


def _spans(model: FieldModel) -> tuple[float, float]:
    """Drawing lengths of a 2-D complex's axes (0, 1), so that the grid spacing is the same both ways."""
    shape = model.complex.shape
    if not shape or len(shape) != 2:
        return 1.0, 1.0
    big = float(max(shape))
    return shape[0] / big, shape[1] / big


def point_xy(model: FieldModel, point: Point, env: dict[str, float] | None = None) -> np.ndarray | None:
    """Where ``point`` (strike or pickup) sits at ``env`` (default: the parameter defaults), as a drawing position."""
    xy = vertex_xy(model)
    if point.vertex is not None:
        return xy[point.vertex]
    if model.complex.coords is None:
        return None
    vals = {**model.defaults, **(env or {})}
    fr = [min(1.0, max(0.0, f32(c.value(vals)))) for c in point.coords]
    if len(fr) == 1:
        return np.array([fr[0], 0.0])
    sy, sx = _spans(model)
    return np.array([fr[1] * sx, sy * (1.0 - fr[0])])


def _draw_network(ax, net: NetworkPicture) -> None:
    from matplotlib.patches import FancyArrowPatch, FancyBboxPatch  # noqa: PLC0415  (lazy: plot extra)

    tall = max(n.row for n in net.nodes.values()) + 1
    pos = {}
    for name, n in net.nodes.items():
        col_rows = sum(1 for m in net.nodes.values() if m.column == n.column)
        pos[name] = (n.column * 3.0, (tall - col_rows) / 2.0 + n.row * 2.0)
    for w in net.wires:
        (x0, y0), (x1, y1) = pos[w.src], pos[w.dst]
        colour = _TUNING if w.tuning else "0.25"
        skips = net.nodes[w.dst].column - net.nodes[w.src].column > 1
        style = "arc3,rad=-0.45" if w.back else ("arc3,rad=0.25" if skips else "arc3,rad=0.0")
        ax.add_patch(FancyArrowPatch((x0 + 0.9, y0), (x1 - 0.9, y1) if not w.back else (x1 + 0.3, y1 - 0.3),
                                     connectionstyle=style, arrowstyle="-|>", mutation_scale=12, color=colour,
                                     lw=1.8 if w.tuning else 1.1))
        mx, my = (x0 + x1) / 2.0, (y0 + y1) / 2.0 + (-0.75 if w.back else (-0.9 if skips else 0.18))
        ax.text(mx, my, f"x {w.gain}", ha="center", va="bottom", fontsize=7, color=colour)
        if w.knobs:
            ax.text(mx, my - 0.05, "knob: " + ", ".join(w.knobs), ha="center", va="top", fontsize=6.5,
                    color=_KNOB)
    for name, n in net.nodes.items():
        x, y = pos[name]
        face = _KIND_COLOUR.get(n.kind, "#e6e6e6")
        ax.add_patch(FancyBboxPatch((x - 0.9, y - 0.42), 1.8, 0.84, boxstyle="round,pad=0.05,rounding_size=0.2",
                                    facecolor=face, edgecolor="#c79a00" if n.tuned else "0.3",
                                    lw=2.4 if n.tuned else 1.0))
        ax.text(x, y + 0.12, name, ha="center", va="center", fontsize=8.5, fontweight="bold")
        sub = n.kind if not n.detail else f"{n.kind}: {n.detail}"
        ax.text(x, y - 0.17, sub + ("  (tuned)" if n.tuned else ""), ha="center", va="center", fontsize=6.5)
        if n.knobs:
            ax.text(x, y - 0.52, "knob: " + ", ".join(n.knobs), ha="center", va="top", fontsize=6.5, color=_KNOB)
    ax.set_xlim(-1.4, (net.columns - 1) * 3.0 + 1.4)
    ax.set_ylim(-1.6, tall * 2.0 + 0.4)
    ax.set_aspect("equal")
    ax.axis("off")
    lines = ["tuning loops:"] + [f"  {s}" for s in net.loops] if net.loops else ["tuning loops: none"]
    ax.text(0.0, 0.0, "\n".join(lines), transform=ax.transAxes, fontsize=7, color=_TUNING, va="bottom")


def _draw_complex(ax, model: FieldModel, k: int, preset: Preset) -> None:
    from matplotlib.collections import LineCollection  # noqa: PLC0415  (lazy: plot extra)

    cx = model.complex
    xy = vertex_xy(model)
    seam = cx.seam if cx.seam is not None else np.full(cx.n_edges, -1)
    inner = [(xy[a], xy[b]) for e, (a, b) in enumerate(cx.edges) if seam[e] < 0]
    ax.add_collection(LineCollection(inner, colors="0.7", linewidths=0.5))
    kept = np.zeros(cx.n_vertices, dtype=bool)
    kept[model.kept] = True
    faces = np.where(kept[:, None], np.array([[0.2, 0.2, 0.2, 1.0]]), np.array([[1.0, 1.0, 1.0, 1.0]]))
    size = 14.0 if cx.n_vertices < 200 else 5.0
    dots = ax.scatter(xy[:, 0], xy[:, 1], s=size, c=faces, edgecolors="0.2", linewidths=0.5, zorder=3)
    dots.set_gid(f"field{k}-vertices")
    seam_note = ""
    if (seam >= 0).any():
        seam_note = "\ndashed edge: " + ("Möbius seam (twisted)" if cx.wrap == "mobius" else f"{cx.wrap} seam (wraps)")
        for axis in sorted({int(s) for s in seam if s >= 0}):
            if np.ptp(xy[:, 1]) == 0 or axis == 1:
                ax.axvline(xy[:, 0].max() + 0.5 / max(1, cx.shape[-1] if cx.shape else 1), ls="--", color="0.4")
            else:
                ax.axhline(xy[:, 1].min() - 0.5 / max(1, cx.shape[0] if cx.shape else 1), ls="--", color="0.4")
    for points, marker, colour, label in ((model.inputs, "^", _STRIKE, "strike"),
                                          (model.outputs, "s", _PICKUP, "pickup")):
        for i, pt in enumerate(points):
            at = point_xy(model, pt)
            if at is None:
                continue
            for name in sorted(pt.symbols):
                spec = preset.parameters.get(name)
                if spec is not None:
                    ends = [point_xy(model, pt, {name: v}) for v in (spec.lo, spec.hi)]
                    if ends[0] is not None and ends[1] is not None:
                        ax.plot([ends[0][0], ends[1][0]], [ends[0][1], ends[1][1]], ls=":", lw=2.0, color=_KNOB,
                                zorder=4)
                        ax.text(ends[1][0], ends[1][1], f" {name}", fontsize=6.5, color=_KNOB, zorder=6)
            ax.scatter([at[0]], [at[1]], s=90, marker=marker, color=colour, edgecolors="k", zorder=5,
                       label=label if i == 0 else None)
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.02), ncol=2, fontsize=6.5, framealpha=0.85)
    ax.set_title(f"{model.name}: {cx.kind} {' x '.join(map(str, cx.shape or ()))}, {model.boundary} rim, "
                 f"{model.dynamics}{seam_note}", fontsize=8.5)
    ax.set_aspect("equal" if np.ptp(xy[:, 1]) > 0 else "auto")
    ax.margins(0.08)
    ax.set_xticks([])
    ax.set_yticks([])


def _draw_mode(ax, model: FieldModel, values: np.ndarray, title: str) -> None:
    xy = vertex_xy(model)
    if np.ptp(xy[:, 1]) == 0:                    # a path: the shape as a curve
        order = np.argsort(xy[:, 0])
        ax.axhline(0.0, color="0.8", lw=0.8)
        ax.plot(xy[order, 0], values[order], color="#2e7d32", lw=1.6, marker="o", ms=2.5)
        ax.set_ylim(-1.15, 1.15)
    elif model.complex.kind == "grid" and model.complex.shape is not None and len(model.complex.shape) == 2:
        sy, sx = _spans(model)                  # vertex v = row * columns + column
        ax.imshow(values.reshape(model.complex.shape), cmap="coolwarm", vmin=-1.0, vmax=1.0,
                  extent=(0.0, sx, 0.0, sy), interpolation="nearest")
    else:
        size = 30.0 if model.complex.n_vertices < 400 else 9.0
        ax.scatter(xy[:, 0], xy[:, 1], c=values, cmap="coolwarm", vmin=-1.0, vmax=1.0, s=size, marker="s",
                   linewidths=0)
        ax.set_aspect("equal")
    ax.set_title(title, fontsize=8)
    ax.set_xticks([])
    ax.set_yticks([])


def _fields(preset: Preset, rate: float) -> list[FieldModel]:
    return [c.extra["field"] for c in sheaf_of(preset, rate).cells if c.extra and "field" in c.extra]


def draw_instrument(preset: Preset, path: str | os.PathLike, rate: float = 48000.0) -> Path:
    """Draw ``preset`` at ``rate`` Hz to ``path`` (.png or .svg), atomically; returns the path written.

    InputError for another extension; PlotUnavailable without matplotlib
    (both before anything is written).
    """
    target = Path(path)
    fmt = FORMATS.get(target.suffix.lower())
    if fmt is None:
        raise InputError(f"--plot {target}: the file name must end in {' or '.join(FORMATS)}")
    plt = _pyplot()
    net = network_picture(preset, rate)
    fields = _fields(preset, rate)
    cols = 1 + MODES_SHOWN
    fig = plt.figure(figsize=(3.2 * cols, 4.2 + 3.0 * len(fields)))
    grid = fig.add_gridspec(1 + len(fields), cols, height_ratios=[1.4] + [1.0] * len(fields))
    try:
        fig.suptitle(f"{preset.name}: network, fields and lowest modes (at the parameter defaults)", fontsize=11,
                     fontweight="bold")
        _draw_network(fig.add_subplot(grid[0, :]), net)
        for k, model in enumerate(fields):
            _draw_complex(fig.add_subplot(grid[1 + k, 0]), model, k, preset)
            modes = lowest_modes(model, MODES_SHOWN)
            for j in range(MODES_SHOWN):
                ax = fig.add_subplot(grid[1 + k, 1 + j])
                if j < len(modes):
                    m = modes[j]
                    _draw_mode(ax, model, m.values, f"mode {j + 1}: {m.ratio:.3f} x the lowest")
                else:
                    ax.axis("off")
        fig.tight_layout()
        buf = io.BytesIO()
        fig.savefig(buf, format=fmt, dpi=100)
    finally:
        plt.close(fig)
    return atomic_write_bytes(target, buf.getvalue())

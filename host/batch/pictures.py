"""Pictures of batch results: a bake's contact sheet and a sweep's heat map (PNG).

matplotlib is the optional ``plot`` extra: it is imported lazily, and when
it is missing these functions return False and the caller says so in one
line; the batch job itself still succeeds.
"""

from __future__ import annotations

import math
import os
import tempfile
from pathlib import Path
from typing import Any, Sequence

import numpy as np

__all__ = ["SHEET_MAX_TAKES", "contact_sheet", "heat_map"]

#: The most takes a contact sheet shows (the first ones in map order).
SHEET_MAX_TAKES = 48


def _pyplot() -> Any | None:
    try:
        # lazy: matplotlib is an optional extra and slow to import
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    return plt


def _save(plt: Any, fig: Any, path: Path) -> None:
    """Save ``fig`` as PNG through a temporary file renamed into place."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".png", dir=path.parent)
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=110, format="png")
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    finally:
        plt.close(fig)


def contact_sheet(path: Path, takes: Sequence[tuple[str, np.ndarray]], rate: float) -> bool:
    """Write a PNG with a waveform and a magnitude spectrum (dB, log frequency) thumbnail per take.

    ``takes`` holds (label, mono samples at ``rate`` Hz).  False when matplotlib is missing.
    """
    plt = _pyplot()
    if plt is None:
        return False
    shown = list(takes)[:SHEET_MAX_TAKES]
    cols = 4
    rows = max(1, math.ceil(len(shown) / cols))
    fig, axes = plt.subplots(rows, 2 * cols, figsize=(4 * cols, 1.3 * rows + 0.4), squeeze=False)
    for ax in axes.flat:
        ax.set_axis_off()
    for k, (label, audio) in enumerate(shown):
        r, c = divmod(k, cols)
        aw, asp = axes[r][2 * c], axes[r][2 * c + 1]
        aw.set_axis_on()
        asp.set_axis_on()
        t = np.arange(len(audio)) / rate
        aw.plot(t, audio, lw=0.4, color="#224")
        aw.set_ylim(-1, 1)
        aw.set_title(label, fontsize=6)
        n = max(1, len(audio))
        spec = np.abs(np.fft.rfft(audio * np.hanning(n))) if len(audio) else np.zeros(1)
        f = np.fft.rfftfreq(n, 1.0 / rate)
        db = 20 * np.log10(np.maximum(spec / max(float(spec.max()), 1e-30), 1e-6))
        asp.semilogx(np.maximum(f, 20.0), db, lw=0.4, color="#a42")
        asp.set_xlim(20, rate / 2)
        asp.set_ylim(-100, 3)
        for ax in (aw, asp):
            ax.tick_params(labelsize=4, length=1)
    fig.tight_layout(pad=0.3)
    _save(plt, fig, path)
    return True


def heat_map(path: Path, x_name: str, x: Sequence[float], y_name: str, y: Sequence[float],
             value: np.ndarray, unstable: np.ndarray, title: str) -> bool:
    """Write a PNG heat map of ``value`` (shape len(y) x len(x)) with unstable cells marked by a cross;
    values of both signs get a diverging colour scale centred on 0.

    False when matplotlib is missing.
    """
    plt = _pyplot()
    if plt is None:
        return False
    fig, ax = plt.subplots(figsize=(6.5, 5))
    xs, ys = np.asarray(x, float), np.asarray(y, float)
    v = np.asarray(value, float)
    finite = v[np.isfinite(v)]
    norm = None
    if len(finite) and finite.min() < 0 < finite.max():     # a diverging scale with 0 at its centre
        # lazy: part of matplotlib, imported with it (module doc)
        from matplotlib.colors import TwoSlopeNorm

        norm = TwoSlopeNorm(vmin=float(finite.min()), vcenter=0.0, vmax=float(finite.max()))
    im = ax.pcolormesh(xs, ys, v, shading="nearest", cmap="coolwarm" if norm else "viridis", norm=norm)
    fig.colorbar(im, ax=ax, label=title)
    yy, xx = np.nonzero(np.asarray(unstable, bool))
    if len(xx):
        ax.scatter(xs[xx], ys[yy], marker="x", color="black", s=30, label="unstable")
        ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=7, frameon=False)
    ax.set_xlabel(x_name)
    ax.set_ylabel(y_name)
    fig.tight_layout()
    _save(plt, fig, path)
    return True

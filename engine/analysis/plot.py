"""The check plot: poles against the unit circle, the partial ladder, T60 bars, modal amplitude bars (one PNG).

matplotlib is the optional ``plot`` extra, imported when a plot is drawn.
Frequencies in Hz, T60 in s, amplitudes in dB re a unit impulse
(engine.analysis.modes: the peak of each partial in the impulse response
from the excitation input to the output).  Amplitude bars start at a floor
:data:`AMPLITUDE_RANGE_DB` below the loudest partial, so their lengths read
as dB below it.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from sheafsynth.engine.analysis.modes import Mode
from sheafsynth.engine.errors import PlotUnavailable

__all__ = ["AMPLITUDE_RANGE_DB", "amplitude_bars", "plot_report"]

#: dB below the loudest partial where the amplitude bars start.
AMPLITUDE_RANGE_DB = 60.0


def _cents(c: float) -> str:
    v = round(float(c), 1)
    return f"{0.0 if v == 0 else v:+.1f} c"


def amplitude_bars(mode_list: Sequence[Mode]) -> tuple[list[str], list[float], float] | None:
    """(labels, amplitude dB, floor dB) of the amplitude panel, partials ascending in frequency.

    Partials without an amplitude (no input known) or at minus infinity
    sit at the floor; None when no partial has an amplitude.
    """
    srt = sorted(mode_list, key=lambda m: m.freq_hz)
    known = [float(m.amplitude_db) for m in srt if m.amplitude_db is not None and math.isfinite(m.amplitude_db)]
    if not known:
        return None
    floor = max(known) - AMPLITUDE_RANGE_DB
    vals = [max(floor, float(m.amplitude_db)) if m.amplitude_db is not None and math.isfinite(m.amplitude_db)
            else floor for m in srt]
    return [f"{m.freq_hz:.0f} Hz {m.note_name}" for m in srt], vals, floor


def plot_report(
    path,
    poles: Sequence[complex],
    mode_list: Sequence[Mode],
    *,
    title: str = "",
    spectral_radius: float | None = None,
) -> None:
    """Write one PNG: poles and unit circle, partial ladder, T60 bars, modal amplitude bars.

    matplotlib is imported here (the plot extra); PlotUnavailable if absent.
    """
    try:
        import matplotlib  # noqa: PLC0415

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise PlotUnavailable("install the plot extra: pip install sheafsynth[plot]") from None

    pz = np.asarray(list(poles), dtype=complex)
    ms = list(mode_list)
    fig, (ax_z, ax_l, ax_t, ax_a) = plt.subplots(1, 4, figsize=(20, 5.2),
                                                 gridspec_kw={"width_ratios": [1, 1.1, 1.3, 1.3]})
    if title:
        fig.suptitle(title, fontsize=13, fontweight="bold")

    # 1. poles against the unit circle
    th = np.linspace(0, 2 * np.pi, 512)
    ax_z.plot(np.cos(th), np.sin(th), color="0.3", lw=1.0, label="unit circle")
    if pz.size:
        out = np.abs(pz) >= 1.0
        ax_z.scatter(pz.real[~out], pz.imag[~out], s=9, color="tab:blue", label="pole (decays)")
        if out.any():
            ax_z.scatter(pz.real[out], pz.imag[out], s=22, color="tab:red", marker="x",
                         label="pole on/outside (rings or grows)")
    rho = spectral_radius if spectral_radius is not None else (float(np.max(np.abs(pz))) if pz.size else 0)
    ax_z.set_title(f"Poles against the unit circle\nspectral radius {rho:.8f} (1 − ρ = {1 - rho:.2e})",
                   fontsize=10)
    ax_z.set_aspect("equal")
    ax_z.set_xlim(-1.15, 1.15)
    ax_z.set_ylim(-1.15, 1.15)
    ax_z.axhline(0, color="0.85", lw=0.6)
    ax_z.axvline(0, color="0.85", lw=0.6)
    ax_z.set_xlabel("Re z")
    ax_z.set_ylabel("Im z")
    ax_z.legend(loc="lower left", fontsize=7, framealpha=0.8)
    angles = [abs(np.angle(m.eigenvalue)) for m in ms if m.freq_hz > 0]
    if pz.size and angles and max(angles) < 0.6:  # partials crowd z = 1: add a zoom
        span = max(angles) * 1.15 + 0.01
        ins = ax_z.inset_axes([0.50, 0.50, 0.46, 0.46])
        arc = np.linspace(-0.02, span, 200)
        ins.plot(np.cos(arc), np.sin(arc), color="0.3", lw=1.0)
        near = (np.abs(np.angle(pz)) <= span) & (pz.imag >= 0)
        ins.scatter(pz.real[near], pz.imag[near], s=8,
                    color=np.where(np.abs(pz[near]) >= 1.0, "tab:red", "tab:blue"))
        ins.set_xlim(math.cos(span) - 0.01, 1.01)
        ins.set_ylim(-0.01, math.sin(span) + 0.01)
        ins.text(0.04, 0.04, "zoom near z = 1", transform=ins.transAxes, fontsize=7, color="0.3")
        ins.tick_params(labelsize=6)

    # 2. partial ladder vs harmonic series (log frequency: one octave per unit)
    fund = [m for m in ms if m.is_fundamental]
    pos = [m for m in ms if m.freq_hz > 0]
    f0 = fund[0].freq_hz if fund else (min(m.freq_hz for m in pos) if pos else None)
    ax_l.set_title("Partials (right) vs harmonic series of f0 (left)", fontsize=10)
    if f0:
        hs = set(range(1, 9)) | {m.harmonic_number for m in pos if m.harmonic_number > 0}
        top = max([max(hs)] + [m.freq_hz / f0 for m in pos])
        for h in sorted(hs):
            if h > top * 1.05:
                continue
            ax_l.hlines(math.log2(h), 0.55, 1.0, color="0.6", lw=1.0, linestyles="dashed")
            ax_l.text(0.53, math.log2(h), f"{h}·f0", ha="right", va="center", fontsize=7, color="0.4")
        for m in pos:
            r = math.log2(m.freq_hz / f0)
            ax_l.hlines(r, 1.1, 1.55, color="tab:green" if m.is_fundamental else "tab:orange", lw=2.2)
            if m.harmonic_number > 0:
                ax_l.plot([1.0, 1.1], [math.log2(m.harmonic_number), r], color="0.7", lw=0.7)
            ax_l.text(1.58, r, f"{m.freq_hz:.1f} Hz {m.note_name} "
                      f"({_cents(m.cents_from_harmonic)} from {m.harmonic_number}·f0)", va="center", fontsize=7)
        ax_l.set_ylim(-0.3, math.log2(top) + 0.3)
    ax_l.set_xlim(0.2, 2.9)
    ax_l.set_xticks([])
    ax_l.set_ylabel("octaves above f0")
    for side in ("top", "right", "bottom"):
        ax_l.spines[side].set_visible(False)

    # 3. T60 bars
    ax_t.set_title("Decay time T60 of the listed partials", fontsize=10)
    if ms:
        srt = sorted(ms, key=lambda m: m.freq_hz)
        labels = [f"{m.freq_hz:.0f} Hz {m.note_name}" for m in srt]
        vals = [m.t60_s if math.isfinite(m.t60_s) else 0.0 for m in srt]
        colors = ["tab:red" if not math.isfinite(m.t60_s) else "tab:blue" for m in srt]
        y = np.arange(len(srt))
        ax_t.barh(y, vals, color=colors)
        vmax = max(vals) if max(vals) > 0 else 1.0
        for yi, m in zip(y, srt):
            txt = "no decay" if not math.isfinite(m.t60_s) else f"{m.t60_s:.2f} s"
            ax_t.text((m.t60_s if math.isfinite(m.t60_s) else 0) + 0.01 * vmax, yi, txt, va="center", fontsize=7)
        ax_t.set_yticks(y)
        ax_t.set_yticklabels(labels, fontsize=7)
        ax_t.set_xlim(0, vmax * 1.18)
    ax_t.set_xlabel("T60 (s)")

    # 4. modal amplitude bars (dB re a unit impulse, from a floor below the loudest)
    ax_a.set_title("Amplitude of the listed partials at the output", fontsize=10)
    bars = amplitude_bars(ms)
    if bars is None:
        ax_a.text(0.5, 0.5, "amplitudes unknown (no excitation input)", ha="center", va="center",
                  transform=ax_a.transAxes, fontsize=8)
        ax_a.set_yticks([])
    else:
        labels, vals, floor = bars
        y = np.arange(len(vals))
        top = max(vals)
        ax_a.barh(y, [v - floor for v in vals], left=floor,
                  color=["tab:green" if v == top else "tab:purple" for v in vals])
        for yi, v in zip(y, vals):
            ax_a.text(v + 0.5, yi, f"{v:.1f} dB", va="center", fontsize=7)
        ax_a.set_yticks(y)
        ax_a.set_yticklabels(labels, fontsize=7)
        ax_a.set_xlim(floor, top + 0.2 * AMPLITUDE_RANGE_DB)
    ax_a.set_xlabel("amplitude (dB re unit impulse)")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)

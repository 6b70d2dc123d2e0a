"""check --plot: the modal amplitude bars (engine.analysis.plot.amplitude_bars and the fourth panel)."""

from __future__ import annotations

import math

import matplotlib.image as mpimg
import numpy as np
import pytest

from sheafsynth.engine.analysis.modes import modes
from sheafsynth.engine.analysis.plot import AMPLITUDE_RANGE_DB, amplitude_bars, plot_report

FS = 48000.0


def _two_resonators(f1: float, f2: float, r: float, g1: float, g2: float):
    """Two two-pole resonators in parallel: H_k(z) = g_k / (1 - 2 r cos(t_k) z^-1 + r^2 z^-2)."""
    blocks = []
    for f in (f1, f2):
        t = 2 * math.pi * f / FS
        blocks.append(np.array([[2 * r * math.cos(t), -r * r], [1.0, 0.0]]))
    A = np.zeros((4, 4))
    A[:2, :2], A[2:, 2:] = blocks
    B = np.array([[g1], [0.0], [g2], [0.0]])
    C = np.array([[1.0, 0.0, 1.0, 0.0]])
    return A, B, C


def test_amplitude_bars_follow_the_resonators_peak_amplitudes(tmp_path):
    # The impulse response of g / (1 - 2 r cos t z^-1 + r^2 z^-2) is g r^n sin((n+1) t) / sin t
    # (inverse z-transform by partial fractions; Oppenheim & Schafer, Discrete-Time Signal Processing,
    # 3rd ed., sec. 3.3), so its envelope starts at g / sin t: the two bars differ by
    # 20 log10((g1 / sin t1) / (g2 / sin t2)) dB.
    f1, f2, g1, g2 = 440.0, 1250.0, 1.0, 0.25
    A, B, C = _two_resonators(f1, f2, 0.9995, g1, g2)
    ms = modes(A, C, FS, B=B, count=4, f_lo_hz=20.0)
    bars = amplitude_bars(ms)
    assert bars is not None
    labels, vals, floor = bars
    assert len(vals) == 2 and labels[0].startswith("440 Hz") and labels[1].startswith("1250 Hz")
    want = 20 * math.log10((g1 / math.sin(2 * math.pi * f1 / FS)) / (g2 / math.sin(2 * math.pi * f2 / FS)))
    assert vals[0] - vals[1] == pytest.approx(want, abs=0.1)
    assert floor == pytest.approx(max(vals) - AMPLITUDE_RANGE_DB)
    out = tmp_path / "check.png"
    plot_report(out, np.linalg.eigvals(A), ms, title="two resonators")
    img = mpimg.imread(out)
    assert img.shape[1] == 20 * 110 and img.shape[0] == round(5.2 * 110)   # four panels, 20 x 5.2 in at 110 dpi


def test_without_an_input_there_are_no_bars():
    A, _, C = _two_resonators(300.0, 900.0, 0.999, 1.0, 1.0)
    ms = modes(A, C, FS, count=4)
    assert all(m.amplitude_db is None for m in ms) and amplitude_bars(ms) is None

"""Tests for engine.analysis.modes: partial frequencies, T60, tuning, drift, plot."""

import builtins
import math

import numpy as np
import pytest
import scipy.sparse as sp

from sheafsynth.engine.errors import AnalysisError, PlotUnavailable, SheafsynthError
from sheafsynth.engine.analysis.modes import (
    all_poles,
    drift_modes,
    modes,
    note_name,
    t60_from_radius,
)
from sheafsynth.engine.analysis.plot import plot_report

from tests.reference_systems import ks_matrix

FS = 48000.0


def ks_output(N):
    C = np.zeros((1, N + 1))
    C[0, 0] = 1.0
    return C


def rotation_block(freq_hz, t60_s, fs=FS):
    """2×2 real block with poles r·e^{±iω}: a damped oscillator (constructed data)."""
    r = 10.0 ** (-3.0 / (fs * t60_s))  # inverse of the T60 definition
    w = 2 * np.pi * freq_hz / fs
    return r * np.array([[np.cos(w), -np.sin(w)], [np.sin(w), np.cos(w)]])


# ---------------------------------------------------------------- plucked string


@pytest.mark.parametrize("N", [100, 201, 400])
def test_plucked_string_partials_sit_at_fs_over_N_plus_half(N):
    """f_k = k·fs/(N + 1/2) for the delay + 2-point average loop
    (Karplus & Strong 1983; Jaffe & Smith 1983).  Tolerance 0.01 cent."""
    g = 0.996
    ms = modes(ks_matrix(N, g), ks_output(N), FS, count=8)
    f0 = FS / (N + 0.5)
    assert len(ms) == 8
    for m in ms:
        k = round(m.freq_hz / f0)
        assert abs(1200 * math.log2(m.freq_hz / (k * f0))) < 0.01
        assert m.harmonic_number == k
        assert abs(m.cents_from_harmonic) < 0.01
    fund = [m for m in ms if m.is_fundamental]
    assert len(fund) == 1 and fund[0].harmonic_number == 1
    assert fund[0].freq_hz == pytest.approx(f0, rel=1e-6)
    # listed by frequency; in this loop higher partials decay faster (the average's loss grows with f)
    assert all(a.freq_hz < b.freq_hz and a.t60_s >= b.t60_s for a, b in zip(ms, ms[1:]))


def test_plucked_string_fundamental_t60_matches_loop_gain_formula():
    """T60 = −3/(f0·log10 G), G = loop gain per period at f0 = g·|cos(π f0/fs)|
    (the 2-point average's magnitude); follows from the definition of T60
    (common practice).  Tolerance 0.1 %."""
    N, g = 150, 0.995
    ms = modes(ks_matrix(N, g), ks_output(N), FS, count=3)
    f0 = ms[0].freq_hz
    G = g * abs(math.cos(math.pi * f0 / FS))
    assert ms[0].is_fundamental
    assert ms[0].t60_s == pytest.approx(-3.0 / (f0 * math.log10(G)), rel=1e-3)


def test_reported_partials_match_rendered_audio():
    """Render the loop's impulse response by stepping x⁺ = Ax, then measure:
    the fundamental's spectral peak (Hann window, 8× zero padding, parabolic
    interpolation on log magnitude) within 1 cent, and its decay (slope of
    the level in that bin across frames) within 10 %.  Measurement method:
    common practice (no source)."""
    N, g = 100, 0.99
    A = ks_matrix(N, g)
    ms = modes(A, ks_output(N), FS, count=4)
    f0 = ms[0].freq_hz
    rng = np.random.default_rng(0)
    x = rng.uniform(-1, 1, N + 1)
    n_samples = 1 << 15
    y = np.empty(n_samples)
    for i in range(n_samples):
        y[i] = x[0]
        x = A @ x
    # frequency of the strongest peak near f0
    seg = y[: 1 << 14] * np.hanning(1 << 14)
    spec = np.abs(np.fft.rfft(seg, 8 << 14))
    freqs = np.fft.rfftfreq(8 << 14, 1 / FS)
    band = (freqs > 0.5 * f0) & (freqs < 1.5 * f0)
    i = np.flatnonzero(band)[np.argmax(spec[band])]
    la, lb, lc = np.log(spec[i - 1 : i + 2])
    shift = 0.5 * (la - lc) / (la - 2 * lb + lc)
    f_meas = freqs[i] + shift * (freqs[1] - freqs[0])
    assert abs(1200 * math.log2(f_meas / f0)) < 1.0
    # decay of that partial
    frame, hop = 4096, 1024
    win = np.hanning(frame)
    bin_f = int(round(f0 * frame / FS))
    levels = []
    for start in range(0, n_samples - frame, hop):
        X = np.fft.rfft(y[start : start + frame] * win)
        levels.append(20 * math.log10(np.abs(X[bin_f - 1 : bin_f + 2]).max()))
    t = (np.arange(len(levels)) * hop + frame / 2) / FS
    slope = np.polyfit(t, levels, 1)[0]  # dB per second, negative
    assert -60.0 / slope == pytest.approx(ms[0].t60_s, rel=0.10)


def test_sparse_path_agrees_with_dense_path():
    N = 300
    A, C = ks_matrix(N, 0.997), ks_output(N)
    dense = modes(A, C, FS, count=6)
    sparse = modes(A, C, FS, count=6, dense_max=50)
    for a, b in zip(dense, sparse):
        assert b.freq_hz == pytest.approx(a.freq_hz, rel=1e-9)
        assert b.t60_s == pytest.approx(a.t60_s, rel=1e-6)


def test_energy_by_cell_sums_to_one_over_a_full_partition():
    N = 80
    part = {"delay": slice(0, N), "average": [N]}
    for m in modes(ks_matrix(N, 0.99), ks_output(N), FS, count=5, partition=part):
        assert sum(m.energy_by_cell.values()) == pytest.approx(1.0, rel=1e-12)
        assert m.energy_by_cell["delay"] > m.energy_by_cell["average"]


# ---------------------------------------------------------------- constructed modes


def test_inharmonic_partials_and_t60_from_constructed_poles():
    """Poles built from chosen (frequency, T60) pairs; 210 Hz against f0 = 100 Hz
    is 1200·log2(210/200) = 84.47 cents above harmonic 2 (definition of the cent)."""
    spec = [(100.0, 2.0), (210.0, 1.5), (300.0, 1.0), (405.0, 0.5)]
    A = np.zeros((8, 8))
    for j, (f, t) in enumerate(spec):
        A[2 * j : 2 * j + 2, 2 * j : 2 * j + 2] = rotation_block(f, t)
    ms = modes(A, np.ones((1, 8)), FS, count=4, partition={f"osc{j}": [2 * j, 2 * j + 1] for j in range(4)})
    got = {round(m.freq_hz, 6): m for m in ms}
    for j, (f, t) in enumerate(spec):
        m = got[round(f, 6)]
        assert m.t60_s == pytest.approx(t, rel=1e-9)
        assert m.energy_by_cell[f"osc{j}"] == pytest.approx(1.0)
    assert got[210.0].harmonic_number == 2
    assert got[210.0].cents_from_harmonic == pytest.approx(1200 * math.log2(210 / 200), rel=1e-9)
    assert got[405.0].harmonic_number == 4
    assert got[100.0].is_fundamental


def test_unobservable_mode_is_dropped_and_weak_low_mode_is_not_fundamental():
    A = np.zeros((6, 6))
    A[0:2, 0:2] = rotation_block(50.0, 3.0)   # loud in the state, weakly seen
    A[2:4, 2:4] = rotation_block(220.0, 2.0)
    A[4:6, 4:6] = rotation_block(330.0, 2.0)  # not seen at all
    C = np.array([[1e-3, 0, 1, 0, 0, 0]])
    ms = modes(A, C, FS, count=5)
    freqs = sorted(round(m.freq_hz, 6) for m in ms)
    assert 330.0 not in freqs
    fund = [m for m in ms if m.is_fundamental]
    assert fund[0].freq_hz == pytest.approx(220.0)


def test_edges_excluded_unless_asked():
    A = np.diag([0.999, -0.999, 0.5])
    assert modes(A, None, FS) == []
    edge = modes(A, None, FS, include_edges=True)
    assert sorted(m.freq_hz for m in edge) == [0.0, 0.0, FS / 2]


# ---------------------------------------------------------------- names and formulas


@pytest.mark.parametrize("f,name", [(440.0, "A4"), (261.6255653, "C4"), (27.5, "A0"), (4186.009045, "C8")])
def test_note_names_follow_midi_numbering(f, name):
    """f = 440·2^((n − 69)/12), note 69 = A4, 60 = C4 (MIDI 1.0 note numbering with ISO 16)."""
    got, cents = note_name(f)
    assert got == name
    assert abs(cents) < 1e-4


def test_note_cents_offset():
    """A quarter tone above A4 is +50 cents (definition of the cent)."""
    got, cents = note_name(440.0 * 2 ** (49 / 1200))
    assert got == "A4" and cents == pytest.approx(49.0)
    with pytest.raises(AnalysisError):
        note_name(0.0)


def test_t60_definition():
    """Amplitude factor r per sample: 60 dB after T60·fs samples (definition of T60)."""
    r = 0.9999
    t = t60_from_radius(r, FS)
    assert r ** (t * FS) == pytest.approx(1e-3, rel=1e-9)
    assert t60_from_radius(1.0, FS) == math.inf


# ---------------------------------------------------------------- drift


def test_drift_modes_name_the_integrating_cell():
    A = np.zeros((4, 4))
    A[0:2, 0:2] = rotation_block(100.0, 1.0)
    A[2, 2] = 1.0            # an accumulator: DC never decays
    A[3, 2], A[3, 3] = 0.5, 0.5
    dm = drift_modes(A, partition={"osc": [0, 1], "acc": [2], "smooth": [3]})
    assert len(dm) == 1
    assert dm[0].dominant_cells[0][0] in ("acc", "smooth")
    assert {c for c, _ in dm[0].dominant_cells} == {"acc", "smooth"}
    assert not dm[0].grows
    assert drift_modes(ks_matrix(50, 0.99).toarray()) == []


def test_drift_jordan_block_grows():
    A = np.array([[1.0, 1.0], [0.0, 1.0]])
    dm = drift_modes(A, partition={"a": [0], "b": [1]})
    assert len(dm) == 1 and dm[0].grows


def test_drift_sparse_path():
    A = sp.block_diag([ks_matrix(900, 0.99), sp.csr_matrix([[1.0]])]).tocsr()
    dm = drift_modes(A, partition={"string": slice(0, 901), "dc": [901]})
    assert len(dm) == 1 and dm[0].dominant_cells[0][0] == "dc"


# ---------------------------------------------------------------- plot


def test_plot_report_writes_a_png(tmp_path):
    N = 120
    A = ks_matrix(N, 0.995)
    ms = modes(A, ks_output(N), FS, count=8)
    out = tmp_path / "report.png"
    plot_report(out, all_poles(A), ms, title="string")
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000


def test_plot_report_without_matplotlib_says_how_to_install(tmp_path, monkeypatch):
    real_import = builtins.__import__

    def fake_import(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError("no matplotlib")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", fake_import)
    with pytest.raises(PlotUnavailable, match=r"pip install sheafsynth\[plot\]"):
        plot_report(tmp_path / "x.png", [], [])
    assert issubclass(PlotUnavailable, SheafsynthError)

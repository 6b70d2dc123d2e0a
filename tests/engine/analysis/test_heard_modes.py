"""The mode report lists what a listener hears: the lowest partials and the strongest at the pickup.

Checks against outside references: the rectangular membrane's mode ratios
(Fletcher & Rossing), the harmonic series of a delay loop, the residues of
the transfer function from scipy.signal, and the T60 definition (ISO 3382-1).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as sig
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from sheafsynth.engine.analysis.assemble import assemble
from sheafsynth.engine.analysis.modes import modes, t60_from_radius
from sheafsynth.engine.analysis.report import check
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.preset import load_preset
from tests.reference_systems import ks_matrix

FS = 48000.0


def square_drum(strike=(0.19, 0.29), pickup=(0.71, 0.57)) -> dict:
    """A fixed-rim square membrane of our own: 32 × 32 grid (30 × 30 moving points), wave dynamics."""
    return {"format": "sheafsynth-preset", "version": 1, "name": "square-drum", "polyphony": 2,
            "cells": [{"id": "head", "kind": "field", "complex": {"grid": [32, 32]}, "boundary": "fixed",
                       "dynamics": "wave", "speed": 0.5, "loss": 1e-4,
                       "strike": list(strike), "pickup": list(pickup)}],
            "wires": [{"from": "excite", "to": "head"}, {"from": "head", "to": "out"}],
            "excitation": {"kind": "impulse"}}


def delay_loop(length: int = 100, gain: float = 0.99) -> dict:
    """A delay of fixed length in feedback with a gain: the plainest lossy loop."""
    return {"format": "sheafsynth-preset", "version": 1, "name": "plain-loop", "polyphony": 2,
            "cells": [{"id": "line", "kind": "delay", "length": length}],
            "wires": [{"from": "excite", "to": "line"}, {"from": "line", "to": "line", "gain": gain},
                      {"from": "line", "to": "out"}],
            "excitation": {"kind": "impulse"}}


def test_square_membrane_reports_its_five_lowest_modes():
    """Fixed-rim square membrane: f_mn ∝ √(m² + n²), so the five lowest distinct
    partials stand to the lowest as √(m²+n²)/√2 for (1,1), (1,2)=(2,1), (2,2),
    (1,3)=(3,1), (2,3)=(3,2) (Fletcher & Rossing, The Physics of Musical
    Instruments, §3.5 rectangular membrane).  Within 1 % (the 30 × 30 grid's
    own dispersion is below 0.4 % for these)."""
    r = check(load_preset(square_drum()), n_modes=10, use_cache=False)
    low = [m for m in r["modes"] if m["lowest"]]
    assert len(low) == 5
    f = [m["freq_hz"] for m in low]
    assert f == sorted(f)
    want = [math.sqrt(m * m + n * n) / math.sqrt(2) for m, n in [(1, 1), (1, 2), (2, 2), (1, 3), (2, 3)]]
    for got, ratio in zip(f, want):
        assert got / f[0] == pytest.approx(ratio, rel=0.01)   # Fletcher & Rossing §3.5
    # the degenerate pairs (m,n) = (n,m) are one partial each, heard once
    assert [m["multiplicity"] for m in low] == [1, 2, 1, 2, 2]
    assert low[0]["fundamental"] and low[0]["harmonic"] == 1
    assert all(m["amplitude_db"] is not None for m in r["modes"])
    # equal losses: all share one T60 (the tie that used to hide the fundamental)
    assert len({round(m["t60_s"], 3) for m in low}) == 1


def test_plain_loop_reports_fs_over_length_and_its_harmonics():
    """A delay of N samples in feedback: partials at k·fs/N (a cyclic shift's
    eigenvalues are the N-th roots of the loop gain), so 480 Hz at 48 kHz for
    N = 100 and every partial a harmonic (cents ≈ 0).  Every partial has
    radius g^(1/N), so T60 = 60 dB / (−20·log10(g^(1/N))·fs) (ISO 3382-1
    reverberation time definition)."""
    r = check(load_preset(delay_loop()), use_cache=False)
    ms = r["modes"]
    assert len(ms) == 8
    assert ms[0]["freq_hz"] == pytest.approx(FS / 100, rel=1e-9) and ms[0]["fundamental"]
    # 480 Hz: MIDI 69 + 12·log2(480/440) = 70.506 → B4, 49.4 cents flat (MIDI numbering, A4 = 440 Hz)
    assert ms[0]["note"] == "B4" and ms[0]["cents_from_note"] == pytest.approx(100 * (12 * math.log2(480 / 440) - 2))
    assert [m["freq_hz"] for m in ms if m["lowest"]] == pytest.approx([480.0, 960.0, 1440.0, 1920.0], rel=1e-9)
    for m in ms:
        k = round(m["freq_hz"] / 480.0)
        assert m["harmonic"] == k and abs(m["cents_from_harmonic"]) < 1e-6
        assert m["t60_s"] == pytest.approx(60.0 / (-20.0 * math.log10(0.99 ** (1 / 100)) * FS), rel=1e-9)
    # an impulse train of period N is Σ_k e^{2πikn/N}/N: every harmonic the same amplitude
    amps = [m["amplitude_db"] for m in ms]
    assert max(amps) - min(amps) < 1e-6


def test_modes_count_sets_how_many_are_listed():
    r = check(load_preset(delay_loop()), n_modes=3, use_cache=False)
    assert len(r["modes"]) == 3 and [m["lowest"] for m in r["modes"]].count(True) == 2


def resonators():
    """Three damped resonators driven in parallel, one output (constructed data)."""
    spec = [(110.0, 2.0, 1.0), (330.0, 1.0, 0.2), (1234.0, 0.5, 3.0)]
    A = np.zeros((6, 6))
    B = np.zeros((6, 1))
    for j, (f, t60, b) in enumerate(spec):
        r = 10.0 ** (-3.0 / (FS * t60))
        w = 2 * np.pi * f / FS
        A[2 * j:2 * j + 2, 2 * j:2 * j + 2] = r * np.array([[np.cos(w), -np.sin(w)], [np.sin(w), np.cos(w)]])
        B[2 * j, 0] = b
    C = np.array([[1.0, 0.3, 0.5, 0.0, 0.2, 0.7]])
    return A, B, C


def test_amplitudes_are_the_residues_of_the_transfer_function():
    """H(z) = C(zI − A)⁻¹B = Σ rᵢ/(1 − pᵢz⁻¹) (scipy.signal.ss2tf and residuez);
    impulse response h[n] = Σ rᵢ pᵢⁿ, so at n = 1 (the first output sample
    after the impulse) a conjugate pair's envelope is 2|rᵢ pᵢ| (dB re 1)."""
    A, B, C = resonators()
    b, a = sig.ss2tf(A, B, C, np.zeros((1, 1)))
    res, poles, _ = sig.residuez(b[0], a)
    ms = modes(A, C, FS, B=B, count=3)
    assert [round(m.freq_hz, 6) for m in ms] == [110.0, 330.0, 1234.0]
    for m in ms:
        i = int(np.argmin(np.abs(poles - m.eigenvalue)))
        assert m.amplitude_db == pytest.approx(20 * math.log10(2 * abs(res[i] * poles[i])), abs=1e-4)   # scipy.signal
        # the polynomial's roots lose digits near the unit circle: 10⁻⁵
        assert m.t60_s == pytest.approx(t60_from_radius(abs(poles[i]), FS), rel=1e-5)
    # energy over the decay: Σ_n (2|r p^n| cos)² ≈ 2|r p|²/(1 − |p|²) (geometric series)
    for m in ms:
        i = int(np.argmin(np.abs(poles - m.eigenvalue)))
        want = 10 * math.log10(2 * abs(res[i] * poles[i]) ** 2 / (1 - abs(poles[i]) ** 2))
        assert m.energy_db == pytest.approx(want, abs=1e-3)
    by_rank = sorted(ms, key=lambda m: m.strength_rank)
    assert [m.strength_rank for m in by_rank] == [1, 2, 3]
    assert [m.energy_db for m in by_rank] == sorted((m.energy_db for m in ms), reverse=True)


def test_sparse_amplitudes_agree_with_dense():
    """The large-system path (shift-invert probes, projected modal inputs) gives the
    dense path's amplitudes, checked against scipy above, to 10⁻³ dB."""
    N = 300
    A, C = ks_matrix(N, 0.997), np.zeros((1, N + 1))
    C[0, 0] = 1.0
    B = np.zeros((N + 1, 1))
    B[3, 0] = 1.0
    dense = modes(A, C, FS, B=B, count=6)
    sparse = modes(A, C, FS, B=B, count=6, dense_max=50)
    assert [m.freq_hz for m in sparse] == pytest.approx([m.freq_hz for m in dense], rel=1e-9)
    for a, b in zip(dense, sparse):
        assert b.amplitude_db == pytest.approx(a.amplitude_db, abs=1e-3)


def test_a_weak_low_mode_does_not_hide_the_fundamental():
    """The fundamental is the lowest strong partial (≥ −20 dB of the strongest, T60 ≥ a tenth of
    the longest) and always listed."""
    A, _, _ = resonators()
    B = np.array([[1e-2], [0.0], [1.0], [0.0], [1.0], [0.0]])   # the 110 Hz resonator 40 dB down
    C = np.array([[1.0, 0.0, 1.0, 0.0, 1.0, 0.0]])
    ms = modes(A, C, FS, B=B, count=3)
    fund = [m for m in ms if m.is_fundamental]
    assert len(fund) == 1 and fund[0].freq_hz == pytest.approx(330.0)
    assert [round(m.freq_hz) for m in ms] == [110, 330, 1234] and ms[0].lowest and ms[1].lowest
    # one place for the lowest: the fundamental takes it from the weaker 110 Hz partial
    assert [round(m.freq_hz) for m in modes(A, C, FS, B=B, count=2)] == [330, 1234]


def test_large_field_amplitudes_are_the_transfer_function_residues():
    """The square drum's 1,800 states take the sparse path.  Each listed partial's
    amplitude is 2·|res|, res = lim (z − zᵢ)·C(zI − A)⁻¹B (the residue of the
    transfer function at the pole, all equal poles together), evaluated here
    by scipy.sparse.linalg.spsolve a hair off the pole; within 0.01 dB."""
    sysm = assemble(lower(load_preset(square_drum()), FS), None, 60)
    assert sysm.n_states > 600
    ms = modes(sysm.A, sysm.C, FS, B=sysm.B, count=8)
    eye = sp.identity(sysm.n_states, format="csc")
    b = sysm.B.toarray()[:, 0].astype(complex)
    for m in ms:
        z = m.eigenvalue
        zt = z + 1e-7 * (1.0 - abs(z)) * 1j * z / abs(z)
        x = spla.spsolve((zt * eye - sysm.A).tocsc().astype(complex), b)
        res = (zt - z) * (sysm.C @ x)[0]
        assert m.amplitude_db == pytest.approx(20 * math.log10(2 * abs(res)), abs=0.01)


def test_a_short_body_resonance_is_listed_but_is_not_the_pitch():
    """cedar-box at note 62 (293.66 Hz, MIDI numbering): its body rings at 196 Hz for
    0.2 s under a string ringing for seconds.  The body is listed (heard at the
    onset); the string's partial is the fundamental, and the body sits between
    harmonics."""
    r = check(load_preset(FACTORY_DIR / "cedar-box.json"), notes=[62], use_cache=False)
    fund = [m for m in r["modes"] if m["fundamental"]]
    assert len(fund) == 1 and fund[0]["freq_hz"] == pytest.approx(440.0 * 2 ** ((62 - 69) / 12), abs=0.05)
    body = [m for m in r["modes"] if m["t60_s"] < 1.0 and m["freq_hz"] < fund[0]["freq_hz"]]
    assert body and body[0]["lowest"] and body[0]["harmonic"] == 1 and body[0]["cents_from_harmonic"] < -500


def test_equal_strings_on_the_sparse_path_are_one_partial_with_an_amplitude():
    """bridge-trio's three equal strings at note 36 (65.41 Hz, MIDI numbering, A4 = 440 Hz)
    give 2,222 states: every eigenvalue comes three times.  The partials are listed
    once each, with amplitudes, the lowest at the played note within 1 cent (the
    tuning goal of the design, 0.5 cent, plus the analysis' rounding)."""
    preset = load_preset(FACTORY_DIR / "bridge-trio.json")
    sysm = assemble(lower(preset, FS), None, 36)
    assert sysm.n_states > 600
    ms = modes(sysm.A, sysm.C, FS, B=sysm.B, count=8)
    assert all(m.amplitude_db is not None for m in ms)
    f0 = 440.0 * 2 ** ((36 - 69) / 12)
    assert ms[0].is_fundamental and abs(1200 * math.log2(ms[0].freq_hz / f0)) < 1.0
    low = [m for m in ms if m.lowest]
    assert [m.harmonic_number for m in low] == [1, 2, 3, 4]
    assert all(abs(m.cents_from_harmonic) < 1.0 for m in low)

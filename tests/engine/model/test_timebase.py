"""Quantities carried from the design rate to the running rate (engine.model.timebase, rate_maps).

Designs are checked against scipy.signal (the bilinear transform with
prewarping, zero-order-hold discretization), Lagrange weights against
scipy.interpolate.lagrange, and the preset-level rules against their
definitions (T60: the time for a 60 dB fall, ISO 3382-1:2009 3.5).
"""

from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import scipy.interpolate
import scipy.signal

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.model.rate_maps import (biquad_design, discretize, lagrange3, onepole_design, rescale_rational,
                                              resample_statespace, respace_taps)
from sheafsynth.engine.model.sheaf import EXCITATION_BAND_CELL, sheaf_of
from sheafsynth.engine.model.timebase import Timebase, excitation_at
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.preset import load_preset
from sheafsynth.engine.preset.affine import Affine

from tests.golden.phrases import V1_DIR


def _v1(name: str) -> dict:
    """A factory preset as it was in format version 1 (tests/golden/v1/)."""
    return json.loads((V1_DIR / f"{name}.json").read_text())


V1_PLUCK = _v1("porch-pluck")


@pytest.mark.parametrize("kind", ["lowpass", "highpass"])
@pytest.mark.parametrize("rate", [44100.0, 48000.0, 96000.0])
def test_onepole_design_is_the_prewarped_bilinear_butterworth(kind, rate):
    b, a = onepole_design(kind, 1200.0, rate)
    sb, sa = scipy.signal.butter(1, 1200.0, btype=kind, fs=rate)   # scipy: bilinear, prewarped
    np.testing.assert_allclose(b, sb, rtol=1e-12)
    np.testing.assert_allclose(a, sa, rtol=1e-12)


@pytest.mark.parametrize("kind", ["lowpass", "highpass"])
def test_biquad_design_at_q_one_over_root_two_is_the_second_order_butterworth(kind):
    # RBJ cookbook LPF/HPF with Q = 1/sqrt(2) is the bilinear Butterworth (prewarped)
    b, a = biquad_design(kind, 3000.0, 1 / math.sqrt(2), 0.0, 44100.0)
    sb, sa = scipy.signal.butter(2, 3000.0, btype=kind, fs=44100.0)
    np.testing.assert_allclose(b, sb, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(a, sa, rtol=1e-10, atol=1e-14)


def test_peak_design_reaches_its_gain_at_its_frequency():
    b, a = biquad_design("peak", 2500.0, 2.0, 6.0, 96000.0)
    _, h = scipy.signal.freqz(b, a, worN=[2500.0], fs=96000.0)
    assert 20 * math.log10(abs(h[0])) == pytest.approx(6.0, abs=1e-9)


def test_continuous_statespace_is_discretized_with_a_zero_order_hold():
    ac = np.array([[-30.0, -1200.0], [1200.0, -30.0]])
    bc = np.array([[2400.0], [0.0]])
    ad, g = discretize(ac, 96000.0)
    sd = scipy.signal.cont2discrete((ac, bc, np.eye(2), np.zeros((2, 1))), 1 / 96000.0, method="zoh")
    np.testing.assert_allclose(ad, sd[0], atol=1e-12)
    np.testing.assert_allclose(g @ bc, sd[1], atol=1e-9)


def test_a_sampled_system_moves_to_another_rate_as_its_continuous_self():
    ac = np.array([[-50.0, -2600.0], [2600.0, -50.0]])
    bc = np.array([[1000.0], [-20.0]])
    a48, b48 = scipy.signal.cont2discrete((ac, bc, np.eye(2), np.zeros((2, 1))), 1 / 48000.0, method="zoh")[:2]
    a96, b96 = scipy.signal.cont2discrete((ac, bc, np.eye(2), np.zeros((2, 1))), 1 / 96000.0, method="zoh")[:2]
    moved = resample_statespace(a48, 2.0, 48000.0)
    assert moved is not None
    np.testing.assert_allclose(moved[0], a96, atol=1e-12)
    np.testing.assert_allclose(moved[1] @ b48, b96, atol=1e-9)
    assert resample_statespace(np.array([[0.0]]), 2.0, 48000.0) is None       # a pure delay has no log


def test_lagrange_weights_match_the_interpolating_polynomial():
    for frac in (1.0, 1.25, 1.91875, 2.0):
        for j, w in enumerate(lagrange3(frac)):
            basis = scipy.interpolate.lagrange([0, 1, 2, 3], [1.0 if k == j else 0.0 for k in range(4)])
            assert w == pytest.approx(basis(frac), abs=1e-12)


def test_fir_taps_keep_their_spacing_in_time():
    a, b = Affine.number(0.3), Affine.symbol("tone")
    assert respace_taps([a, b], 2.0) == [a, Affine(), b]                    # 96 kHz: whole samples, exact
    taps = respace_taps([Affine.number(0.5), Affine.number(0.5)], 44100 / 48000)
    h = np.array([t.const for t in taps])
    w = 2 * np.pi * 4000.0 / 44100.0
    got = abs(np.sum(h * np.exp(-1j * w * np.arange(len(h)))))
    assert got == pytest.approx(math.cos(math.pi * 4000.0 / 48000.0), abs=2e-3)   # |0.5 + 0.5 e^{-jw/48k}| at 4 kHz
    assert sum(h) == pytest.approx(1.0, abs=1e-12)                          # DC gain kept exactly


def test_matched_pole_keeps_its_time_constant():
    p = 0.995
    b2, a2 = rescale_rational([1.0, -1.0], [1.0, -p], 2.0)
    assert -a2[1] == pytest.approx(p ** 0.5, rel=1e-12)                     # exp(-t/tau) per half-sample
    assert b2[0] == pytest.approx(-b2[1], rel=1e-12)                        # the zero at DC stays


def test_version1_files_migrate_with_their_design_rate():
    doc = copy.deepcopy(V1_PLUCK)
    assert doc["version"] == 1 and "design_rate" not in doc
    p = load_preset(doc)
    assert p.raw["version"] == 2 and p.raw["design_rate"] == 48000 and p.design_rate == 48000.0
    doc["design_rate"] = 44100
    with pytest.raises(PresetError, match="design_rate"):
        load_preset(doc)


def test_at_the_design_rate_nothing_is_converted():
    preset = load_preset(V1_PLUCK)
    native = sheaf_of(preset, 48000.0)
    assert all(c.name != EXCITATION_BAND_CELL for c in native.cells)
    fast = sheaf_of(preset, 96000.0)
    assert fast.cells[-1].name == EXCITATION_BAND_CELL                      # the excitation kept in the design band
    assert excitation_at({"kind": "noise", "length": 48}, Timebase(48000.0)) == {"kind": "noise", "length": 48}


def test_lengths_keep_their_time_and_bursts_their_area_and_power():
    tb = Timebase(96000.0, 48000.0)
    exc = excitation_at({"kind": "noise", "length": {"ms": 1.0}, "gain": 1.0}, tb)
    assert exc["length"] == 96 and exc["gain"] == pytest.approx(math.sqrt(2.0))
    assert exc["brightness_exponent"] == pytest.approx(0.5)
    imp = excitation_at({"kind": "impulse"}, Timebase(44100.0, 48000.0))
    assert imp["gain"] == pytest.approx(44100 / 48000)
    assert tb.samples(100, "x") == 200 and Timebase(44100.0).samples(100, "x") == 92


def test_a_t60_loss_falls_60_db_in_that_time():
    tb = Timebase(44100.0, 48000.0)
    sigma = tb.rate_entry({"t60": 1.5}, "loss", {}, t60=True).const
    # amplitude per sample exp(-sigma) -> 20 log10(exp(-sigma * fs * T60)) = -60 dB
    assert 20 * math.log10(math.exp(-sigma * 44100 * 1.5)) == pytest.approx(-60.0, rel=1e-12)
    assert tb.rate_entry(0.0001, "loss", {}).const == pytest.approx(0.0001 * 48000 / 44100)


def test_untuned_field_keeps_its_wave_speed_per_second():
    preset = load_preset(FACTORY_DIR / "bridge-trio.json")
    for rate in (44100.0, 96000.0):
        prog = lower(preset, rate)
        fp = [b.field for b in prog.blocks if b.is_field][0]
        assert fp.speed.const * rate == pytest.approx(38400.0, rel=1e-12)   # grid steps per second


def test_a_knob_on_a_pole_is_refused_away_from_the_design_rate():
    v1 = load_preset(_v1("bucket-drum"))
    lower(v1, 48000.0)                                                     # as designed: fine
    with pytest.raises(PresetError, match=r"cells\[0\]\.pole.*48000 Hz.*44100 Hz"):
        lower(v1, 44100.0)

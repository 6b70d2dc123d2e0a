"""Linear filter cells against SciPy's reference implementations.

statespace, biquad, onepole and allpass cells are driven by a unit impulse
through the compiled kernel; the response must equal scipy.signal.lfilter
(or scipy.signal.dlsim for state space) on the same coefficients to float32
precision.  Source: SciPy reference implementation.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from sheafsynth.engine.instrument import Instrument

N = 400


def _one_cell(cell: dict, parameters: dict | None = None) -> dict:
    cell = dict(cell, id="f")
    return {"format": "sheafsynth-preset", "version": 1, "name": "filter-probe",
            "parameters": parameters or {}, "polyphony": 1,
            "cells": [cell],
            "wires": [{"from": "excite", "to": "f"}, {"from": "f", "to": "out"}],
            "excitation": {"kind": "impulse"}}


def _impulse_response(doc: dict) -> np.ndarray:
    inst = Instrument(doc, rate=48000, max_block=512, limiter=False, strict=True)
    inst.note_on(60, 127)
    return inst.render(N).astype(np.float64)


def _impulse(n=N):
    x = np.zeros(n)
    x[0] = 1.0
    return x


@pytest.mark.parametrize("b,a", [([0.2, 0.3, 0.1], [1.0, -0.6, 0.25]),
                                 ([1.0, -1.8, 0.9], [1.0, -1.6, 0.81]),
                                 ([0.05, 0.1, 0.05], [1.0, -1.14, 0.41])])
def test_biquad_matches_lfilter(b, a):
    y = _impulse_response(_one_cell({"kind": "biquad", "b": b, "a": a}))
    want = signal.lfilter(b, a, _impulse())
    np.testing.assert_allclose(y, want, atol=2e-6 * max(1, np.abs(want).max()))


@pytest.mark.parametrize("spec,b,a", [({"pole": 0.9}, [0.1], [1.0, -0.9]),
                                      ({"b": [0.5, 0.5], "a": [1, 0]}, [0.5, 0.5], [1.0, 0.0]),
                                      ({"b": [0.3, -0.2], "a": [1, -0.5]}, [0.3, -0.2], [1.0, -0.5])])
def test_onepole_matches_lfilter(spec, b, a):
    y = _impulse_response(_one_cell({"kind": "onepole", **spec}))
    np.testing.assert_allclose(y, signal.lfilter(b, a, _impulse()), atol=2e-6)


def test_onepole_pole_from_parameter_matches_lfilter():
    params = {"p": {"value": 0.8, "min": 0.0, "max": 0.95}}
    y = _impulse_response(_one_cell({"kind": "onepole", "pole": "p"}, params))
    np.testing.assert_allclose(y, signal.lfilter([0.2], [1.0, -0.8], _impulse()), atol=2e-6)


@pytest.mark.parametrize("d", [0.3, 0.5, 1.0, 1.7])
def test_allpass_matches_lfilter(d):
    a = (1 - d) / (1 + d)   # Thiran first-order allpass (Thiran 1971; Laakso et al. 1996)
    y = _impulse_response(_one_cell({"kind": "allpass", "delay": d}))
    np.testing.assert_allclose(y, signal.lfilter([a, 1.0], [1.0, a], _impulse()), atol=2e-6)


def test_allpass_dc_phase_delay():
    """Phase delay at DC of a = (1-d)/(1+d) is d samples (Laakso et al. 1996)."""
    for d in (0.4, 0.9, 1.3):
        a = (1 - d) / (1 + d)
        w, h = signal.freqz([a, 1.0], [1.0, a], worN=[1e-4])
        assert abs(-np.angle(h[0]) / w[0] - d) < 1e-6


def test_statespace_matches_dlsim():
    A = [[0.5, -0.3], [0.2, 0.7]]
    B = [[1.0], [0.5]]
    C = [[0.3, -0.8]]
    D = [[0.1]]
    y = _impulse_response(_one_cell({"kind": "statespace", "A": A, "B": B, "C": C, "D": D}))
    _, want, _ = signal.dlsim((np.array(A), np.array(B), np.array(C), np.array(D), 1.0), _impulse())
    np.testing.assert_allclose(y, want[:, 0], atol=2e-6)


def test_statespace_with_parameters_matches_dlsim():
    params = {"g": {"value": 0.6, "min": 0.0, "max": 0.9}}
    cell = {"kind": "statespace", "A": [["g"]], "B": [[1]], "C": [[{"param": "g", "scale": 0.5}]],
            "D": [[{"param": "g", "scale": -1, "offset": 1}]]}
    y = _impulse_response(_one_cell(cell, params))
    _, want, _ = signal.dlsim((np.array([[0.6]]), np.array([[1.0]]), np.array([[0.3]]), np.array([[0.4]]), 1.0),
                           _impulse())
    np.testing.assert_allclose(y, want[:, 0], atol=2e-6)


def test_gain_matrix_cell():
    doc = _one_cell({"kind": "gain", "gain": 0.25})
    y = _impulse_response(doc)
    assert y[0] == pytest.approx(0.25) and np.all(y[1:] == 0)

"""Pitch and decay of string loops, measured from rendered audio."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.locations import FACTORY_DIR
from tests.measure import cents, decay_t60, fundamental

FS = 48000


def ks_loop(n: int, gain: float, average: bool = True) -> dict:
    """A fixed loop of n samples, closed through a 2-tap average (or nothing) and a gain."""
    cells = [{"id": "line", "kind": "delay", "length": n}]
    wires = [{"from": "excite", "to": "line"}, {"from": "line", "to": "out"}]
    if average:
        cells.append({"id": "avg", "kind": "statespace", "A": [[0]], "B": [[1]], "C": [[0.5]], "D": [[0.5]]})
        wires += [{"from": "line", "to": "avg", "gain": gain}, {"from": "avg", "to": "line"}]
    else:
        wires += [{"from": "line", "to": "line", "gain": gain}]    # a delay fed back through a gain
    return {"format": "sheafsynth-preset", "version": 1, "name": "ks-probe", "polyphony": 1,
            "cells": cells, "wires": wires, "excitation": {"kind": "noise", "length": n}}


def render(doc, note=60, seconds=1.5, **kw):
    inst = Instrument(doc, rate=FS, max_block=512, limiter=False, **kw)
    inst.note_on(note, 127)
    return inst.render(int(seconds * FS)).astype(np.float64)


@pytest.mark.parametrize("n", [60, 109, 250])
def test_plain_loop_rings_at_fs_over_n_plus_half(n):
    """Loop of N samples + 2-point average: f0 = fs / (N + 1/2) (Karplus & Strong 1983; Jaffe & Smith 1983)."""
    x = render(ks_loop(n, 0.999))
    want = FS / (n + 0.5)
    f = fundamental(x[FS // 10:], FS, want)
    assert abs(cents(f, want)) < 0.5, f"N={n}: {f:.4f} Hz vs {want:.4f} Hz"


@pytest.mark.parametrize("name", ["porch-pluck", "lantern-harp", "cedar-box"])
def test_tuned_presets_in_tune_over_five_octaves(name):
    """Every note 36..96 within 0.5 cent of 440 * 2^((n-69)/12) (MIDI note numbering, ISO 16)."""
    inst = Instrument(FACTORY_DIR / f"{name}.json", rate=FS, max_block=512)
    worst = (0.0, None)
    for note in range(36, 97):
        inst.all_sound_off()
        inst.render(1024)
        inst.note_on(note, 100)
        x = inst.render(FS // 2).astype(np.float64)
        inst.note_off(note)
        want = 440.0 * 2 ** ((note - 69) / 12)
        c = cents(fundamental(x[FS // 20:], FS, want), want)
        if abs(c) > abs(worst[0]):
            worst = (c, note)
    assert abs(worst[0]) <= 0.5, f"{name}: note {worst[1]} is {worst[0]:+.3f} cents off"


@pytest.mark.parametrize("n,g", [(100, 0.995), (200, 0.99), (80, 0.998)])
def test_decay_follows_t60_formula_pure_gain(n, g):
    """A loop of gain G per period: T60 = -3 / (f0 log10 G) (definition of T60; common practice)."""
    x = render(ks_loop(n, g, average=False), seconds=2.0)
    f0 = FS / n
    want = -3.0 / (f0 * math.log10(g))
    got = decay_t60(x[FS // 20:], FS, f0)
    assert abs(got - want) / want < 0.05, f"T60 {got:.3f} s vs {want:.3f} s"


def test_decay_follows_t60_formula_with_average():
    """With the 2-tap average the loop gain at f0 is G = g cos(pi f0 / fs) (Jaffe & Smith 1983)."""
    n, g = 150, 0.997
    x = render(ks_loop(n, g), seconds=3.0)
    f0 = FS / (n + 0.5)
    G = g * math.cos(math.pi * f0 / FS)
    want = -3.0 / (f0 * math.log10(G))
    got = decay_t60(x[FS // 10:], FS, f0)
    assert abs(got - want) / want < 0.05, f"T60 {got:.3f} s vs {want:.3f} s"


def test_exact_allpass_formula_gives_its_phase_delay():
    """a = sin(w(1-tau)/2) / sin(w(1+tau)/2) has phase delay tau at w (first-order allpass; exact)."""
    from scipy import signal

    from sheafsynth.engine.ir.tuning import allpass_coef

    for tau in (0.5, 0.9, 1.4):
        for w in (0.01, 0.3, 1.0):
            a = allpass_coef(tau, w)
            _, h = signal.freqz([a, 1.0], [1.0, a], worN=[w])
            assert abs(-np.angle(h[0]) / w - tau) < 1e-9

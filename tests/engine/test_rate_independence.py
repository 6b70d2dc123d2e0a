"""Every factory preset is the same instrument at 44.1 and 96 kHz as at 48 kHz.

For every factory preset, at the lowest, middle and highest notes of its
range, a take rendered at 44.1 kHz and one at 96 kHz are compared with the
48 kHz take:

* the fundamental within 0.5 cent of the note (equal temperament, A4 = 440
  Hz: ISO 16:1975), measured by quadratic interpolation of the spectral peak;
* T60 within 5 %: the time for a 60 dB fall from the slope of the decay
  curve, as ISO 3382-1:2009 defines reverberation time, in the
  one-third-octave band of the fundamental (IEC 61260-1);
* the spectral centroid up to 16 kHz within 5 % (Peeters 2004, 6.1).

(tests/audio_measures.py holds the measurements and their sources.)  The
takes are driven by an impulse rather than the preset's noise burst: a
burst is a different random sequence at every rate (its samples cannot
line up), so one take of it per rate compares two random strikes, not two
instruments.  An impulse keeps its area at every rate (engine.model.timebase),
so the comparison is of the networks themselves.  Where the fundamental
still builds up through the take (bridge-trio's low strings trade energy
through the bridge), T60 cannot be read from it; there the fundamental's
band envelope over the whole take is compared instead (within 1 dB).  The burst's own
conversion is checked on its statistics: the same duration and the same
power per hertz at every rate.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from sheafsynth.engine.instrument import Instrument, render_notes
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.ir.program import note_hz
from sheafsynth.engine.preset import factory_presets, load_preset
from tests.audio_measures import band_envelope_db, centroid_hz, cents, fundamental_hz, t60_s

pytestmark = pytest.mark.slow

TAKE_S = 2.5
RATES = (44100, 96000)


def _struck(path) -> dict:
    doc = json.loads(path.read_text())
    doc["excitation"] = {"kind": "impulse"}
    return doc


def _take(doc: dict, note: int, rate: int) -> np.ndarray:
    inst = Instrument(load_preset(doc), rate=rate, max_block=512, seed=3)
    x = render_notes(inst, [(0.0, note, 100, TAKE_S)], TAKE_S)
    return x[:, 0] if x.ndim > 1 else x


def _measures(x: np.ndarray, rate: int, note: int) -> tuple[float, float | None, float, tuple]:
    """cents off the note, T60 (None when the take holds no decay to measure), centroid, band envelope."""
    f0 = note_hz(note)
    try:
        t60: float | None = t60_s(x, rate, f0)
    except ValueError:
        t60 = None
    return (cents(fundamental_hz(x, rate, f0), f0), t60, centroid_hz(x[: rate], rate),
            band_envelope_db(x, rate, f0))


@pytest.mark.parametrize("path", factory_presets(), ids=lambda p: p.stem)
def test_the_same_instrument_at_every_rate(path):
    doc = _struck(path)
    lo, hi = load_preset(doc).notes
    problems = []
    measured = 0
    for note in (lo, (lo + hi) // 2, hi):
        c48, t48, k48, env48 = _measures(_take(doc, note, 48000), 48000, note)
        assert abs(c48) <= 0.5, f"note {note} at 48 kHz is {c48:+.2f} cents off"
        for rate in RATES:
            c, t, k, env = _measures(_take(doc, note, rate), rate, note)
            if abs(c) > 0.5:
                problems.append(f"note {note} at {rate} Hz: fundamental {c:+.2f} cents")
            if (t is None) != (t48 is None):
                problems.append(f"note {note} at {rate} Hz: a decay at one rate only")
            elif t is not None and t48 is not None:
                measured += 1
                if abs(t / t48 - 1) > 0.05:
                    problems.append(f"note {note} at {rate} Hz: T60 {t:.3f} s vs {t48:.3f} s at 48 kHz")
            if abs(k / k48 - 1) > 0.05:
                problems.append(f"note {note} at {rate} Hz: centroid {k:.0f} Hz vs {k48:.0f} Hz at 48 kHz")
            if t is None:
                # No decay in the take (bridge-trio's low strings trade energy through
                # the bridge, and the fundamental still builds up): compare its band
                # envelope, in 100 ms steps, within 1 dB wherever it is within 40 dB
                # of its loudest.
                step48, step = int(0.1 / env48[1]), int(0.1 / env[1])
                a48, a = env48[0][::max(1, step48)], env[0][::max(1, step)]
                m = min(len(a), len(a48))
                live = a48[:m] > a48.max() - 40.0
                worst = float(np.max(np.abs(a[:m] - a48[:m])[live]))
                if worst > 1.0:
                    problems.append(f"note {note} at {rate} Hz: the fundamental builds up differently "
                                    f"(by {worst:.2f} dB)")
    assert not problems, "; ".join(problems)
    assert measured >= 4, "T60 was measurable at fewer than two of the three notes"


def _burst_spectrum(rate: int, velocity: int, seeds: int = 24) -> tuple[np.ndarray, np.ndarray, int]:
    """Mean power spectrum (per hertz) of the bare excitation burst over ``seeds`` voices, and its length."""
    doc = {"format": "sheafsynth-preset", "version": 2, "name": "bare-burst", "polyphony": 1, "notes": [60, 60],
           "cells": [{"id": "pass", "kind": "gain", "gain": 1.0}],
           "wires": [{"from": "excite", "to": "pass"}, {"from": "pass", "to": "out"}],
           "excitation": {"kind": "noise", "length": {"ms": 2.0}, "velocity_brightness": True}}
    n = int(0.01 * rate)
    acc = None
    length = int(lower(load_preset(doc), float(rate)).excitation["length"])    # samples the kernel plays
    for seed in range(seeds):
        inst = Instrument(load_preset(doc), rate=rate, max_block=512, seed=seed)
        x = render_notes(inst, [(0.0, 60, velocity, 0.01)], 0.01)[:n]
        x = x[:, 0] if x.ndim > 1 else x
        p = np.abs(np.fft.rfft(x.astype(np.float64), 1 << 16) / rate) ** 2     # energy per hertz (Parseval)
        acc = p if acc is None else acc + p
    return np.fft.rfftfreq(1 << 16, 1.0 / rate), acc / seeds, length


@pytest.mark.parametrize("velocity", [40, 110])
def test_a_noise_burst_keeps_its_length_and_power_per_hertz(velocity):
    f48, p48, n48 = _burst_spectrum(48000, velocity)
    for rate in RATES:
        f, p, n = _burst_spectrum(rate, velocity)
        assert abs(n / rate - n48 / 48000) <= 0.5 / rate, f"burst lasts {n} samples at {rate} Hz"
        for lo_hz, hi_hz in ((200, 2000), (2000, 8000), (8000, 16000)):
            band48 = np.mean(p48[(f48 >= lo_hz) & (f48 < hi_hz)])
            band = np.mean(p[(f >= lo_hz) & (f < hi_hz)])
            assert abs(10 * np.log10(band / band48)) < 1.0, \
                f"{lo_hz}-{hi_hz} Hz at {rate} Hz, velocity {velocity}: {10 * np.log10(band / band48):+.2f} dB"

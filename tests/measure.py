"""Measurements on rendered audio shared by the tests (no project code inside).

Frequency estimates use a Hann-windowed, zero-padded FFT peak refined by the
phase advance between two overlapping windows (the phase-vocoder frequency
estimate; common practice, no source).
"""

from __future__ import annotations

import math

import numpy as np


def cents(f: float, ref: float) -> float:
    return 1200.0 * math.log2(f / ref)


def peak_near(x: np.ndarray, fs: float, guess: float, rel: float = 0.06, pad: int = 8) -> float:
    """Frequency (Hz) of the strongest FFT peak within +-rel of ``guess``."""
    n = len(x)
    win = np.hanning(n)
    spec = np.abs(np.fft.rfft(x * win, n * pad))
    freqs = np.fft.rfftfreq(n * pad, 1.0 / fs)
    band = (freqs > guess * (1 - rel)) & (freqs < guess * (1 + rel))
    idx = np.flatnonzero(band)
    k = idx[np.argmax(spec[idx])]
    a, b, c = np.log(spec[k - 1:k + 2] + 1e-30)
    off = 0.5 * (a - c) / (a - 2 * b + c)
    return float((k + off) * fs / (n * pad))


def refine(x: np.ndarray, fs: float, f: float, hop: int) -> float:
    """Refine ``f`` by the phase advance of that component over ``hop`` samples."""
    n = len(x) - hop
    t = np.arange(n)
    win = np.hanning(n)
    ph = []
    for start in (0, hop):
        seg = x[start:start + n] * win
        z = np.sum(seg * np.exp(-2j * math.pi * f / fs * t))
        ph.append(np.angle(z))
    expected = 2 * math.pi * f * hop / fs
    dphi = (ph[1] - ph[0] - expected + math.pi) % (2 * math.pi) - math.pi
    return f + dphi * fs / (2 * math.pi * hop)


def fundamental(x: np.ndarray, fs: float, guess: float) -> float:
    """Precise frequency of the partial nearest ``guess`` (Hz)."""
    f = peak_near(x, fs, guess)
    hop = max(1, int(fs / guess * 8))
    hop = min(hop, len(x) // 4)
    for _ in range(2):
        f = refine(x, fs, f, hop)
    return f


def decay_t60(x: np.ndarray, fs: float, f: float, frame_s: float = 0.05) -> float:
    """T60 (s) of the partial at ``f`` from a line fit to its level in dB over time."""
    n = int(frame_s * fs)
    t = np.arange(n)
    basis = np.exp(-2j * math.pi * f / fs * t) * np.hanning(n)
    levels, times = [], []
    for start in range(0, len(x) - n, n // 2):
        z = np.abs(np.sum(x[start:start + n] * basis))
        if z > 0:
            levels.append(20 * math.log10(z))
            times.append((start + n / 2) / fs)
    slope, _ = np.polyfit(times, levels, 1)
    return -60.0 / slope


def spectral_centroid(x: np.ndarray, fs: float) -> float:
    spec = np.abs(np.fft.rfft(x * np.hanning(len(x))))
    freqs = np.fft.rfftfreq(len(x), 1.0 / fs)
    return float(np.sum(freqs * spec) / max(np.sum(spec), 1e-30))

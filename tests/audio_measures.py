"""Measurements on rendered audio for the rate-independence tests.

* :func:`fundamental_hz`: the frequency of the spectral peak nearest an
  expected frequency, from a Hann-windowed, zero-padded FFT refined by
  quadratic interpolation of the log magnitude (J. O. Smith, *Spectral
  Audio Signal Processing*, "Quadratic Interpolation of Spectral Peaks").
* :func:`t60_s`: the reverberation time of one decay as ISO 3382-1:2009
  defines it for a room: the time for a 60 dB fall, from the slope of a
  least-squares line through the decay curve (here the energy in short
  frames, in dB, optionally in the one-third-octave band of the
  fundamental) from 5 dB below its start to 30 dB below it, or to the end
  of the take (T30 where the take reaches it, shorter ranges otherwise).
* :func:`centroid_hz`: the spectral centroid (power-weighted mean
  frequency) up to a limit, a standard timbre descriptor (G. Peeters, "A
  large set of audio features for sound description", IRCAM 2004, 6.1).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.signal

__all__ = ["fundamental_hz", "band_envelope_db", "t60_s", "centroid_hz", "cents"]


def cents(f: float, ref: float) -> float:
    """1200 log2(f / ref)."""
    return 1200.0 * math.log2(f / ref)


def fundamental_hz(x: np.ndarray, rate: float, expected: float, start_s: float = 0.05,
                   window_s: float = 2.0, search_cents: float = 80.0) -> float:
    """The interpolated spectral peak within ``search_cents`` of ``expected`` (Hz)."""
    seg = np.asarray(x[int(start_s * rate):int((start_s + window_s) * rate)], dtype=np.float64)
    n = len(seg)
    nfft = 1 << int(math.ceil(math.log2(n * 16)))
    mag = np.abs(np.fft.rfft(seg * np.hanning(n), nfft))
    lo = int(expected * 2 ** (-search_cents / 1200) * nfft / rate)
    hi = int(math.ceil(expected * 2 ** (search_cents / 1200) * nfft / rate)) + 1
    k = lo + int(np.argmax(mag[lo:hi]))
    a, b, c = (math.log(max(mag[k + d], 1e-300)) for d in (-1, 0, 1))
    p = 0.5 * (a - c) / (a - 2 * b + c)
    return (k + p) * rate / nfft


def band_envelope_db(x: np.ndarray, rate: float, f0: float | None = None) -> tuple[np.ndarray, float]:
    """(energy per frame in dB, frame length in s): in the one-third-octave band around ``f0``
    (IEC 61260-1 band edges f0 * 2^(+-1/6); a 4th-order Butterworth band run forward and
    backward) with frames of two periods of f0, or broadband in 50 ms frames without ``f0``.
    The last three frames are dropped (the backward pass bends them)."""
    sig = np.asarray(x, dtype=np.float64)
    frame_s = 0.05
    if f0 is not None:
        sos = scipy.signal.butter(4, [f0 * 2 ** (-1 / 6), f0 * 2 ** (1 / 6)], btype="bandpass", fs=rate,
                                  output="sos")
        sig = scipy.signal.sosfiltfilt(sos, sig)
        frame_s = 2.0 / f0
    hop = max(1, int(frame_s * rate))
    n = len(sig) // hop
    e = np.mean(sig[:n * hop].reshape(n, hop) ** 2, axis=1)
    return 10.0 * np.log10(np.maximum(e, 1e-30))[: n - 3], hop / rate


def t60_s(x: np.ndarray, rate: float, f0: float | None = None, range_db: float = 30.0) -> float:
    """T60 (s) from the energy decay after the loudest frame (module doc).

    With ``f0`` the decay is measured in the one-third-octave band around f0
    (band_envelope_db), as ISO 3382-1 measures reverberation time per band:
    a string's or a bar's partials decay at their own rates, and the band
    holds the fundamental alone.  ValueError when the take holds too little
    decay (the band still builds up, say).
    """
    db, frame = band_envelope_db(x, rate, f0)
    n = len(db)
    top = int(np.argmax(db))
    fallen = np.nonzero(db[top:] <= db[top] - 5.0)[0]
    start = top + (int(fallen[0]) if len(fallen) else 2)        # a slow decay may not fall 5 dB in the take
    below = np.nonzero(db[start:] <= db[top] - 5.0 - range_db)[0]
    stop = start + (int(below[0]) if len(below) else n - start)
    if stop - start < 5:
        raise ValueError(f"too little decay to measure: {stop - start} frames after the loudest")
    t = np.arange(start, stop) * frame
    slope = np.polyfit(t, db[start:stop], 1)[0]
    return -60.0 / slope


def centroid_hz(x: np.ndarray, rate: float, limit_hz: float = 16000.0, floor_hz: float = 20.0) -> float:
    """Power-weighted mean frequency between ``floor_hz`` and ``limit_hz``."""
    seg = np.asarray(x, dtype=np.float64)
    p = np.abs(np.fft.rfft(seg * np.hanning(len(seg)))) ** 2
    f = np.fft.rfftfreq(len(seg), 1.0 / rate)
    keep = (f >= floor_hz) & (f <= limit_hz)
    return float(np.sum(f[keep] * p[keep]) / np.sum(p[keep]))

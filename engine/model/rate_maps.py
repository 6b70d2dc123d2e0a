"""Filter designs and rate conversions used by the cell builders (engine.model.timebase).

Every function returns per-sample coefficients for the rate it is given.
Coefficient lists follow ``scipy.signal.lfilter`` (``a[0] = 1``).

* :func:`onepole_design`: first-order lowpass / highpass by the bilinear
  transform with the corner prewarped (Oppenheim & Schafer, *Discrete-Time
  Signal Processing*, 3rd ed., 7.2);
* :func:`biquad_design`: second-order lowpass, highpass, bandpass, notch and
  peaking sections, bilinear with prewarping (R. Bristow-Johnson, "Cookbook
  formulae for audio EQ biquad filter coefficients");
* :func:`rescale_rational`: poles and zeros moved by the matched
  z-transform, z' = z^(fs0/fs) (a zero at z = -1 stays at -1), gain matched
  at a reference frequency;
* :func:`respace_taps`: FIR taps keep their spacing in time; a tap landing
  between samples is spread by third-order Lagrange interpolation (passive
  for delays in its central interval; Laakso et al., "Splitting the unit
  delay", IEEE SP Magazine 1996);
* :func:`resample_statespace` / :func:`discretize`: continuous-time
  dynamics through the matrix logarithm and exponential, zero-order-hold
  input (Van Loan, "Computing integrals involving the matrix
  exponential", IEEE TAC 1978).

Not for the audio thread.
"""

from __future__ import annotations

import cmath
import math
from typing import Sequence

import numpy as np
import scipy.linalg
import scipy.signal

from sheafsynth.engine.preset.affine import Affine

__all__ = ["onepole_design", "biquad_design", "BIQUAD_DESIGNS", "rescale_rational", "respace_taps",
           "resample_statespace", "discretize", "input_gramian", "lagrange3",
           "EXCITATION_BAND", "excitation_band"]

BIQUAD_DESIGNS = ("lowpass", "highpass", "bandpass", "notch", "peak")


def onepole_design(kind: str, hz: float, rate: float) -> tuple[list[float], list[float]]:
    """(b, a) of a first-order ``lowpass`` or ``highpass`` with its -3 dB corner at ``hz``."""
    k = math.tan(math.pi * hz / rate)
    a1 = (k - 1.0) / (k + 1.0)
    if kind == "lowpass":
        g = k / (1.0 + k)
        return [g, g], [1.0, a1]
    g = 1.0 / (1.0 + k)
    return [g, -g], [1.0, a1]


def biquad_design(kind: str, hz: float, q: float, gain_db: float, rate: float) -> tuple[list[float], list[float]]:
    """(b, a) of one of BIQUAD_DESIGNS at ``hz`` with quality ``q`` (peak: ``gain_db``)."""
    w0 = 2.0 * math.pi * hz / rate
    cw, sw = math.cos(w0), math.sin(w0)
    alpha = sw / (2.0 * q)
    amp = 10.0 ** (gain_db / 40.0)
    if kind == "lowpass":
        b = [(1 - cw) / 2, 1 - cw, (1 - cw) / 2]
        a = [1 + alpha, -2 * cw, 1 - alpha]
    elif kind == "highpass":
        b = [(1 + cw) / 2, -(1 + cw), (1 + cw) / 2]
        a = [1 + alpha, -2 * cw, 1 - alpha]
    elif kind == "bandpass":          # constant 0 dB peak gain
        b = [alpha, 0.0, -alpha]
        a = [1 + alpha, -2 * cw, 1 - alpha]
    elif kind == "notch":
        b = [1.0, -2 * cw, 1.0]
        a = [1 + alpha, -2 * cw, 1 - alpha]
    else:                             # peak
        b = [1 + alpha * amp, -2 * cw, 1 - alpha * amp]
        a = [1 + alpha / amp, -2 * cw, 1 - alpha / amp]
    return [x / a[0] for x in b], [x / a[0] for x in a]


def _map_root(z: complex, ratio: float) -> complex:
    """A pole or zero at the design rate moved to rate = ratio * design rate."""
    if abs(z) < 1e-300:
        return 0j
    if abs(z + 1.0) < 1e-12:
        return complex(-1.0, 0.0)
    if abs(z.imag) < 1e-15 and z.real < 0:
        # a negative real root has no matched counterpart; carry it through the
        # bilinear map instead (s = 2 fs0 (z-1)/(z+1), then back at fs)
        s = 2.0 * (z - 1.0) / (z + 1.0)
        s2 = s / ratio
        return (2.0 + s2) / (2.0 - s2)
    return cmath.exp(cmath.log(z) / ratio)


def _poly(roots: Sequence[complex]) -> list[float]:
    return [float(c.real) for c in np.poly(list(roots))] if roots else [1.0]


def _response(b: Sequence[float], a: Sequence[float], w: float) -> complex:
    z = cmath.exp(-1j * w)
    return sum(c * z ** i for i, c in enumerate(b)) / sum(c * z ** i for i, c in enumerate(a))


def rescale_rational(b: Sequence[float], a: Sequence[float], ratio: float) -> tuple[list[float], list[float]]:
    """A numeric filter (b, a) designed at fs0 carried to fs = ratio * fs0 (matched z-transform).

    The gain is matched at DC, or where the filter has a zero at DC, at the
    pole angle (complex poles) or at fs0/8.
    """
    b = [float(x) for x in b]
    a = [float(x) for x in a]
    while len(b) > 1 and b[-1] == 0.0:
        b.pop()
    while len(a) > 1 and a[-1] == 0.0:
        a.pop()
    zeros = list(np.roots(b)) if len(b) > 1 else []
    poles = list(np.roots(a)) if len(a) > 1 else []
    b2 = _poly([_map_root(complex(z), ratio) for z in zeros])
    a2 = _poly([_map_root(complex(p), ratio) for p in poles])
    dc = abs(_response(b, a, 0.0))
    if dc > 1e-9:
        w0 = 0.0
    else:
        cplx = [p for p in poles if abs(complex(p).imag) > 1e-12]
        w0 = abs(cmath.phase(complex(cplx[0]))) if cplx else math.pi / 4
    want = abs(_response(b, a, w0))
    have = abs(_response(b2, a2, w0 / ratio))
    g = want / have if have > 0 else 1.0
    # keep b's length (a zero at the origin is a pure delay the design had)
    b2 = [g * x for x in b2] + [0.0] * max(0, len(b) - len(b2))
    return b2, a2


def lagrange3(frac: float) -> list[float]:
    """Third-order Lagrange weights for a delay of ``frac`` samples over taps 0..3 (frac in [1, 2])."""
    out = []
    for j in range(4):
        w = 1.0
        for m in range(4):
            if m != j:
                w *= (frac - m) / (j - m)
        out.append(w)
    return out


def respace_taps(taps: Sequence[Affine], ratio: float) -> list[Affine]:
    """FIR taps at design delays 0, 1, 2, ... carried to rate = ratio * design rate.

    A tap landing on a whole sample moves there exactly; one between samples
    is spread over four taps by Lagrange interpolation centred on it, after
    one sample of bulk delay where a tap would otherwise fall inside the
    first sample (the delay is part of the block's response, so a tuning
    loop accounts for it).  Knobs on the taps stay affine: the weights are
    numbers.
    """
    times = [k * ratio for k in range(len(taps))]
    fractional = [abs(t - round(t)) > 1e-9 for t in times]
    bulk = 1 if any(f and t < 1.0 for t, f in zip(times, fractional)) else 0
    out: dict[int, Affine] = {}

    def add(n: int, tap: Affine) -> None:
        out[n] = out[n] + tap if n in out else tap

    for tap, t, frac in zip(taps, times, fractional):
        t += bulk
        if not frac:
            add(int(round(t)), tap)
            continue
        n0 = int(math.floor(t)) - 1
        for j, w in enumerate(lagrange3(t - n0)):
            add(n0 + j, tap.scaled(w))
    return [out.get(n, Affine()) for n in range(max(out) + 1)]


def input_gramian(ac: np.ndarray, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """(exp(Ac dt), integral_0^dt exp(Ac s) ds) by one matrix exponential (Van Loan 1978)."""
    k = ac.shape[0]
    big = np.zeros((2 * k, 2 * k))
    big[:k, :k] = ac * dt
    big[:k, k:] = np.eye(k) * dt
    e = scipy.linalg.expm(big)
    return e[:k, :k], e[:k, k:]


def discretize(ac: np.ndarray, rate: float) -> tuple[np.ndarray, np.ndarray]:
    """(A_d, G) for continuous ds/dt = Ac s + Bc u at ``rate``: A_d = exp(Ac/fs), B_d = G Bc."""
    return input_gramian(np.asarray(ac, dtype=float), 1.0 / rate)


def resample_statespace(a: np.ndarray, ratio: float, design_rate: float) -> tuple[np.ndarray, np.ndarray] | None:
    """(A', M) with B' = M B, or None when A has no real continuous-time counterpart.

    A is the per-sample state matrix at ``design_rate``; it needs no
    eigenvalue at 0 or on the negative real axis.  Ac = log(A) fs0; A' =
    exp(Ac / fs); the input map keeps a zero-order hold: B' = G(1/fs) G(1/fs0)^-1 B.
    """
    a = np.asarray(a, dtype=float)
    ev = np.linalg.eigvals(a)
    if np.any(np.abs(ev) < 1e-12) or np.any((np.abs(ev.imag) < 1e-12) & (ev.real < 0)):
        return None
    ac = scipy.linalg.logm(a)
    if np.max(np.abs(np.imag(ac))) > 1e-9:
        return None
    ac = np.real(ac) * design_rate
    fs = ratio * design_rate
    a2, g2 = input_gramian(ac, 1.0 / fs)
    _, g1 = input_gramian(ac, 1.0 / design_rate)
    return a2, g2 @ np.linalg.inv(g1)


EXCITATION_BAND = 0.45    # the excitation lowpass corner as a fraction of the design rate


def excitation_band(design_rate: float, rate: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(A, B, C, D) of the 4th-order Butterworth lowpass at EXCITATION_BAND * design_rate (bilinear,
    prewarped; scipy.signal.butter) that keeps an excitation inside the design band."""
    z, p, k = scipy.signal.butter(4, EXCITATION_BAND * design_rate, fs=rate, output="zpk")
    a, b, c, d = scipy.signal.zpk2ss(z, p, k)
    return np.real(a), np.real(b), np.real(c), np.real(d)

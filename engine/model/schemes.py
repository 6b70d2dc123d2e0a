"""The field update schemes (leapfrog wave and stiff, explicit diffusion): formulas, stability, modes.

One formula for the C generator and the NumPy reference.  Times in samples
unless a rate ``fs`` (Hz) is given.

Update formulas (one formula for the C generator and the NumPy reference)
-------------------------------------------------------------------------
T = 1/fs.  L = boundary-treated sheaf Laplacian, S = stiffness operator
(:meth:`FieldSheaf.stiffness`), lam = Courant number, beta = stiffness
number (kappa*T/h^2), sigma = frequency-independent loss per sample
(sigma = sigma0*T), eta = frequency-dependent loss per sample
(eta = 2*sigma1*T/h^2), nu = diffusion number.

wave / stiff (leapfrog; stiff has beta > 0, wave beta = 0)::

    w   = (lam^2 + eta) * u - eta * u_prev
    u+  = (2 u - (1 - sigma) u_prev - L w - beta^2 S u) / (1 + sigma)

This is Bilbao 2009's damped scheme  (u+ - 2u + u-) = -lam^2 L u -
beta^2 S u - sigma (u+ - u-) - eta L (u - u-).  Mode by mode (L, S sharing
an eigenvector with L-eigenvalue p and K = lam^2 L + beta^2 S eigenvalue q):
(1+sigma) z^2 - (2 - q - eta p) z + (1 - sigma - eta p) = 0.  The Jury
conditions give  q >= 0,  q + 2 eta p <= 4,  eta p <= 2: sigma >= 0 never
changes the bound, eta tightens it.  Without shared eigenvectors the same
follows from the discrete energy with mass I - (eta/2) L:  stable iff
mu_max(lam^2 L + beta^2 S + 2 eta L) <= 4, implied by
(lam^2 + 2 eta) mu_max(L) + beta^2 mu_max(S) <= 4 (:func:`stable`).

diffusion (explicit Euler)::

    u+  = (1 - sigma) u - nu L u          stable iff nu*mu_max + sigma <= 2

(no overshoot iff nu*mu_max + sigma <= 1).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["STABILITY_RTOL", "mode_frequency", "mode_response", "stable", "diffusion_stable",
           "leapfrog_step", "diffusion_step"]

STABILITY_RTOL = 1e-12   # relative slack in the <= 4 tests (rounding only)



def mode_frequency(mu, lam: float, fs: float):
    """Hz at which a mode of L-eigenvalue ``mu`` rings: 4 sin^2(w T/2) = lam^2 mu.

    Lossless leapfrog; ``fs`` in Hz.  ValueError if lam^2 mu > 4 (unstable).
    """
    q = lam * lam * np.asarray(mu, dtype=float)
    if np.any(q > 4.0 * (1 + STABILITY_RTOL)) or np.any(q < 0):
        raise ValueError("lam^2 * mu must lie in [0, 4] for a ringing mode")
    return fs / math.pi * np.arcsin(np.sqrt(np.clip(q, 0.0, 4.0)) / 2.0)


def mode_response(q: float, fs: float, sigma: float = 0.0, eta: float = 0.0,
                  p: float = 0.0) -> tuple[float, float]:
    """(frequency Hz, T60 s) of one mode of the lossy leapfrog update.

    ``q`` is the mode's eigenvalue of lam^2 L + beta^2 S, ``p`` its
    L-eigenvalue (for eta).  Roots of (1+s) z^2 - (2 - q - eta p) z +
    (1 - s - eta p); the larger-modulus root sets both numbers.
    """
    roots = np.roots([1.0 + sigma, -(2.0 - q - eta * p), 1.0 - sigma - eta * p])
    z = roots[np.argmax(np.abs(roots))]
    freq = abs(np.angle(z)) * fs / (2 * math.pi)
    mag = abs(z)
    t60 = math.inf if mag >= 1.0 else 3.0 * math.log(10.0) / (-math.log(mag) * fs)
    return float(freq), float(t60)


def stable(lam: float, mu_max: float, *, eta: float = 0.0, beta: float = 0.0,
           s_max: float = 0.0, sigma: float = 0.0) -> bool:
    """Leapfrog stability: (lam^2 + 2 eta) mu_max + beta^2 s_max <= 4.

    ``mu_max``/``s_max``: largest eigenvalues (or upper bounds) of L and S.
    sigma >= 0 does not move the bound; negative losses are gains and are
    reported unstable.  Equality counts as stable (up to rounding).
    """
    if sigma < 0 or eta < 0:
        return False
    q = (lam * lam + 2.0 * eta) * mu_max + beta * beta * s_max
    return q <= 4.0 * (1.0 + STABILITY_RTOL)


def diffusion_stable(nu: float, mu_max: float, sigma: float = 0.0) -> bool:
    """Explicit diffusion stability: nu mu_max + sigma <= 2 (nu, sigma >= 0)."""
    if nu < 0 or sigma < 0:
        return False
    return nu * mu_max + sigma <= 2.0 * (1.0 + STABILITY_RTOL)


def leapfrog_step(u, u_prev, lap, lam: float, sigma: float = 0.0, eta: float = 0.0,
                  stiff=None, beta: float = 0.0):
    """One wave/stiff step (module doc): returns u+.

    w = (lam^2 + eta) u - eta u_prev;
    u+ = (2u - (1 - sigma) u_prev - L w - beta^2 S u) / (1 + sigma).
    """
    w = (lam * lam + eta) * u - eta * u_prev
    acc = 2.0 * u - (1.0 - sigma) * u_prev - lap @ w
    if stiff is not None and beta != 0.0:
        acc = acc - (beta * beta) * (stiff @ u)
    return acc / (1.0 + sigma)


def diffusion_step(u, lap, nu: float, sigma: float = 0.0):
    """One diffusion step: u+ = (1 - sigma) u - nu L u."""
    return (1.0 - sigma) * u - nu * (lap @ u)

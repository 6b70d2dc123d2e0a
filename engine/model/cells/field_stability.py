"""Stability of a field cell over the box of its parameters (leapfrog / diffusion bounds).

wave/stiff: (k2 lambda^2 + 2 eta) mu_max(L) + k2 beta^2 mu_max(S) <= 4,
diffusion: nu mu_max(L) + sigma <= 2, with sigma, eta >= 0, checked at every
corner of the box of the parameters the entries use (the left sides are
convex in the parameters, so the corners cover the box).  The cheap
Gershgorin bound on mu_max is tried first, the eigenvalue itself only when
the bound fails.  Not for the audio thread.

Update formulas (one formula for the C generator and the NumPy reference)
-------------------------------------------------------------------------
T = 1/fs.  L = boundary-treated sheaf Laplacian, S = stiffness operator
(:meth:`~sheafsynth.engine.model.field_sheaf.FieldSheaf.stiffness`), lam = Courant number, beta = stiffness
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
(lam^2 + 2 eta) mu_max(L) + beta^2 mu_max(S) <= 4 (what :func:`check_stability` tests).

diffusion (explicit Euler)::

    u+  = (1 - sigma) u - nu L u          stable iff nu*mu_max + sigma <= 2

(no overshoot iff nu*mu_max + sigma <= 1).
"""

from __future__ import annotations

import itertools

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.field_model import FieldModel, f32

__all__ = ["MAX_CORNER_PARAMS", "STABILITY_RTOL", "check_stability"]

MAX_CORNER_PARAMS = 16    # parameters a field's entries may use (2^16 corners at most)
STABILITY_RTOL = 1e-12   # relative slack in the <= 4 and <= 2 tests (rounding only)



def _corners(symbols: list[str], parameters, path: str):
    if len(symbols) > MAX_CORNER_PARAMS:
        raise PresetError(f"the field's entries use {len(symbols)} parameters; at most "
                          f"{MAX_CORNER_PARAMS} can be checked corner by corner", path)
    if not symbols:
        yield {}
        return
    for combo in itertools.product(*[(parameters[s].lo, parameters[s].hi) for s in symbols]):
        yield dict(zip(symbols, combo))


def _corner_text(corner: dict, note: str | None) -> str:
    parts = ([note] if note else []) + [f"{k}={v:g}" for k, v in corner.items()]
    return "at " + ", ".join(parts) if parts else "at its fixed values"


def check_stability(model: FieldModel, parameters, k2_max: float = 1.0, note: str | None = None) -> None:
    """Refuse (PresetError naming the corner) a field that can blow up (module doc)."""
    try:
        _check_stability(model, parameters, k2_max, note, bound=True)
    except PresetError:
        _check_stability(model, parameters, k2_max, note, bound=False)


def _check_stability(model: FieldModel, parameters, k2_max: float, note: str | None, bound: bool) -> None:
    entries = {"speed": model.speed, "loss": model.loss, "hf_loss": model.hf_loss,
               "stiffness": model.stiffness}
    symbols = sorted({s for e in entries.values() for s in e.symbols})
    mu = model.mu_max(bound)
    smax = model.s_max(bound)
    p = model.path
    for corner in _corners(symbols, parameters, p):
        env = dict(model.defaults)
        env.update(corner)
        lam, sig, eta, beta = (f32(e.value(env)) for e in entries.values())
        where = _corner_text(corner, note)
        if sig < 0.0:
            raise PresetError(f"loss {sig:g} < 0 is a gain, unstable {where}", p + ".loss")
        if model.dynamics == "diffusion":
            q = lam * mu + sig
            if lam < 0.0:
                raise PresetError(f"a negative diffusion number {lam:g} is unstable {where}", p + ".speed")
            if q > 2.0 * (1.0 + STABILITY_RTOL):
                raise PresetError(f"unstable {where}: nu*mu_max + sigma = {q:.4g} > 2", p + ".speed")
            continue
        if eta < 0.0:
            raise PresetError(f"hf_loss {eta:g} < 0 is a gain, unstable {where}", p + ".hf_loss")
        parts = {"speed": k2_max * lam * lam * mu, "hf_loss": 2.0 * eta * mu,
                 "stiffness": k2_max * beta * beta * smax}
        q = sum(parts.values())
        if q > 4.0 * (1.0 + STABILITY_RTOL):
            worst = max(parts, key=parts.__getitem__)
            k = "k2*" if k2_max != 1.0 else ""
            if model.stiff or eta != 0.0:
                formula = f"({k}lambda^2 + 2 eta) mu_max + {k}beta^2 s_max"
            else:
                formula = f"{k}lambda^2 mu_max"
            raise PresetError(f"unstable {where}: {formula} = {q:.4g} > 4", f"{p}.{worst}")

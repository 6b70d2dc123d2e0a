"""Stability of a field cell over the box of its parameters (leapfrog / diffusion bounds).

wave/stiff: (k2 lambda^2 + 2 eta) mu_max(L) + k2 beta^2 mu_max(S) <= 4,
diffusion: nu mu_max(L) + sigma <= 2, with sigma, eta >= 0, checked at every
corner of the box of the parameters the entries use (the left sides are
convex in the parameters, so the corners cover the box).  The cheap
Gershgorin bound on mu_max is tried first, the eigenvalue itself only when
the bound fails.  Not for the audio thread.
"""

from __future__ import annotations

import itertools

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.field_model import FieldModel, f32
from sheafsynth.engine.model.schemes import STABILITY_RTOL

__all__ = ["MAX_CORNER_PARAMS", "check_stability"]

MAX_CORNER_PARAMS = 16



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
            worst = max(parts, key=parts.get)
            k = "k2*" if k2_max != 1.0 else ""
            if model.stiff or eta != 0.0:
                formula = f"({k}lambda^2 + 2 eta) mu_max + {k}beta^2 s_max"
            else:
                formula = f"{k}lambda^2 mu_max"
            raise PresetError(f"unstable {where}: {formula} = {q:.4g} > 4", f"{p}.{worst}")

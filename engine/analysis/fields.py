"""Frozen spectral radius of a field cell, mode by mode.

A field's held update (engine.ir.fields: u⁺ = u + cv (u − u⁻) − L (cl u +
ce (u − u⁻)) − cf S u) only involves L and S, whose eigenvectors do not
change when knobs move.  When L and S share eigenvectors (S absent, or
commuting with L as on grids where S = L²), every mode of L-eigenvalue ℓ
and S-eigenvalue s is the scalar recursion

    z² − (1 + cv − (cl + ce) ℓ − cf s) z + (cv − ce ℓ) = 0

(diffusion: z = 1 + cd0 − cd1 ℓ), so the radius of the whole field is the
largest root over its modes — exact, and cheap once L has been
diagonalised (done once per field and cached).  Otherwise the 2n × 2n block
is solved densely for small fields.  A root on the unit circle is a drift
mode (a free field's constant displacement).
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from sheafsynth.engine.analysis.assemble_field import assemble_block
from sheafsynth.engine.analysis.spectra import DENSE_ONE_OFF_MAX
from sheafsynth.engine.ir.fields import coefficients, kappa2

__all__ = ["field_radius", "drift_count", "moving_symbols"]

#: id(field program) -> (field program, (eigenvalues of L, of S or None or "noncommuting") or None);
#: one diagonalisation per field, reused at every corner and note.
_SPECTRA: dict[int, tuple] = {}


def _spectrum(fp):
    key = id(fp)
    hit = _SPECTRA.get(key)
    if hit is not None and hit[0] is fp:
        return hit[1]
    n = fp.n_dof
    L = fp.L.toarray() if hasattr(fp.L, "toarray") else np.asarray(fp.L)
    if n > DENSE_ONE_OFF_MAX:
        out = None
    else:
        lam, V = np.linalg.eigh(0.5 * (L + L.T))
        s = None
        if fp.S is not None and fp.uses_stiff:
            S = fp.S.toarray()
            T = V.T @ S @ V
            off = T - np.diag(np.diag(T))
            if np.max(np.abs(off)) <= 1e-8 * max(1.0, np.max(np.abs(T))):
                s = np.diag(T).copy()
            else:
                s = "noncommuting"
        out = (lam, s)
    _SPECTRA[key] = (fp, out)
    return out


def _quadratic_radius(b: np.ndarray, c: np.ndarray) -> np.ndarray:
    """max |root| of z² − b z + c = 0, elementwise."""
    disc = b * b - 4.0 * c
    out = np.empty_like(b)
    cplx = disc < 0
    out[cplx] = np.sqrt(np.maximum(c[cplx], 0.0))
    r = np.sqrt(np.maximum(disc[~cplx], 0.0))
    out[~cplx] = np.maximum(np.abs(b[~cplx] + r), np.abs(b[~cplx] - r)) / 2.0
    return out


def field_radius(fp, env: Mapping[str, float], pitch: float, rate: float) -> float | None:
    """Spectral radius (per sample) of the field's held update, DC drift modes left out; None if unknown.

    env: parameter values; pitch: MIDI note number; rate: sample rate in Hz.
    Fields whose L and S do not commute get a dense eigen-solve of their
    2n × 2n update (n = DOFs) up to DENSE_ONE_OFF_MAX states, else None.

    A mode with ℓ = s = 0 (the kernel of the operator: a free field's
    constant displacement, counted by ``drift_count``) has the roots 1 and
    cv: a level that stays where the strike left it.  It is bounded, so it is
    excluded from the radius and reported as drift instead.
    """
    k = coefficients(fp, env, kappa2(fp, pitch, rate, env), 1.0)
    spec = _spectrum(fp)
    if spec is not None and (spec[1] is None or not isinstance(spec[1], str)):
        lam, s = spec
        null = np.abs(lam) < 1e-9
        if s is not None:
            null &= np.abs(s) < 1e-9
        if fp.dynamics == "diffusion":
            r = np.abs(1.0 + k["cd0"] - k["cd1"] * lam)
            return float(np.max(r[~null], initial=0.0))
        b = 1.0 + k["cv"] - (k["cl"] + k["ce"]) * lam - (k["cf"] * s if s is not None else 0.0)
        c = k["cv"] - k["ce"] * lam
        r = _quadratic_radius(b, c)
        # the null modes keep their other root, cv
        return float(max(np.max(r[~null], initial=0.0), k["cv"] if null.any() else 0.0))
    if 2 * fp.n_dof <= DENSE_ONE_OFF_MAX:
        A = assemble_block(fp, env, pitch, rate)[0]
        return float(np.max(np.abs(np.linalg.eigvals(A.toarray()))))
    return None


def drift_count(fp) -> int:
    """Number of DC drift modes (dimension of the operator's kernel)."""
    spec = _spectrum(fp)
    if spec is None or isinstance(spec[1], str):
        return 0
    lam, s = spec
    null = np.abs(lam) < 1e-9
    if s is not None:
        null &= np.abs(s) < 1e-9
    return int(null.sum())


def moving_symbols(fp) -> set[str]:
    """Parameters that move the field's own update (not its strike or pickup weights)."""
    out: set[str] = set()
    for e in (fp.speed, fp.loss, fp.hf_loss, fp.stiffness):
        out |= set(e.symbols)
    return out

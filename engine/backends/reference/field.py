"""The Python field update: one voice's field block stepped in double precision.

The one Python implementation of the field update of engine.ir.fields
(velocity form; coefficients from :func:`engine.ir.fields.coefficients`,
rounded to float32 exactly as the kernel rounds them); the reference
stepper calls it for every field block, and anything else that needs the
update in Python (tests, the benchmark's cross-checks) calls it too.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from sheafsynth.engine.ir.fields import FieldProgram, coefficients

__all__ = ["FieldState", "new_field_state", "field_read", "field_step"]


@dataclass
class FieldState:
    """One voice's field state over the kept DOFs (double): u and v = u - u_prev.

    ``k2`` is the pitch factor (engine.ir.fields.kappa2, 1 when untuned) and
    ``rho`` the per-sample release factor (engine.ir.fields.release_rho).
    """

    u: np.ndarray
    v: np.ndarray
    k2: float = 1.0
    rho: float = 1.0

    @property
    def u_prev(self) -> np.ndarray:
        return self.u - self.v


def new_field_state(fp: FieldProgram) -> FieldState:
    """A silent field (u = v = 0 over ``fp.n_dof`` DOFs)."""
    return FieldState(np.zeros(fp.n_dof), np.zeros(fp.n_dof))


def field_read(fp: FieldProgram, st: FieldState, env: Mapping[str, float], port: int) -> float:
    """Pickup ``port`` read from the current u (step 2 of engine.ir.program)."""
    return float(fp.weights(fp.outputs[port], env) @ st.u)


def field_step(fp: FieldProgram, st: FieldState, env: Mapping[str, float], inputs: Sequence[float]) -> None:
    """Advance one sample (step 5); ``inputs`` are the gathered strike samples per input port."""
    k = coefficients(fp, env, st.k2, st.rho)
    u, v = st.u, st.v
    if fp.dynamics == "diffusion":
        dv = k["cd0"] * u - k["cd1"] * (fp.L @ u)
    else:
        dv = k["cv"] * v - fp.L @ (k["cl"] * u + k["ce"] * v) + k["cr"] * u
        if fp.uses_stiff and fp.S is not None:
            dv = dv - k["cf"] * (fp.S @ u)
    for port, x in enumerate(inputs):
        if x != 0.0:
            dv = dv + fp.weights(fp.inputs[port], env) * x
    st.v = dv
    st.u = u + dv

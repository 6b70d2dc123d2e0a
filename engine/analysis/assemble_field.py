"""Sparse matrices of one field cell's held update, for the analysis.

The field update of engine.ir.fields (leapfrog wave or explicit diffusion,
one step per sample) read as a linear map on the stacked state
``[u ; u⁻]`` (2n entries, n = the field's degrees of freedom): the same
coefficients (`coefficients`, `kappa2`) the C kernel and the reference
stepper use, so the three consumers of the IR agree by construction.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np
import scipy.sparse as sp

from sheafsynth.engine.ir.fields import FieldProgram, coefficients, kappa2

__all__ = ["assemble_block"]


def assemble_block(fp: FieldProgram, env: Mapping[str, float], pitch: float, rate: float):
    """(A 2n × 2n, B 2n × n_in, C n_out × 2n) of a held voice's field, all CSR.

    env: parameter values (parameter units); pitch: the played note (MIDI
    note number, fractional allowed); rate: sample rate in Hz.
    """
    n = fp.n_dof
    k = coefficients(fp, env, kappa2(fp, pitch, rate, env), 1.0)
    eye = sp.identity(n, format="csr")
    if fp.dynamics == "diffusion":
        a_uu = (1.0 + k["cd0"]) * eye - k["cd1"] * fp.L
        a_up = sp.csr_matrix((n, n))
    else:
        # u+ = u + cv (u - p) - L (cl u + ce (u - p)) - cf S u + cr u
        a_uu = (1.0 + k["cv"] + k["cr"]) * eye - (k["cl"] + k["ce"]) * fp.L
        if fp.uses_stiff:
            a_uu = a_uu - k["cf"] * fp.S
        a_up = -k["cv"] * eye + k["ce"] * fp.L
    A = sp.bmat([[a_uu, a_up], [eye, None]], format="csr")
    B = np.zeros((2 * n, len(fp.inputs)))
    for j, pt in enumerate(fp.inputs):
        B[:n, j] = fp.weights(pt, env)
    C = np.zeros((len(fp.outputs), 2 * n))
    for r, pt in enumerate(fp.outputs):
        C[r, :n] = fp.weights(pt, env)
    return A, sp.csr_matrix(B), sp.csr_matrix(C)

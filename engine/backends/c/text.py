"""C text helpers shared by the kernel generator and its block emitters.

Numbers reach generated C only through :func:`num` (float literal) and
:func:`dnum` (double literal), which refuse non-finite values; identifiers
come from block, loop and slot indices only, never from preset text
(DESIGN §4).  :class:`Coefs` interns parameter-dependent coefficients into
numbered slots; :class:`LoopContext` turns an affine entry into the C
expression a sample loop reads (a slot, its per-sample trajectory, a
constant, or a voice's tuning symbol).
"""

from __future__ import annotations

import math

import numpy as np

from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir.program import StepProgram
from sheafsynth.engine.preset.affine import Affine

__all__ = ["PI", "num", "dnum", "dot", "sig", "Coefs", "LoopContext"]

PI = "3.14159265358979323846"


def num(x: float) -> str:
    """A finite float as a C float literal (exact float32 round trip)."""
    x = float(x)
    if not math.isfinite(x):
        raise BuildError(f"refusing to print a non-finite number ({x!r}) into C source")
    if abs(x) > 3.4028234663852886e38:
        raise BuildError(f"number {x!r} overflows a C float")
    f = float(np.float32(x))
    s = repr(f)
    if "e" not in s and "." not in s and "inf" not in s:
        s += ".0"
    return s + "f"


def dnum(x: float) -> str:
    """A finite float as a C double literal."""
    x = float(x)
    if not math.isfinite(x):
        raise BuildError(f"refusing to print a non-finite number ({x!r}) into C source")
    s = repr(x)
    if "e" not in s and "." not in s:
        s += ".0"
    return s


def dot(pairs: list[tuple[str | None, str]]) -> str:
    """C float expression sum(c * x) over (coefficient or None for zero, operand) pairs."""
    terms = []
    for c, x in pairs:
        if c is None:
            continue
        if c == "1.0f":
            terms.append(x)
        elif c == "-1.0f":
            terms.append(f"-{x}")
        else:
            terms.append(f"{c} * {x}")
    if not terms:
        return "0.0f"
    out = terms[0]
    for t in terms[1:]:
        out += f" - {t[1:]}" if t.startswith("-") else f" + {t}"
    return out


def sig(i: int) -> str:
    """C name of signal ``i`` inside a sample loop."""
    return f"x{i}"


class Coefs:
    """Interns parameter-dependent coefficients into numbered slots."""

    def __init__(self, prog: StepProgram):
        self.pidx = prog.param_index
        self.slots: dict[tuple, int] = {}
        self.exprs: list[Affine] = []

    def slot(self, e: Affine) -> int:
        key = (e.const, e.terms)
        if key not in self.slots:
            self.slots[key] = len(self.exprs)
            self.exprs.append(e)
        return self.slots[key]

    def c_value(self, e: Affine, src: str) -> str:
        """C double expression of a param-only Affine; ``src`` formats p index."""
        out = dnum(e.const)
        for s, c in e.terms:
            out += f" + {dnum(c)} * (double){src.format(self.pidx[s])}"
        return out


class LoopContext:
    """What one specialised sample loop needs: static (``moving`` False) or ramping coefficients."""

    def __init__(self, prog: StepProgram, coefs: Coefs, moving: bool):
        self.prog, self.coefs, self.moving = prog, coefs, moving
        self.tune_sym = {}
        for b in prog.blocks:
            if b.tune_symbol:
                self.tune_sym[f"@tune{b.loop}"] = f"t{b.loop}"
                self.tune_sym[f"@tunec{b.loop}"] = f"tc{b.loop}"

    def env(self) -> dict[str, float]:
        """Every parameter at its preset value (for coefficients that are constant anyway)."""
        return {p.name: p.value for p in self.prog.params}

    def coef(self, e: Affine) -> str | None:
        """C float expression for an entry; None when it is exactly zero."""
        if e.is_zero:
            return None
        pterms = tuple((s, c) for s, c in e.terms if not s.startswith("@"))
        vterms = [(s, c) for s, c in e.terms if s.startswith("@")]
        parts = []
        if pterms:
            k = self.coefs.slot(Affine(e.const, pterms))
            parts.append(f"S->ctraj[{k}][n]" if self.moving else f"c{k}")
        elif e.const != 0.0 or not vterms:
            parts.append(num(e.const))
        for s, c in vterms:
            if s not in self.tune_sym:
                raise BuildError("internal: unknown voice symbol in step program")
            parts.append(self.tune_sym[s] if c == 1.0 else f"{num(c)} * {self.tune_sym[s]}")
        return "(" + " + ".join(parts) + ")" if len(parts) > 1 else parts[0]

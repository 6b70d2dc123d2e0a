"""Small recursive filters: ``onepole``, ``biquad``, ``allpass``.

Coefficients follow the ``scipy.signal.lfilter`` convention
``a[0] y[n] = sum b[i] x[n-i] - sum_{i>=1} a[i] y[n-i]`` with ``a[0] = 1``.
They are realised in direct form I (states are past inputs and outputs),
which keeps every matrix entry affine in the coefficients even when the
coefficients are parameters.
"""

from __future__ import annotations

import math

from sheafsynth.engine.preset.affine import Affine, AffineMatrix, parse_entry
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel

__all__ = ["direct_form_one", "build_onepole", "build_biquad", "allpass_coef_for_delay", "normalized_lattice_allpass", "build_allpass"]


def direct_form_one(name: str, kind: str, b: list[Affine], a: list[Affine], tune: bool = False) -> CellModel:
    """State-space of a direct-form-I filter; unused history states are pruned.

    State order: x[n-1..n-nb], y[n-1..n-na].
    """
    nb = max([i for i in range(1, len(b)) if not b[i].is_zero], default=0)
    na = max([i for i in range(1, len(a)) if not a[i].is_zero], default=0)
    k = nb + na
    zero, one = Affine(), Affine.number(1.0)
    b = b + [zero] * (nb + 1 - len(b))
    a = a + [zero] * (na + 1 - len(a))
    # output row: y = b0 x + sum b_i x[n-i] - sum a_i y[n-i]
    c_row = [b[i] for i in range(1, nb + 1)] + [a[i].scaled(-1.0) for i in range(1, na + 1)]
    d = b[0]
    A = [[zero] * k for _ in range(k)]
    B = [[zero] for _ in range(k)]
    if nb:
        B[0][0] = one                      # x[n-1]+ = x
        for i in range(1, nb):
            A[i][i - 1] = one              # shift the input history
    if na:
        r = nb                             # y[n-1]+ = y
        A[r] = list(c_row)
        B[r][0] = d
        for i in range(1, na):
            A[nb + i][nb + i - 1] = one    # shift the output history
    C = [c_row] if k else [[]]
    return CellModel(name, kind, 1, 1,
                     AffineMatrix(k, k, tuple(tuple(r) for r in A)),
                     AffineMatrix(k, 1, tuple(tuple(r) for r in B)),
                     AffineMatrix(1, k, tuple(tuple(r) for r in C)),
                     AffineMatrix.from_rows([[d]]), tune=tune)


def _coeffs(raw, path: str, parameters, n: int | tuple[int, int]) -> list[Affine]:
    lo, hi = (n, n) if isinstance(n, int) else n
    if not isinstance(raw, list) or not lo <= len(raw) <= hi:
        want = f"{lo}" if lo == hi else f"{lo} to {hi}"
        raise PresetError(f"expected a list of {want} coefficients", path)
    return [parse_entry(x, f"{path}[{i}]", parameters) for i, x in enumerate(raw)]


def _check_a0(a: list[Affine], path: str) -> None:
    if not (a[0].is_const and a[0].const == 1.0):
        raise PresetError("a[0] must be 1 (normalise the coefficients)", path + ".a[0]")


def build_onepole(spec: dict, path: str, parameters) -> CellModel:
    if "pole" in spec:
        if "a" in spec or "b" in spec:
            raise PresetError('give either "pole" or "b"/"a", not both', path)
        p = parse_entry(spec["pole"], path + ".pole", parameters)
        # unity-DC-gain lowpass: y = (1 - p) x + p y[n-1]
        b = [p.scaled(-1.0) + Affine.number(1.0)]
        a = [Affine.number(1.0), p.scaled(-1.0)]
    else:
        if "b" not in spec or "a" not in spec:
            raise PresetError('a onepole needs "pole", or both "b" and "a"', path)
        b = _coeffs(spec["b"], path + ".b", parameters, (1, 2))
        a = _coeffs(spec["a"], path + ".a", parameters, 2)
        _check_a0(a, path)
    return direct_form_one(spec["id"], "onepole", b, a)


def build_biquad(spec: dict, path: str, parameters) -> CellModel:
    b = _coeffs(spec["b"], path + ".b", parameters, 3)
    a = _coeffs(spec["a"], path + ".a", parameters, 3)
    _check_a0(a, path)
    return direct_form_one(spec["id"], "biquad", b, a)


def allpass_coef_for_delay(d: float) -> float:
    """First-order allpass coefficient with DC phase delay ``d`` samples.

    a = (1 - d) / (1 + d)  (Thiran 1971; Laakso et al. 1996).
    """
    return (1.0 - d) / (1.0 + d)


def normalized_lattice_allpass(name: str, k: Affine, c: Affine, tune: bool = False) -> CellModel:
    """First-order allpass (k + z^-1) / (1 + k z^-1) as one normalized lattice section.

    ``[y; s+] = [[k, c], [c, -k]] [x; s]`` with c = sqrt(1 - k^2): the step
    matrix is orthogonal for every k, so the section's energy never grows
    even while k moves (Gray & Markel 1975).
    """
    A = AffineMatrix.from_rows([[k.scaled(-1.0)]])
    return CellModel(name, "allpass", 1, 1, A, AffineMatrix.from_rows([[c]]),
                     AffineMatrix.from_rows([[c]]), AffineMatrix.from_rows([[k]]), tune=tune)


def build_allpass(spec: dict, path: str, parameters) -> CellModel:
    has_delay, has_coef = "delay" in spec, "coef" in spec
    if has_delay == has_coef:
        raise PresetError('an allpass needs exactly one of "delay" or "coef"', path)
    if not has_coef and spec["delay"] == "pitch-fraction":
        # k and c = sqrt(1 - k^2) are set per voice from the played pitch;
        # the symbols are renamed per tuning loop by the lowering.
        return normalized_lattice_allpass(spec["id"], Affine.symbol("@tune"), Affine.symbol("@tunec"), tune=True)
    if has_coef:
        a = parse_entry(spec["coef"], path + ".coef", parameters)
        if a.is_const and not -1.0 < a.const < 1.0:
            raise PresetError(f"coefficient {a.const:g} must lie inside (-1, 1)", path + ".coef")
    else:
        a = Affine.number(allpass_coef_for_delay(float(spec["delay"])))
    if a.is_const:
        k = a.const
        return normalized_lattice_allpass(spec["id"], a, Affine.number(math.sqrt(1.0 - k * k)))
    # A parameter-dependent coefficient keeps every entry affine: direct form I.
    one = Affine.number(1.0)
    return direct_form_one(spec["id"], "allpass", [a, one], [one, a])

"""Small recursive filters: ``onepole``, ``biquad``, ``allpass``.

Coefficients follow the ``scipy.signal.lfilter`` convention
``a[0] y[n] = sum b[i] x[n-i] - sum_{i>=1} a[i] y[n-i]`` with ``a[0] = 1``.
They are realised in direct form I (states are past inputs and outputs),
which keeps every matrix entry affine in the coefficients even when the
coefficients are parameters.

Rates (engine.model.timebase): ``b``/``a`` and ``pole`` are per sample at
the preset's design rate.  At another rate numeric coefficients move by the
matched z-transform (engine.model.rate_maps.rescale_rational), an FIR
(``a = [1, 0]``) keeps its tap spacing in time (respace_taps, affine in
knobs on the taps), and a knob on a pole or on a recursive coefficient is
refused (it would not stay affine).  Physical forms, designed afresh at
every rate: onepole ``"lowpass_hz"`` / ``"highpass_hz"``; biquad
``"design": {"type": lowpass|highpass|bandpass|notch|peak, "hz", "q",
"gain_db"}``; allpass ``"delay": {"ms": t}``.
"""

from __future__ import annotations

import math

from sheafsynth.engine.preset.affine import Affine, AffineMatrix, parse_entry
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.cells.model import CellModel
from sheafsynth.engine.model.rate_maps import (BIQUAD_DESIGNS, biquad_design, onepole_design, rescale_rational,
                                              respace_taps)
from sheafsynth.engine.model.timebase import Timebase

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


def _numbers(x: list[Affine]) -> list[float] | None:
    return [e.const for e in x] if all(e.is_const for e in x) else None


def _at_rate(name: str, kind: str, b: list[Affine], a: list[Affine], tb: Timebase, path: str) -> CellModel:
    """Direct form I of (b, a) written per sample at the design rate, carried to ``tb``."""
    if tb.native:
        return direct_form_one(name, kind, b, a)
    recursive = any(not e.is_zero for e in a[1:])
    if not recursive:
        return direct_form_one(name, kind, respace_taps(b, tb.ratio), [Affine.number(1.0)])
    nb, na = _numbers(b), _numbers(a)
    if nb is None or na is None:
        tb.refuse("a knob on a recursive coefficient", path,
                  "use a physical corner (lowpass_hz, highpass_hz, design) or run at the design rate")
    b2, a2 = rescale_rational(nb, na, tb.ratio)
    return direct_form_one(name, kind, [Affine.number(x) for x in b2], [Affine.number(x) for x in a2])


def _hz(spec: dict, key: str, path: str, rate: float) -> float:
    x = spec[key]
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise PresetError(f"{key} must be a number in hertz (a knob cannot move a corner: it would "
                          "not stay affine)", f"{path}.{key}")
    if not 0.0 < x < 0.5 * rate:
        raise PresetError(f"{x:g} Hz must lie between 0 and half the sample rate ({0.5 * rate:g} Hz)",
                          f"{path}.{key}")
    return float(x)


def build_onepole(spec: dict, path: str, parameters, tb: Timebase) -> CellModel:
    forms = [k for k in ("pole", "b", "lowpass_hz", "highpass_hz") if k in spec]
    if "a" in spec and "b" not in spec:
        forms.append("a")
    if len(forms) > 1:
        raise PresetError(f'give one of "pole", "b"/"a", "lowpass_hz" or "highpass_hz", not {forms[0]!r} '
                          f'and {forms[1]!r}', path)
    if forms and forms[0] in ("lowpass_hz", "highpass_hz"):
        key = forms[0]
        b0, a0 = onepole_design(key[:-3], _hz(spec, key, path, tb.rate), tb.rate)
        return direct_form_one(spec["id"], "onepole", [Affine.number(x) for x in b0],
                               [Affine.number(x) for x in a0])
    if "pole" in spec:
        p = parse_entry(spec["pole"], path + ".pole", parameters)
        if not tb.native:
            if not p.is_const:
                tb.refuse("a knob on a pole", path + ".pole",
                          "give the cell a fixed corner (lowpass_hz) and mix it with a knob on a wire")
            p = Affine.number(math.pow(p.const, 1.0 / tb.ratio)) if p.const > 0 else p
        # unity-DC-gain lowpass: y = (1 - p) x + p y[n-1]
        b = [p.scaled(-1.0) + Affine.number(1.0)]
        a = [Affine.number(1.0), p.scaled(-1.0)]
        return direct_form_one(spec["id"], "onepole", b, a)
    if "b" not in spec or "a" not in spec:
        raise PresetError('a onepole needs "pole", both "b" and "a", "lowpass_hz" or "highpass_hz"', path)
    b = _coeffs(spec["b"], path + ".b", parameters, (1, 2))
    a = _coeffs(spec["a"], path + ".a", parameters, 2)
    _check_a0(a, path)
    return _at_rate(spec["id"], "onepole", b, a, tb, path)


def build_biquad(spec: dict, path: str, parameters, tb: Timebase) -> CellModel:
    if "design" in spec:
        if "b" in spec or "a" in spec:
            raise PresetError('give either "design" or "b"/"a", not both', path)
        d, dpath = spec["design"], path + ".design"
        if not isinstance(d, dict):
            raise PresetError('"design" is {"type", "hz", "q", "gain_db"}', dpath)
        extra = sorted(set(d) - {"type", "hz", "q", "gain_db"})
        if extra:
            raise PresetError(f"unknown key {extra[0]!r} (expected type, hz, q, gain_db)", f"{dpath}.{extra[0]}")
        kind = d.get("type")
        if kind not in BIQUAD_DESIGNS:
            raise PresetError(f"type must be one of {', '.join(BIQUAD_DESIGNS)}, got {kind!r}", dpath + ".type")
        hz = _hz(d, "hz", dpath, tb.rate) if "hz" in d else None
        if hz is None:
            raise PresetError('a design needs "hz"', dpath)
        q = d.get("q", 0.7071067811865476)
        gain = d.get("gain_db", 0.0)
        for key, x in (("q", q), ("gain_db", gain)):
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
                raise PresetError(f"{key} must be a number", f"{dpath}.{key}")
        if q <= 0:
            raise PresetError(f"q must be positive, got {q!r}", dpath + ".q")
        b0, a0 = biquad_design(kind, hz, float(q), float(gain), tb.rate)
        return direct_form_one(spec["id"], "biquad", [Affine.number(x) for x in b0],
                               [Affine.number(x) for x in a0])
    if "b" not in spec or "a" not in spec:
        raise PresetError('a biquad needs "b" and "a", or "design"', path)
    b = _coeffs(spec["b"], path + ".b", parameters, 3)
    a = _coeffs(spec["a"], path + ".a", parameters, 3)
    _check_a0(a, path)
    return _at_rate(spec["id"], "biquad", b, a, tb, path)


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


def build_allpass(spec: dict, path: str, parameters, tb: Timebase) -> CellModel:
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
        if not tb.native:
            if not a.is_const:
                tb.refuse("a knob on an allpass coefficient", path + ".coef",
                          'give "delay" in samples or {"ms": t}')
            d = (1.0 - a.const) / (1.0 + a.const) * tb.ratio     # its DC phase delay keeps its time
            a = Affine.number(allpass_coef_for_delay(d))
    else:
        a = Affine.number(allpass_coef_for_delay(tb.delay_samples(spec["delay"], path + ".delay")))
    if a.is_const:
        k = a.const
        return normalized_lattice_allpass(spec["id"], a, Affine.number(math.sqrt(1.0 - k * k)))
    # A parameter-dependent coefficient keeps every entry affine: direct form I.
    one = Affine.number(1.0)
    return direct_form_one(spec["id"], "allpass", [a, one], [one, a])

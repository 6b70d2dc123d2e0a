"""The sample rate a network is built for, and how a preset's quantities reach it.

A preset states every quantity either in physical units (milliseconds,
hertz, T60 seconds, "per second" rates) or per sample, as designed at the
preset's ``design_rate`` (Hz; version 1 files were designed at 48 kHz and
migrate with ``"design_rate": 48000``).  A :class:`Timebase` carries the
rate the kernel runs at and the design rate; the cell builders
(engine.model.cells) use it to turn every quantity into per-sample numbers
for that rate.  At the design rate a per-sample value is used exactly as
written (no arithmetic touches it), so a version 1 preset renders at 48 kHz
sample for sample as it always did.

The conversions keep what a player hears, the same at every rate:

* lengths (delay lines, allpass delays, excitation bursts) keep their time;
* losses per sample (field ``loss``, ``hf_loss``) keep their rate per
  second, wave speeds and stiffness of untuned fields their value per
  second (the Courant number follows the rate);
* one-pole and biquad poles and zeros keep their s-plane position
  (matched z-transform, z' = z^(fs0/fs)); a zero at z = -1 stays there;
* the taps of a short FIR (a loop's averaging filter) keep their time
  spacing (engine.model.rate_maps.respace_taps);
* a state-space block with an invertible A keeps its continuous-time
  dynamics (the matrix logarithm, then the matrix exponential at the new
  rate, zero-order-hold input);
* strikes into a field keep their force (the per-sample input of a
  second-order scheme scales as (fs0/fs)^2, of diffusion as fs0/fs), an
  impulse keeps its area and a noise burst its power per hertz.

What cannot be carried affinely (a knob on a per-sample pole, say) is
refused at other rates with the JSON path and the way out.  Not for the
audio thread.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NoReturn

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.preset.affine import Affine, parse_entry

__all__ = ["REFERENCE_RATE", "Timebase", "excitation_at"]

REFERENCE_RATE = 48000.0   # Hz: the design rate of version 1 presets and the default of version 2


@dataclass(frozen=True)
class Timebase:
    """``rate``: Hz the kernel runs at; ``design_rate``: Hz the per-sample values were written for."""

    rate: float
    design_rate: float = REFERENCE_RATE

    @property
    def ratio(self) -> float:
        """rate / design_rate: how many samples now stand for one design sample."""
        return self.rate / self.design_rate

    @property
    def native(self) -> bool:
        """True at the design rate: per-sample values are used as written."""
        return self.rate == self.design_rate

    def per_sample(self, e: Affine) -> Affine:
        """A per-sample rate (loss, Courant number, ...) carried to this rate: times fs0/fs."""
        return e if self.native else e.scaled(1.0 / self.ratio)

    def samples(self, raw, path: str, minimum: int = 1) -> int:
        """A length: whole samples at the design rate, or ``{"ms": t}``; whole samples at this rate."""
        if isinstance(raw, dict):
            ms = _only_key(raw, "ms", path)
            n = ms * self.rate / 1000.0
        elif isinstance(raw, int) and not isinstance(raw, bool):
            if self.native:
                return raw
            n = raw * self.ratio
        else:
            raise PresetError('expected a whole number of samples (at the design rate) or {"ms": t}', path)
        return max(minimum, int(round(n)))

    def delay_samples(self, raw, path: str) -> float:
        """A (fractional) delay: samples at the design rate, or ``{"ms": t}``; samples at this rate."""
        if isinstance(raw, dict):
            return _only_key(raw, "ms", path) * self.rate / 1000.0
        if isinstance(raw, bool) or not isinstance(raw, (int, float)) or not math.isfinite(raw):
            raise PresetError('expected a delay in samples (at the design rate) or {"ms": t}', path)
        return float(raw) if self.native else float(raw) * self.ratio

    def rate_entry(self, raw, path: str, parameters, t60: bool = False) -> Affine:
        """An entry that is a rate per sample (design rate), ``{"per_second": entry}`` or, where
        ``t60`` is allowed, ``{"t60": seconds}`` (amplitude falls 60 dB in that time,
        ISO 3382-1's definition of reverberation time applied to one decay)."""
        if isinstance(raw, dict) and "per_second" in raw:
            if len(raw) != 1:
                raise PresetError('"per_second" stands alone in its entry', path)
            return parse_entry(raw["per_second"], path + ".per_second", parameters).scaled(1.0 / self.rate)
        if isinstance(raw, dict) and "t60" in raw:
            if not t60:
                raise PresetError('a T60 is a loss; give this value per sample or {"per_second": x}', path)
            secs = _only_key(raw, "t60", path)
            return Affine.number(math.log(1000.0) / (secs * self.rate))
        return self.per_sample(parse_entry(raw, path, parameters))

    def refuse(self, what: str, path: str, fix: str) -> NoReturn:
        """Raise the one-line error for a per-sample quantity that cannot move to this rate."""
        raise PresetError(f"{what} is written per sample for {self.design_rate:g} Hz and cannot be carried "
                          f"to {self.rate:g} Hz; {fix}", path)


def _only_key(raw: dict, key: str, path: str) -> float:
    if set(raw) != {key}:
        extra = sorted(set(raw) - {key})
        raise PresetError(f"unknown key {extra[0]!r} (expected {key})" if extra else f'needs "{key}"', path)
    x = raw[key]
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) or x <= 0:
        raise PresetError(f"{key} must be a positive number, got {x!r}", f"{path}.{key}")
    return float(x)


def excitation_at(exc: dict, tb: Timebase) -> dict:
    """The preset's excitation with per-sample numbers for ``tb.rate``.

    ``length`` (samples at the design rate, or ``{"ms": t}``) keeps its time;
    an impulse keeps its area (gain times fs/fs0) and a noise burst its
    power per hertz (gain times sqrt(fs/fs0)); ``brightness_exponent``
    carries the velocity-brightness pole, defined at 48 kHz, to the rate
    (pole^(48000/fs)).  At the design rate, and for 48 kHz brightness, the
    dictionary is returned unchanged.
    """
    out = dict(exc)
    length = out.get("length", "period")
    if length != "period":
        out["length"] = tb.samples(length, "excitation.length")
    if not tb.native:
        k = tb.ratio if out.get("kind", "noise") == "impulse" else math.sqrt(tb.ratio)
        out["gain"] = float(out.get("gain", 1.0)) * k
    if tb.rate != REFERENCE_RATE:
        out["brightness_exponent"] = REFERENCE_RATE / tb.rate
    return out

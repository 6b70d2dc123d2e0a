"""``sheafsynth check``: the truth about a preset before it reaches speakers.

The report (a plain dict, JSON shape in engine/analysis/schema/check-report.json):

* frozen stability: spectral radius of the held voice's A(θ) at every
  corner of the box spanned by the mapped parameters (controls' ranges)
  and at its centre, at the lowest, middle and highest notes;
* stability under knob motion: a certificate from sheafsynth.engine.analysis.certify
  ("any-speed", "ramp-limited" with the slope, or False with the reason);
* modes: the partials heard at the middle note (parameter defaults): the
  lowest and the strongest from ``excite`` to the output, each with
  frequency, note, T60, amplitude (dB), cents from the nearest harmonic of
  the lowest strong partial and the cells carrying it;
* drift: eigenvalues at z = 1, named by the cells that carry them;
* fields: dim H⁰, face consistency and the λ²μ_max bound per corner.

Results are cached by the preset's content (and this module's version) in
the kernel cache folder, so render and play can afford the guard rails.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shlex
import tempfile
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import scipy.linalg as sla

from sheafsynth.engine.analysis.assemble import assemble
from sheafsynth.engine.analysis.certify import certify_network, radius_upper_bound
from sheafsynth.engine.analysis.deadline import GUARD_TIME_LIMIT_S, Deadline
from sheafsynth.engine.analysis.fields import drift_count, field_radius
from sheafsynth.engine.analysis.modes import LISTED_DEFAULT, drift_modes, modes
from sheafsynth.engine.analysis.spectra import corners, probe_radius, spectral_radius
from sheafsynth.engine.errors import NotDecided, PresetError, UnstableError
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.ir.program import StepProgram, note_hz
from sheafsynth.engine.locations import ENGINE_DIR, FACTORY_DIR, cache_dir
from sheafsynth.engine.model.dense import DENSE_MAX
from sheafsynth.engine.preset import Preset

__all__ = [
    "ANALYSIS_VERSION",
    "MARGIN",
    "mapped_box",
    "check_notes",
    "corners_and_centre",
    "frozen",
    "is_checked",
    "check",
    "guard",
    "ramp_limits",
]

#: Bump when the report's meaning changes (cached reports are then ignored).
ANALYSIS_VERSION = 3
#: Tolerance on ρ = 1 (per sample): below 1 − MARGIN is stable, above 1 + MARGIN unstable.
MARGIN = 1e-9


# --------------------------------------------------------------------------
# the parameter box and the notes

def mapped_box(preset: Preset) -> dict[str, tuple[float, float]]:
    """Range of every parameter a controller can move (control min/max)."""
    box: dict[str, tuple[float, float]] = {}
    for c in preset.controls:
        if c.parameter is None:
            continue
        spec = preset.parameters[c.parameter]
        lo, hi = sorted((spec.lo if c.lo is None else c.lo, spec.hi if c.hi is None else c.hi))
        if c.parameter in box:
            lo, hi = min(lo, box[c.parameter][0]), max(hi, box[c.parameter][1])
        box[c.parameter] = (lo, hi)
    return box


def check_notes(preset: Preset, notes: Iterable[int] | None = None) -> list[int]:
    """The MIDI notes to check: ``notes`` if given (each 0..127), else the preset's lowest, middle and highest."""
    if notes:
        out = sorted({int(n) for n in notes})
        for n in out:
            if not 0 <= n <= 127:
                raise PresetError(f"note {n} is outside 0..127", "--notes")
        return out
    lo, hi = preset.notes
    return sorted({lo, (lo + hi) // 2, hi})


def corners_and_centre(box) -> list[dict[str, float]]:
    """Every corner of the box and its centre (one empty point for an empty box)."""
    pts = corners(dict(box)) if box else [{}]
    if box:
        pts.append({n: 0.5 * (lo + hi) for n, (lo, hi) in box.items()})
    return pts


# --------------------------------------------------------------------------
# frozen stability

def _exact_radius(A, deadline: Deadline) -> tuple[float, complex | None]:
    """Spectral radius by dense eigenvalues, or the rigorous sparse scan (stops at ``deadline``)."""
    n = A.shape[0]
    if n == 0:
        return 0.0, None
    if n <= DENSE_MAX:
        ev = sla.eigvals(A.toarray(), check_finite=False)
        i = int(np.argmax(np.abs(ev)))
        return float(abs(ev[i])), complex(ev[i])
    return float(spectral_radius(A, deadline=deadline)), None


def _state_estimate(prog: StepProgram, note: float) -> int:
    """Size of the held voice's state without assembling it (delays at the note's period)."""
    n = 0
    period = prog.rate / note_hz(note)
    for b in prog.blocks:
        if b.is_delay:
            n += b.fixed_length() if not b.pitch else int(period) + 2
        elif b.is_field:
            n += 2 * b.fieldprog().n_dof
        else:
            n += b.n_state
    return n


def _exact_radius_drift(A, deadline: Deadline) -> tuple[float, complex | None, int]:
    """(radius over the modes that are not DC drift, its eigenvalue, number of drift modes).

    A drift mode is a simple eigenvalue at exactly z = 1 (geometric = algebraic
    multiplicity): a constant level that neither grows nor decays, like a free
    bar at rest in a new place.  A defective (Jordan) one grows and counts as
    an ordinary marginal eigenvalue.
    """
    n = A.shape[0]
    if n == 0 or n > DENSE_MAX:
        r, z = _exact_radius(A, deadline)
        return r, z, 0
    M = A.toarray()
    ev = sla.eigvals(M, check_finite=False)
    at_one = np.abs(ev - 1.0) < 1e-9
    alg = int(at_one.sum())
    drift = 0
    if alg:
        geo = n - np.linalg.matrix_rank(M - np.eye(n), tol=1e-9)
        if geo == alg:
            drift = alg
            ev = ev[~at_one]
    if len(ev) == 0:
        return 0.0, None, drift
    i = int(np.argmax(np.abs(ev)))
    return float(abs(ev[i])), complex(ev[i]), drift


def _field_drift(prog: StepProgram) -> int:
    return sum(drift_count(b.field) for b in prog.blocks if b.is_field)


def _field_radii(prog: StepProgram, theta, note) -> dict[int, float]:
    """Exact frozen radius of every field cell (engine.analysis.fields)."""
    env = {p.name: float(p.value) for p in prog.params}
    env.update(theta)
    out = {}
    for b in prog.blocks:
        if b.is_field:
            r = field_radius(b.field, env, float(note), prog.rate)
            if r is not None:
                out[b.index] = r
    return out


def _slowest_mode_radius(sysm, deadline: Deadline) -> float | None:
    """Largest |z| of the eigenvalues found by shift-invert probes on the unit circle (a lower bound on ρ).

    Probes at DC, at 12 frequencies from 20 Hz to 0.45·rate and at Nyquist
    (engine.analysis.spectra.probe_radius); stops at ``deadline``.
    """
    hz = np.geomspace(20.0, 0.45 * sysm.rate, 12)
    angles = np.concatenate([[0.0], 2.0 * np.pi * hz / sysm.rate, [np.pi]])
    return probe_radius(sysm.A, angles, deadline=deadline)


def frozen(prog: StepProgram, box, notes, deadline: Deadline | None = None) -> dict:
    """Spectral radius at every corner (and centre) for every note.

    Small systems get dense eigenvalues.  Large ones (long delay lines at low
    notes) get a rigorous upper bound from the scaled small-gain test
    (engine.analysis.certify.radius_upper_bound) and, at the worst such point, the
    radius of the slowest partial found by shift-invert (a lower bound); the
    sparse eigenvalue scan is the fallback when no bound below 1 exists.
    Every point and every eigen-solve stops at ``deadline``
    (engine.analysis.deadline.NotDecided).
    """
    deadline = deadline or Deadline()
    points = []
    worst = None
    pts = corners_and_centre(box)
    for note in notes:
        for k, theta in enumerate(pts):
            deadline.step(f"frozen radius at note {note}, point {k + 1} of {len(pts)}")
            z = None
            n_est = _state_estimate(prog, note)
            if n_est > DENSE_MAX:
                fr = _field_radii(prog, theta, note)
                bound = radius_upper_bound(prog, theta, note, field_radius=fr, deadline=deadline)
                if bound is not None:
                    pt = {"note": note, "corner": {k: float(v) for k, v in theta.items()}, "radius": bound,
                          "exact": False, "upper_bound": bound, "states": n_est, "_sys": None}
                    drift = _field_drift(prog)
                    if drift:
                        pt["drift"] = drift
                    points.append(pt)
                    if worst is None or bound > worst["radius"]:
                        worst = pt
                    continue
            sysm = assemble(prog, theta, note)
            if sysm.n_states > DENSE_MAX:
                # no bound below 1: an eigenvalue found on or outside the unit circle
                # by shift-invert proves the point not strictly stable without the
                # slow full scan (its radius is then a lower bound)
                lo = _slowest_mode_radius(sysm, deadline)
                if lo is not None and lo >= 1.0 - MARGIN:
                    pt = {"note": note, "corner": {k: float(v) for k, v in theta.items()}, "radius": lo,
                          "exact": False, "lower_bound": lo, "states": sysm.n_states}
                    points.append(pt)
                    if worst is None or lo > worst["radius"]:
                        worst = pt
                    continue
            r, z, drift = _exact_radius_drift(sysm.A, deadline)
            exact = True
            pt = {"note": note, "corner": {k: float(v) for k, v in theta.items()}, "radius": r,
                  "exact": exact, "states": sysm.n_states}
            if drift:
                pt["drift"] = drift
            if z is not None and r >= 1.0 - MARGIN:
                f = abs(math.atan2(z.imag, z.real)) * prog.rate / (2 * math.pi)
                pt["mode"] = {"freq_hz": f, "growth_db_per_s": 20 * prog.rate * math.log10(max(r, 1e-300))}
            points.append(pt)
            if worst is None or r > worst["radius"]:
                worst = pt
    rmax = worst["radius"] if worst else 0.0
    status = "stable" if rmax < 1.0 - MARGIN else ("marginal" if rmax <= 1.0 + MARGIN else "unstable")
    if status == "stable" and any(p.get("drift") for p in points):
        status = "drift"
    # at bounded points the reported radius is the (tight) upper bound
    bounded = [p for p in points if "_sys" in p]
    for p in bounded:
        del p["_sys"]
    found = max((p["radius"] for p in points), default=0.0)
    worst = max(points, key=lambda p: p["radius"]) if points else None
    return {"status": status, "radius_max": found, "worst": worst, "points": points,
            "exact": all(p["exact"] for p in points),
            "radius_upper_bound": max((p["upper_bound"] for p in bounded), default=None)}


# --------------------------------------------------------------------------
# the report

_CODE_DIGEST: list[str] = []


def _code_digest() -> str:
    """Hash of the engine's sources: a changed analysis never reuses old reports."""
    if not _CODE_DIGEST:
        h = hashlib.sha256()
        for p in sorted(ENGINE_DIR.rglob("*.py")):
            h.update(p.read_bytes())
        _CODE_DIGEST.append(h.hexdigest())
    return _CODE_DIGEST[0]


def _preset_hash(preset: Preset, notes, rate) -> str:
    """Cache key of a report: the preset as loaded (``--set`` values included), notes, rate (Hz), code.

    The rate is taken as a float, so 48000 and 48000.0 share one key.
    """
    h = hashlib.sha256()
    h.update(json.dumps(preset.raw, sort_keys=True).encode())
    h.update(json.dumps([[int(n) for n in notes], float(rate), ANALYSIS_VERSION, _code_digest()]).encode())
    return h.hexdigest()[:24]


#: Suffix of the cache key of a verdict (the report without modes) that render and play read.
_VERDICT = "-v"
#: Verdict keys this process could not decide, with the longest time limit (s) tried: a
#: second request with no more time answers at once instead of trying again.
_UNDECIDED: dict[str, float] = {}


def _cache_path(key: str) -> Path:
    return cache_dir() / "analysis" / f"{key}.json"


def _cached(key: str):
    p = _cache_path(key)
    try:
        return json.loads(p.read_text())
    except (OSError, ValueError):
        return None


def is_checked(preset: Preset, notes: Iterable[int] | None = None, rate: float = 48000.0) -> bool:
    """True when a verdict for ``preset`` at ``rate`` Hz is in the cache (so guarding it is quick).

    ``sheafsynth check NAME`` and the guard of render and play store one.
    """
    key = _preset_hash(preset, check_notes(preset, notes), rate)
    return _cached(key + _VERDICT) is not None or _cached(key) is not None


def _store(key: str, report: dict) -> None:
    p = _cache_path(key)
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=p.parent, suffix=".tmp")
        with os.fdopen(fd, "w") as f:
            json.dump(report, f)
        os.replace(tmp, p)
    except OSError:
        pass


def check(preset: Preset, notes: Iterable[int] | None = None, rate: float = 48000.0,
          n_modes: int = LISTED_DEFAULT, use_cache: bool = True, with_modes: bool = True,
          time_limit_s: float | None = None, progress: Callable[[str], None] | None = None) -> dict:
    """The full check report for ``preset`` at ``rate`` Hz (see the module docstring).

    ``with_modes=False`` skips the modal part (the guard rails need only the
    verdict and the certificate); it reuses a full report stored by an
    earlier check of the same preset, notes and rate, and a full check also
    stores its verdict for the guard.  ``time_limit_s`` (s, None for no
    limit) is a deadline handed to every expensive step
    (engine.analysis.deadline): past it, NotDecided is raised and nothing is
    cached.  ``progress(text)`` hears the name of each step as it starts.
    """
    notes = check_notes(preset, notes)
    base = _preset_hash(preset, notes, rate)
    key = base + (("" if n_modes == LISTED_DEFAULT else f"-m{n_modes}") if with_modes else _VERDICT)
    if use_cache:
        hit = _cached(key) if with_modes else (_cached(key) or _cached(base))
        if hit is not None:
            return hit
    tried = _UNDECIDED.get(base)
    if time_limit_s is not None and tried is not None and time_limit_s <= tried:
        raise NotDecided(tried, "an earlier attempt in this process")
    deadline = Deadline(time_limit_s, progress)
    prog = lower(preset, rate)
    box = mapped_box(preset)
    try:
        report = _verdict(prog, preset, box, notes, deadline)
    except NotDecided:
        _UNDECIDED[base] = max(time_limit_s or 0.0, _UNDECIDED.get(base, 0.0))
        raise
    mid = notes[len(notes) // 2]
    report["modes"], report["drift_modes"] = _modes(prog, mid, n_modes) if with_modes else ([], [])
    report["mode_note"] = mid
    report["fields"] = _fields(prog, preset, box)
    if use_cache:
        _store(key, report)
        if with_modes:
            _store(base + _VERDICT, {**report, "modes": [], "drift_modes": []})
    return report


def _verdict(prog: StepProgram, preset: Preset, box, notes: list[int], deadline: Deadline) -> dict:
    """The report without modes: frozen stability and the certificate (stops at ``deadline``)."""
    fz = frozen(prog, box, notes, deadline)
    report = {
        "preset": preset.name,
        "rate": prog.rate,
        "notes": notes,
        "box": {k: list(v) for k, v in box.items()},
        "stable": fz["status"] in ("stable", "drift"),
        "frozen": fz["status"],
        "spectral_radius_max": fz["radius_max"],
        "radius_exact": fz["exact"],
        "radius_upper_bound": fz["radius_upper_bound"],
        "worst_corner": {"note": fz["worst"]["note"], "values": fz["worst"]["corner"]} if fz["worst"] else None,
        "corners": fz["points"],
        "warnings": [],
    }
    if fz["status"] == "drift":
        report["warnings"].append("DC drift: some state holds a constant level after a note (bounded, "
                                  "never growing); see drift_modes")
    if fz["status"] not in ("stable", "drift"):
        report["certified"] = False
        report["route"] = "none"
        report["slope_per_s"] = {}
        report["failing"] = _describe_point(fz["worst"], fz["status"])
    else:
        report.update(_certificate(prog, preset, box, notes, deadline))
        if not report["radius_exact"] and report["certified"] is False:
            report["warnings"].append("the spectral radius of the largest networks is a sparse estimate and no "
                                      "certificate backs it")
    if report["stable"] and report["certified"] is False:
        report["warnings"].append("frozen-stable only: fast knob motion is not proven safe")
    return report


def _describe_point(pt: dict, status: str) -> str:
    vals = ", ".join(f"{k}={v:g}" for k, v in pt["corner"].items()) or "default values"
    text = f"{status} at note {pt['note']} with {vals}: spectral radius {pt['radius']:.9f}"
    if "mode" in pt:
        m = pt["mode"]
        text += f" (mode at {m['freq_hz']:.2f} Hz, {m['growth_db_per_s']:+.3f} dB/s)"
    return text


def _certificate(prog, preset, box, notes, deadline: Deadline) -> dict:
    cert = certify_network(prog, box, notes, deadline)
    slopes = {k: v * prog.rate for k, v in cert.slope_per_sample.items()}
    return {"certified": cert.certified, "route": cert.route, "gain_loop_rho": cert.rho,
            "slope_per_s": slopes, "failing": cert.failing, "certificate_notes": cert.notes}


def _fields(prog, preset, box) -> list[dict]:
    out = []
    for b in prog.blocks:
        if not b.is_field:
            continue
        info = b.field.model.summary()
        info["cell"] = b.name
        out.append(info)
    return out


def _modes(prog: StepProgram, note: int, count: int):
    """The partials heard at ``note`` (parameter defaults): the lowest and the strongest from the
    ``excite`` input to the output, by frequency (engine.analysis.modes.modes), and the drift modes."""
    sysm = assemble(prog, None, note)
    ms = modes(sysm.A, sysm.C, prog.rate, B=sysm.B, count=count, partition=sysm.partition)
    out = []
    for m in ms:
        share = sorted(m.energy_by_cell.items(), key=lambda kv: -kv[1])
        amp = m.amplitude_db
        out.append({"freq_hz": float(m.freq_hz), "note": m.note_name, "cents_from_note": float(m.cents_from_note),
                    "t60_s": float(m.t60_s) if math.isfinite(m.t60_s) else None,
                    "amplitude_db": float(amp) if amp is not None and math.isfinite(amp) else None,
                    "energy_db": float(m.energy_db) if m.energy_db is not None and math.isfinite(m.energy_db) else None,
                    "strength_rank": int(m.strength_rank), "lowest": bool(m.lowest),
                    "multiplicity": int(m.multiplicity),
                    "harmonic": int(m.harmonic_number), "cents_from_harmonic": float(m.cents_from_harmonic),
                    "radius": float(m.radius), "fundamental": bool(m.is_fundamental),
                    "cells": {k: round(float(v), 4) for k, v in share[:3]}})
    drift = []
    for d in drift_modes(sysm.A, partition=sysm.partition):
        drift.append({"eigenvalue": 1.0,
                      "cells": {str(name): round(float(share), 4) for name, share in d.dominant_cells},
                      "grows": bool(d.grows)})
    return out, drift


# --------------------------------------------------------------------------
# guard rails for render and play

def guard(preset: Preset, allow_unstable: bool = False, rate: float = 48000.0,
          time_limit_s: float = GUARD_TIME_LIMIT_S, progress: Callable[[str], None] | None = None) -> list[str]:
    """Refuse a preset that is not frozen-stable at ``rate`` Hz; return warnings otherwise.

    Checks ``preset`` as given (``--set`` values applied are part of it) at
    the check's default notes, reusing a stored ``check`` report of the same
    preset, notes and rate.  Answers within about ``time_limit_s`` s: when
    the analysis can neither prove nor refute stability by then, raises
    NotDecided with a message naming the way forward (``check
    --time-limit``, or ``--allow-unstable``, which makes it a warning).
    Raises UnstableError naming the offending mode and corner unless
    ``allow_unstable``.  ``progress`` as in `check`.
    """
    try:
        report = check(preset, rate=rate, with_modes=False, time_limit_s=time_limit_s, progress=progress)
    except NotDecided as e:
        if allow_unstable:
            return [f"playing a preset whose stability is not known: {e}"]
        raise NotDecided(e.limit_s, e.step, hint=(
            f"`sheafsynth check {_preset_arg(preset)} --rate {float(rate):g} --time-limit 600` (with the same --set "
            "values) "
            "can take longer and stores its answer for render and play; or pass --allow-unstable to play it "
            "unchecked (the output limiter stays on)")) from None
    if not report["stable"]:
        msg = report.get("failing") or "not stable"
        if not allow_unstable:
            raise UnstableError(f"{msg}; refusing to play it (use --allow-unstable to override, "
                                "the output limiter stays on)", "stability")
        return [f"playing an unstable preset: {msg}"]
    return list(report["warnings"])


def _preset_arg(preset: Preset) -> str:
    """How the user names ``preset`` on a command line: its factory name, else its file, else its name."""
    src = Path(preset.source) if preset.source.endswith(".json") else None
    if src is None or src.parent.resolve() == FACTORY_DIR.resolve():
        return shlex.quote(preset.name)
    return shlex.quote(str(src))


def ramp_limits(preset: Preset, rate: float = 48000.0, time_limit_s: float = GUARD_TIME_LIMIT_S) -> dict[str, float]:
    """Ramp time (s) per parameter that keeps the kernel within a ramp-limited proof at ``rate`` Hz.

    The proof bounds the change per *sample*; the report states it per second
    at the analysis rate (``rate`` itself), so the time is rescaled to the
    playing ``rate``.  Reuses the guard's stored verdict; no limits (an empty
    dict) when nothing was decided within ``time_limit_s`` s.
    """
    try:
        report = check(preset, rate=rate, with_modes=False, time_limit_s=time_limit_s)
    except NotDecided:
        return {}
    if report.get("certified") != "ramp-limited":
        return {}
    out = {}
    for name, per_s in report.get("slope_per_s", {}).items():
        spec = preset.parameters[name]
        if per_s > 0:
            out[name] = (spec.hi - spec.lo) / per_s * (report["rate"] / float(rate))
    return out

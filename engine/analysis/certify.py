"""Stability certificates for a whole voice network under knob motion.

The network is read from the step program as cells joined by wires (the
vector small-gain view, DESIGN §5).  Every cell gets a gain that holds for
every admissible parameter path; if the nonnegative gain matrix (cell gains
times wire gains, one norm throughout) has spectral radius below 1, the
network is stable for those paths (small-gain theorem, vector form, valid
for time-varying systems).

Routes, tried in order:

* **any-speed, ℓ2**: delays gain 1 (their lengths do not change under knob
  motion, see ``delay_lengths_fixed``), static gains max |g| over the
  corners, the pitch-set tuning allpass gain 1 (one orthogonal lattice
  section), filters the γ of a common storage at every corner
  (engine.analysis.storage.l2_gain_common_storage);
* **any-speed, ℓ∞**: delays 1, static gains their max row sum, convex
  combination filters 1 (engine.analysis.gains.linf_gain_convex_filter);
* **ramp-limited, ℓ2**: as the first route, but a filter whose common
  storage gain is too large gets a parameter-dependent storage
  V = sᵀP(θ)s, P affine in θ, valid while |θ⁺ − θ| ≤ δ per sample
  (engine.analysis.storage: the LMI and why its vertices suffice).
  Summing the inequality along any path gives ‖y‖² ≤ γ²‖u‖² + V(s₀).  The
  largest δ found is the slope the kernel's ramp must never exceed; the
  analysis turns it into a ramp time (engine.analysis.report.ramp_limits).

Every positive answer is re-verified with eigenvalues before it is used.
Every route stops at the ``deadline`` it is given (grid points, cells,
storage evaluations and bisection steps call ``Deadline.check``; see
engine.analysis.deadline).
Pitch bend retunes delay lengths at block boundaries; that is outside these
proofs and the report says so.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import scipy.sparse as sps
from scipy.sparse.csgraph import connected_components

from sheafsynth.engine.analysis.deadline import Deadline
from sheafsynth.engine.analysis.fields import moving_symbols
from sheafsynth.engine.analysis.gains import (CellGain, CellModel as GainCell, WireModel, build_gain_matrix, cell_gain,
                                              frozen_hinf, network_small_gain, peak_gain)
from sheafsynth.engine.analysis.spectra import corners
from sheafsynth.engine.analysis.storage import BlockAt, largest_ramp_slope
from sheafsynth.engine.ir.program import Block, StepProgram
from sheafsynth.engine.ir.tuning import (KEEP_HI, KEEP_LO, TAU_MIN, block_response, loop_frequency, phase_delay,
                                         tune_all)

__all__ = [
    "NetworkCertificate",
    "delay_lengths_fixed",
    "cyclic_blocks",
    "certify_network",
    "radius_upper_bound",
]

Box = Mapping[str, tuple[float, float]]


@dataclass
class NetworkCertificate:
    """What was proven about a voice network while knobs move (see the module docstring).

    certified: "any-speed", "ramp-limited" or False; route names the proof;
    rho: spectral radius of the gain matrix used (dimensionless);
    slope_per_sample: per parameter, the largest change per sample (parameter
    units) the proof allows; failing: why nothing (more) was proven.
    """

    certified: str | bool                   # "any-speed", "ramp-limited" or False
    route: str
    rho: float | None = None                # spectral radius of the gain matrix used
    slope_per_sample: dict[str, float] = field(default_factory=dict)   # parameter units / sample
    failing: str | None = None
    notes: list[str] = field(default_factory=list)


def _env(prog: StepProgram, theta: Mapping[str, float]) -> dict[str, float]:
    env = {p.name: float(p.value) for p in prog.params}
    env.update(theta)
    return env


def _matrices_at(prog: StepProgram, b: Block, deadline: Deadline) -> BlockAt:
    """θ -> the block's (A, B, C, D) at parameters θ (other parameters at their defaults).

    Each evaluation first checks ``deadline``, so a long storage search stops there.
    """
    def at(theta: Mapping[str, float]) -> tuple[np.ndarray, ...]:
        deadline.check()
        return _block_matrices(b, _env(prog, theta))
    return at


def _block_matrices(b: Block, env) -> tuple[np.ndarray, ...]:
    return tuple(np.atleast_2d(m.value(env)).reshape(m.rows, m.cols) for m in b.linear())


def delay_lengths_fixed(prog: StepProgram, box: Box, notes, grid: int = 9,
                        deadline: Deadline | None = None) -> tuple[bool, str]:
    """Do knob motions keep every pitch delay's length (the retune hysteresis)?

    At note-on the fraction is chosen in [TAU_MIN, TAU_MIN + 1); knob motion
    keeps the length while the fraction stays in [KEEP_LO, KEEP_HI].  So the
    length never changes if the needed total delay varies by at most
    min(TAU_MIN - KEEP_LO, KEEP_HI - TAU_MIN - 1) over the box, checked on a
    grid of ``grid`` points per parameter (the phase delays are smooth in θ).
    Stops at ``deadline`` (engine.analysis.deadline.NotDecided).
    """
    deadline = deadline or Deadline()
    names = list(box)
    allowed = min(TAU_MIN - KEEP_LO, KEEP_HI - TAU_MIN - 1.0)
    axes = [np.linspace(box[n][0], box[n][1], grid) for n in names]
    for lp in prog.loops:
        for note in notes:
            f = loop_frequency(prog, lp, float(note))
            w = 2 * math.pi * f / prog.rate
            vals = []
            for pt in itertools.product(*axes) if names else [()]:
                deadline.check()
                env = _env(prog, dict(zip(names, pt)))
                rest = 0.0
                for st in lp.steps:
                    if st.block == lp.tuner:
                        continue
                    blk = prog.blocks[st.block]
                    if blk.is_delay or blk.is_field:
                        continue
                    rest += phase_delay(block_response(prog, st.block, st.in_port, st.out_port, env, w), w)
                vals.append(rest)
            spread = max(vals) - min(vals)
            limit = allowed if lp.tuner is not None else 0.5
            if spread > limit:
                return False, (f'the knobs move the phase delay of the loop through "{prog.blocks[lp.delay].name}" '
                               f"by {spread:.3f} samples at note {note} (more than {limit:.2f}): its length "
                               "can change while a knob moves")
    return True, ""


def cyclic_blocks(prog: StepProgram) -> set[str]:
    """Names of the cells that lie on a directed cycle of the wiring."""
    n = len(prog.blocks)
    owner = {b.out_signal + r: b.index for b in prog.blocks for r in range(b.n_out)}
    rows, cols = [], []
    for b in prog.blocks:
        for port in b.inputs:
            for t in port:
                if t.signal in owner:
                    rows.append(owner[t.signal])
                    cols.append(b.index)
    if not rows:
        return set()
    g = sps.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n))
    _, labels = connected_components(g, directed=True, connection="strong")
    out = set()
    for b in prog.blocks:
        same = np.flatnonzero(labels == labels[b.index])
        if len(same) > 1 or g[b.index, b.index] != 0:
            out.add(b.name)
    return out


def _symbols(b: Block) -> set[str]:
    out = set()
    for mtx in (b.A, b.B, b.C, b.D):
        if mtx is not None:
            out |= mtx.symbols
    return out


def _gain_cells(prog: StepProgram, box: Box, fixed_delays: bool):
    """Per-block inputs to the small-gain route (cells and wires at the corners)."""
    cs = corners(dict(box)) if box else [{}]
    cells: list[GainCell] = []
    special: dict[str, CellGain | str] = {}
    cyclic = cyclic_blocks(prog)
    for b in prog.blocks:
        if b.is_delay:
            cells.append(GainCell(b.name, "delay", length_varies=not fixed_delays))
        elif b.is_field:
            moving = sorted(moving_symbols(b.field) & set(box))
            if b.name in cyclic:
                special[b.name] = f'field "{b.name}" lies on a feedback loop; no route covers that yet'
            elif moving:
                special[b.name] = (f'field "{b.name}": knob(s) {", ".join(moving)} move its own update; '
                                   "only strike and pickup knobs are covered")
            else:
                # off every loop, with coefficients that knobs do not move: an LTI
                # cell whose frozen stability the radius check proves; its gain
                # (finite) cannot enter the loop gain, so 1 stands in for it.
                special[b.name] = CellGain(b.name, 1.0, "any", "off-loop field, fixed update")
        elif b.tune_symbol:
            special[b.name] = CellGain(b.name, 1.0, "l2", "orthogonal lattice section (Gray & Markel 1975)")
        elif b.n_state == 0:
            cells.append(GainCell(b.name, "gain", corners=tuple(b.linear()[3].value(_env(prog, c)) for c in cs)))
        else:
            cells.append(GainCell(b.name, "filter", corners=tuple(_block_matrices(b, _env(prog, c)) for c in cs)))
    wires = []
    name_of = {b.out_signal + r: b.name for b in prog.blocks for r in range(b.n_out)}
    for b in prog.blocks:
        acc: dict[str, list] = {}
        for port in b.inputs:
            for t in port:
                if t.signal in name_of:
                    acc.setdefault(name_of[t.signal], []).append(t.gain)
        for src, gains in acc.items():
            wires.append(WireModel(src, b.name, tuple(sum(abs(g.value(_env(prog, c))) for g in gains) for c in cs)))
    return cells, special, wires


def certify_network(prog: StepProgram, box: Box, notes, deadline: Deadline | None = None) -> NetworkCertificate:
    """Try the routes of the module docstring in order; never claim more than proven.

    Raises engine.analysis.deadline.NotDecided once ``deadline`` has passed.
    """
    deadline = deadline or Deadline()
    deadline.step("certificate: delay lengths under knob motion")
    fixed, why = delay_lengths_fixed(prog, box, notes, deadline=deadline)
    notes_out = ["pitch bend retunes delay lengths at block boundaries; the proof covers knob motion"]
    if not fixed:
        notes_out.append(why)
    deadline.step("certificate: small-gain routes")
    cells, special, wires = _gain_cells(prog, box, fixed)
    for v in special.values():
        if isinstance(v, str):
            return NetworkCertificate(False, "none", failing=v, notes=notes_out)
    results: dict[str, tuple[float | None, str | None]] = {}
    for norm in ("l2", "linf"):
        gains, missing = [], None
        for c in cells:
            deadline.check()
            g = cell_gain(c, norm)
            if g is None:
                missing = c.name
                break
            gains.append(g)
        for name, g in special.items():
            if g.norm == "any":
                gains.append(CellGain(g.cell, g.gain, norm, g.route))
            elif g.norm != norm:
                missing = missing or name
            else:
                gains.append(g)
        if missing:
            results[norm] = (None, f'cell "{missing}" has no {norm} gain bound that holds while knobs move')
            continue
        gm = build_gain_matrix(gains, wires, norm)
        rho, ok = network_small_gain(gm)
        results[norm] = (rho, None)
        if ok:
            return NetworkCertificate("any-speed", f"vector small gain ({'ℓ2' if norm == 'l2' else 'ℓ∞'})",
                                      rho, notes=notes_out)
    # ramp-limited: parameter-dependent storage for the filters that need it
    if not fixed:
        return NetworkCertificate(False, "none", failing=why, notes=notes_out)
    deadline.step("certificate: ramp-limited storage")
    return _ramp_limited(prog, box, cells, special, wires, notes_out, results, deadline)


def _ramp_limited(prog, box, cells, special, wires, notes_out, results, deadline: Deadline) -> NetworkCertificate:
    frozen_gains = {}
    for c in cells:
        if c.kind == "filter":
            frozen_gains[c.name] = frozen_hinf(c.corners)
            if not math.isfinite(frozen_gains[c.name]):
                return NetworkCertificate(False, "none", failing=f'cell "{c.name}" has a pole on the unit circle '
                                          "(not strictly stable)", notes=notes_out)
    gains0 = []
    for c in cells:
        if c.kind == "filter":
            gains0.append(CellGain(c.name, frozen_gains[c.name], "l2", "frozen H∞"))
        else:
            g = cell_gain(c, "l2")
            if g is None:
                return NetworkCertificate(False, "none", failing=f'cell "{c.name}" has no ℓ2 gain bound',
                                          notes=notes_out)
            gains0.append(g)
    gains0 += [CellGain(g.cell, g.gain, "l2", g.route) for g in special.values()]
    rho0, _ = network_small_gain(build_gain_matrix(gains0, wires, "l2"))
    if not rho0 < 1.0:
        return NetworkCertificate(False, "none", rho0, failing=f"frozen ℓ2 loop gain {rho0:.6f} is not below 1",
                                  notes=notes_out)
    cyclic = cyclic_blocks(prog)
    inflate = math.sqrt(_largest_inflation(gains0, wires, set(frozen_gains) & cyclic))
    slopes: dict[str, float] = {}
    final: list[CellGain] = []
    for c in cells:
        deadline.check()
        if c.kind != "filter":
            g = cell_gain(c, "l2")
            if g is None:
                return NetworkCertificate(False, "none", failing=f'cell "{c.name}": no ℓ2 gain bound '
                                          "(a delay whose length moves)", notes=notes_out)
            final.append(g)
            continue
        anyspeed = cell_gain(c, "l2")
        if c.name not in cyclic:
            # outside every loop a cell only has to be stable: any finite gain will do
            if anyspeed is not None:
                final.append(anyspeed)
                continue
            target = 10.0 * frozen_gains[c.name] + 1.0
        else:
            target = frozen_gains[c.name] * inflate
        if anyspeed is not None and anyspeed.gain <= target:
            final.append(anyspeed)
            continue
        b = prog.block_named(c.name)
        names = sorted(s for s in _symbols(b) if s in box)
        A, B, _, _ = b.linear()
        state_fixed = not ((A.symbols | B.symbols) & set(box))
        frac = largest_ramp_slope(_matrices_at(prog, b, deadline), names, box, target, state_fixed=state_fixed)
        if frac is None:
            return NetworkCertificate(False, "none", failing=f'filter "{c.name}": no storage proves gain '
                                      f"{target:.6f} even for slow knob motion", notes=notes_out)
        for n in _symbols(b):
            if n in box:
                per = frac * (box[n][1] - box[n][0])
                slopes[n] = min(slopes.get(n, math.inf), per)
        final.append(CellGain(c.name, target, "l2", f"parameter-dependent storage, slope ≤ {frac:.3g} of range/sample"))
    final += [CellGain(g.cell, g.gain, "l2", g.route) for g in special.values()]
    rho, ok = network_small_gain(build_gain_matrix(final, wires, "l2"))
    if not ok:
        return NetworkCertificate(False, "none", rho, failing="ramp-limited gains still close a loop ≥ 1",
                                  notes=notes_out)
    if not slopes:
        return NetworkCertificate("any-speed", "vector small gain (ℓ2, frozen H∞ within common storage)", rho,
                                  notes=notes_out)
    return NetworkCertificate("ramp-limited", "vector small gain (ℓ2) with parameter-dependent storage",
                              rho, slopes, notes=notes_out)


def _largest_inflation(gains, wires, scaled: set[str]) -> float:
    """Largest common factor c on the named cells' gains keeping ρ(Γ) < 1 (bisection)."""
    def rho(c: float) -> float:
        gs = [CellGain(g.cell, g.gain * c, g.norm, g.route) if g.cell in scaled else g for g in gains]
        return network_small_gain(build_gain_matrix(gs, wires, "l2"))[0]

    lo, hi = 1.0, 2.0
    while rho(hi) < 1.0 and hi < 1e6:
        lo, hi = hi, hi * 2
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        if rho(mid) < 1.0:
            lo = mid
        else:
            hi = mid
    return lo


# --------------------------------------------------------------------------
# a fast frozen bound for large networks

def radius_upper_bound(prog: StepProgram, theta: Mapping[str, float], note: float,
                       n_freq: int = 4096, field_radius: Mapping[int, float] | None = None,
                       deadline: Deadline | None = None) -> float | None:
    """An upper bound r on the spectral radius of the frozen voice at (θ, note).

    ρ(A) < r exactly when the network with every z replaced by r·z is
    stable; the LTI small-gain theorem on that scaled network (delay gain
    r^-N, filters sup |H(r e^{jω})| on an ``n_freq`` grid, static gains
    their norm) proves it when the scaled gain matrix has ρ < 1.  Bisection
    gives the smallest such r; None when even r = 1 is not proven (then the
    caller falls back to an eigenvalue method).  Each bisection step checks
    ``deadline`` (engine.analysis.deadline.NotDecided).
    """
    deadline = deadline or Deadline()
    env = _env(prog, theta)
    lens = {}
    for lp, (n, a) in zip(prog.loops, tune_all(prog, note, env)):
        lens[lp.delay] = n
        if lp.tuner is not None and a is not None:
            env[f"@tune{lp.index}"] = a
            env[f"@tunec{lp.index}"] = math.sqrt(1.0 - a * a)
    field_radius = field_radius or {}
    zs = np.exp(1j * np.linspace(0.0, math.pi, n_freq))
    mats = {}
    for b in prog.blocks:
        if not b.is_delay and not b.is_field and b.n_state:
            mats[b.index] = _block_matrices(b, env)
    name_of = {b.out_signal + r: b.name for b in prog.blocks for r in range(b.n_out)}
    wires = []
    for b in prog.blocks:
        acc: dict[str, float] = {}
        for port in b.inputs:
            for t in port:
                if t.signal in name_of:
                    acc[name_of[t.signal]] = acc.get(name_of[t.signal], 0.0) + abs(t.gain.value(env))
        wires += [WireModel(src, b.name, (g,)) for src, g in acc.items()]

    def hinf_scaled(A, B, C, D, r: float) -> float:
        return peak_gain(A, B, C, D, r * zs)

    cyclic = cyclic_blocks(prog)

    def gains(r: float):
        out = []
        for b in prog.blocks:
            if b.is_field and b.name in cyclic:
                return None
            if b.name not in cyclic:
                # off every loop a cell cannot close a loop: it only has to be
                # stable at radius r (checked when it has states)
                if b.is_field:
                    fr = field_radius.get(b.index)
                    if fr is None or fr >= r:
                        return None
                elif not b.is_delay and b.n_state and np.max(np.abs(np.linalg.eigvals(mats[b.index][0]))) >= r:
                    return None
                out.append(CellGain(b.name, 1.0, "l2", "off-loop"))
                continue
            if b.is_delay:
                n = lens[b.index] if b.index in lens else b.fixed_length()
                out.append(CellGain(b.name, math.exp(min(700.0, -n * math.log(r))), "l2", "scaled delay"))
            elif b.n_state == 0:
                out.append(CellGain(b.name, float(np.linalg.norm(b.linear()[3].value(env), 2)), "l2", "gain"))
            else:
                A, B, C, D = mats[b.index]
                if np.max(np.abs(np.linalg.eigvals(A))) >= r:
                    return None
                out.append(CellGain(b.name, hinf_scaled(A, B, C, D, r) * (1.0 + 1e-9), "l2", "scaled filter"))
        return out

    def ok(r: float) -> bool:
        deadline.check()
        g = gains(r)
        if g is None:
            return False
        return network_small_gain(build_gain_matrix(g, wires, "l2"))[1]

    if not ok(1.0):
        return None
    lo, hi = 0.0, 1.0
    for _ in range(45):
        mid = 0.5 * (lo + hi)
        if ok(mid):
            hi = mid
        else:
            lo = mid
    return hi

"""The slow, obvious NumPy/Python stepper of the step program.

It is the oracle the C kernel is tested against on every factory preset: it
walks the same five per-sample steps (engine.ir.lower), the same voice life
cycle (engine.ir.voicing), the same parameter ramps, tuning (engine.ir.tuning),
excitation, release damping, guard and limiter — written for clarity, not
speed.  Signals are computed in double precision; parameter values are
rounded to float32 as the kernel stores them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from sheafsynth.engine.backends.reference.field import FieldState, field_read, field_step, new_field_state
from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.ir.fields import kappa2, release_rho
from sheafsynth.engine.ir.program import (GUARD_LIMIT, HELD_QUIET_S, KIND_DELAY, KIND_FIELD, KIND_LINEAR,
                                          LIMITER_RELEASE_S, MAX_BEND_SEMITONES, RAMP_FADE_S, SILENCE_HELD,
                                          SILENCE_RELEASED, Block, StepProgram, note_hz)
from sheafsynth.engine.ir.tuning import tune_loop
from sheafsynth.engine.model.cells.field_model import f32

__all__ = ["ReferenceStepper"]


@dataclass
class _Voice:
    status: int = V.FREE
    note: int = 0
    vel: int = 0
    order: int = 0
    pending: tuple[int, int, int] | None = None   # (note, vel, release_flag)
    fade_left: int = -1                # samples left in a fade, -1 when not fading
    rng: int = 1
    exc_left: int = 0
    exc_amp: float = 0.0
    exc_pole: float = 0.0
    exc_y: float = 0.0
    exc_kind: str = "noise"
    peak: float = 0.0
    quiet: int = 0
    pos: int = 0
    rings: dict[int, list[float]] = field(default_factory=dict)
    lens: dict[int, int] = field(default_factory=dict)
    relg: dict[int, float] = field(default_factory=dict)
    states: dict[int, Any] = field(default_factory=dict)
    tune: dict[str, float] = field(default_factory=dict)
    fields: dict[int, FieldState] = field(default_factory=dict)      # field block -> its state


class ReferenceStepper:
    """Renders blocks from kernel events exactly as the C kernel specifies."""

    def __init__(self, prog: StepProgram, seed: int = 0, limiter: bool = True):
        self.p = prog
        self.seed = int(seed) & V.MASK32
        self.limiter = limiter
        n = len(prog.params)
        self.cur = [f32(x.value) for x in prog.params]
        self.tgt = list(self.cur)
        self.ramp = list(prog.ramp_samples())
        self.left = [0] * n
        self.step = [0.0] * n
        self.sustain = False
        self.bend = 0.0
        self.retune = False          # knobs moved: retune, keeping delay lengths where possible
        self.retune_full = False     # pitch bend moved: retune from scratch
        self.started = 0
        self.lim_g = 1.0
        self.lim_rel = 1.0 - math.exp(-1.0 / (LIMITER_RELEASE_S * prog.rate))
        self.fade = V.fade_samples(prog.rate, RAMP_FADE_S)
        self.inv_fade = f32(1.0 / self.fade)
        self.voices = [_Voice() for _ in range(prog.polyphony)]
        self.counters = {"voices_stolen": 0, "guard_resets": 0, "events_ignored": 0, "voices_active": 0}
        self._nparams = n

    # -- helpers ------------------------------------------------------------
    def _env(self, values) -> dict:
        e = {p.name: values[p.index] for p in self.p.params}
        return e

    def _tune(self, v: _Voice, keep: bool = False) -> None:
        env = self._env(self.cur)
        pitch = v.note + self.bend
        for lp in self.p.loops:
            n, a = tune_loop(self.p, lp, pitch, env, v.lens[lp.delay] if keep else None)
            v.lens[lp.delay] = n
            if lp.tuner is not None:
                k = f32(a if a is not None else 0.0)
                v.tune[f"@tune{lp.index}"] = k
                v.tune[f"@tunec{lp.index}"] = f32(math.sqrt(1.0 - k * k))
        for bi, st in v.fields.items():
            st.k2 = kappa2(self.p.blocks[bi].fieldprog(), pitch, self.p.rate, env)
        if v.status == V.RELEASED:
            self._release_gains(v)

    def _release_gains(self, v: _Voice) -> None:
        period = self.p.rate / note_hz(v.note + self.bend)
        for bi, n in v.lens.items():
            v.relg[bi] = f32(self.p.release_decay ** (n / period))
        for bi, st in v.fields.items():
            st.rho = release_rho(self.p.blocks[bi].fieldprog(), period, self.p.release_decay)

    def _start(self, v: _Voice, note: int, vel: int) -> None:
        p = self.p
        self.started = (self.started + 1) & V.MASK32
        v.status, v.note, v.vel, v.order = V.HELD, note, vel, self.started
        v.pending = None
        v.fade_left = -1
        v.rng = V.seed_voice(self.seed, self.started)
        v.peak, v.quiet, v.pos = 0.0, 0, 0
        v.rings = {b.index: [0.0] * p.ring_size[b.index] for b in p.blocks if b.is_delay}
        v.lens = {b.index: b.fixed_length() for b in p.blocks if b.is_delay and not b.pitch}
        v.relg = {b.index: 1.0 for b in p.blocks if b.is_delay}
        v.states = {b.index: [0.0] * b.n_state for b in p.blocks if not b.is_delay}
        v.fields = {b.index: new_field_state(b.fieldprog()) for b in p.blocks if b.is_field}
        v.tune = {}
        self._tune(v)
        exc = p.excitation
        kind = exc.get("kind", "noise")
        gain = float(exc.get("gain", 1.0))
        v.exc_amp = f32(gain * vel / 127.0)
        v.exc_y = 0.0
        if kind == "impulse":
            v.exc_left, v.exc_pole = 1, 0.0
        else:
            length = exc.get("length", "period")
            if length == "period":
                length = max(1, int(math.floor(p.rate / note_hz(note + self.bend) + 0.5)))
            v.exc_left = int(length)
            q = 0.9 * (1.0 - vel / 127.0)          # the brightness pole at 48 kHz
            e = float(exc.get("brightness_exponent", 1.0))
            if e != 1.0 and q > 0.0:
                q = math.pow(q, e)
            v.exc_pole = f32(q) if exc.get("velocity_brightness", False) else 0.0
        v.exc_kind = kind

    def _release(self, v: _Voice) -> None:
        v.status = V.RELEASED
        self._release_gains(v)

    def _clear(self, v: _Voice) -> None:
        v.status = V.FREE
        v.pending = None

    # -- events -------------------------------------------------------------
    def _event(self, typ: int, a: int, b: int, value: float) -> None:
        vs = self.voices
        if typ == V.EV_NOTE_ON and b == 0:
            typ = V.EV_NOTE_OFF
        if typ == V.EV_NOTE_ON:
            if not (0 <= a <= 127 and 1 <= b <= 127):
                self.counters["events_ignored"] += 1
                return
            for v in vs:
                if v.status in (V.HELD, V.SUSTAINED) and v.note == a:
                    self._release(v)
            for v in vs:
                if v.status == V.FREE:
                    self._start(v, a, b)
                    return
            victim = None
            for want in (V.RELEASED, V.SUSTAINED, V.HELD):
                cands = [v for v in vs if v.status == want]
                if cands:
                    victim = min(cands, key=lambda v: v.order)
                    break
            if victim is None:
                victim = min(vs, key=lambda v: v.order)
            else:
                self.counters["voices_stolen"] += 1
                victim.status = V.FADING
                victim.fade_left = self.fade
            victim.pending = (a, b, 0)
        elif typ == V.EV_NOTE_OFF:
            if not 0 <= a <= 127:
                self.counters["events_ignored"] += 1
                return
            for v in vs:
                if v.status == V.HELD and v.note == a:
                    if self.sustain:
                        v.status = V.SUSTAINED
                    else:
                        self._release(v)
                if v.status == V.FADING and v.pending and v.pending[0] == a:
                    v.pending = (v.pending[0], v.pending[1], 1)
        elif typ == V.EV_PARAM:
            if not (0 <= a < self._nparams) or not math.isfinite(value):
                self.counters["events_ignored"] += 1
                return
            pi = self.p.params[a]
            self.tgt[a] = f32(min(pi.hi, max(pi.lo, f32(value))))
            self.left[a] = self.ramp[a]
            self.step[a] = f32((self.tgt[a] - self.cur[a]) / self.ramp[a])
        elif typ == V.EV_BEND:
            if not math.isfinite(value):
                self.counters["events_ignored"] += 1
                return
            self.bend = f32(min(MAX_BEND_SEMITONES, max(-MAX_BEND_SEMITONES, value)))
            self.retune_full = True
        elif typ == V.EV_SUSTAIN:
            self.sustain = b != 0
            if not self.sustain:
                for v in vs:
                    if v.status == V.SUSTAINED:
                        self._release(v)
        elif typ in (V.EV_ALL_NOTES_OFF, V.EV_RELEASE_ALL):
            if typ == V.EV_RELEASE_ALL:
                self.sustain = False
            for v in vs:
                if v.status == V.HELD:
                    if self.sustain:
                        v.status = V.SUSTAINED
                    else:
                        self._release(v)
                elif v.status == V.SUSTAINED and not self.sustain:
                    self._release(v)
                if v.status == V.FADING and v.pending:
                    v.pending = (v.pending[0], v.pending[1], 1)
        elif typ == V.EV_ALL_SOUND_OFF:
            for v in vs:
                if v.status != V.FREE:
                    if v.status != V.FADING:
                        v.fade_left = self.fade
                    v.status = V.FADING
                    v.pending = None
        else:
            self.counters["events_ignored"] += 1

    # -- rendering ----------------------------------------------------------
    def render(self, events, frames: int) -> np.ndarray:
        """Render one block; ``events`` are (offset, type, a, b, value) tuples."""
        p = self.p
        if not 0 < frames <= p.max_block:
            raise ValueError(f"frames must be in 1..{p.max_block}")
        evs = sorted(((min(max(int(e[0]), 0), frames - 1),) + tuple(e[1:]) for e in events),
                     key=lambda e: e[0])
        if self.retune or self.retune_full:
            for v in self.voices:
                if v.status != V.FREE:
                    self._tune(v, keep=not self.retune_full)
            self.retune = self.retune_full = False
        mix = np.zeros(frames)
        for v in self.voices:
            v.peak = 0.0
        i = 0
        j = 0
        while i < frames:
            while j < len(evs) and evs[j][0] <= i:
                _, typ, a, b, val = evs[j]
                self._event(int(typ), int(a), int(b), float(val))
                j += 1
            nxt = evs[j][0] if j < len(evs) else frames
            self._segment(i, nxt, mix)
            i = nxt
        self._housekeeping(frames)
        return self._limit(mix)

    def _segment(self, a: int, b: int, mix: np.ndarray) -> None:
        n = b - a
        moving = any(k > 0 for k in self.left)
        traj = []
        for _k in range(n):
            if moving:
                for q in range(self._nparams):
                    if self.left[q] > 1:
                        self.cur[q] = f32(self.cur[q] + self.step[q])
                        self.left[q] -= 1
                    elif self.left[q] == 1:
                        self.cur[q] = self.tgt[q]
                        self.left[q] = 0
            traj.append(list(self.cur))
        if moving:
            self.retune = True
        envs = [self._env(t) for t in traj] if moving else [self._env(self.cur)] * n
        for v in self.voices:
            if v.status == V.FREE:
                continue
            out = self._voice(v, envs)
            peak = max((abs(x) for x in out), default=0.0)
            if not all(math.isfinite(x) and abs(x) <= GUARD_LIMIT for x in out):
                self.counters["guard_resets"] += 1
                self._clear(v)
                continue
            v.peak = max(v.peak, peak)
            mix[a:b] += out

    def _voice(self, v: _Voice, envs) -> list[float]:
        p = self.p
        out = []
        sig = [0.0] * p.n_signals
        inputs: dict[int, list[float]] = {}
        for env0 in envs:
            env = dict(env0)
            env.update(v.tune)
            # 1. excitation
            e = 0.0
            if v.exc_left > 0:
                if v.exc_kind == "impulse":
                    e = v.exc_amp
                else:
                    v.rng = V.xorshift32(v.rng)
                    x = V.noise_value(v.rng)
                    v.exc_y = (1.0 - v.exc_pole) * x + v.exc_pole * v.exc_y
                    e = v.exc_amp * v.exc_y
                v.exc_left -= 1
            sig[0] = e
            # 2. outputs of cells without feedthrough
            for blk in p.blocks:
                if not blk.feedthrough:
                    _READ[blk.kind](self, v, blk, env, sig)
            # 3. feedthrough cells in order
            for bi in p.order:
                blk = p.blocks[bi]
                u = [sum(t.gain.value(env) * sig[t.signal] for t in port) for port in blk.inputs]
                inputs[bi] = u
                s = v.states[bi]
                _, _, Cm, Dm = blk.linear()
                C, D = Cm.value(env), Dm.value(env)
                for r in range(blk.n_out):
                    acc = float(D[r] @ u)
                    if blk.n_state:
                        acc += float(C[r] @ s)
                    sig[blk.out_signal + r] = acc
            # 4. remaining inputs
            for blk in p.blocks:
                if not blk.feedthrough:
                    inputs[blk.index] = [sum(t.gain.value(env) * sig[t.signal] for t in port)
                                         for port in blk.inputs]
            # 5. state update and output
            for blk in p.blocks:
                _STEP[blk.kind](self, v, blk, env, inputs[blk.index])
            v.pos += 1
            y = sum(t.gain.value(env) * sig[t.signal] for t in p.out_terms)
            if v.fade_left >= 0:
                y *= f32(v.fade_left * self.inv_fade)
                if v.fade_left > 0:
                    v.fade_left -= 1
            out.append(y)
        return out

    def _housekeeping(self, frames: int) -> None:
        p = self.p
        for v in self.voices:
            if v.status == V.FADING and v.fade_left == 0:
                pend = v.pending
                self._clear(v)
                if pend is not None:
                    self._start(v, pend[0], pend[1])
                    if pend[2]:
                        if self.sustain:
                            v.status = V.SUSTAINED
                        else:
                            self._release(v)
            elif v.status == V.RELEASED and v.peak < SILENCE_RELEASED:
                self._clear(v)
            elif v.status in (V.HELD, V.SUSTAINED):
                if v.peak < SILENCE_HELD:
                    v.quiet += frames
                    if v.quiet >= HELD_QUIET_S * p.rate:
                        self._clear(v)
                else:
                    v.quiet = 0
        self.counters["voices_active"] = sum(v.status != V.FREE for v in self.voices)

    def _limit(self, mix: np.ndarray) -> np.ndarray:
        out = np.empty_like(mix)
        ceil = self.p.limiter_ceiling
        g = self.lim_g
        for i, x in enumerate(mix):
            if self.limiter:
                ax = abs(x)
                if ax * g > ceil:
                    g = ceil / ax
                y = x * g
                g = g + (1.0 - g) * self.lim_rel
                out[i] = min(ceil, max(-ceil, y))
            else:
                out[i] = x
        self.lim_g = g
        return out.astype(np.float32)


# -- one reader (step 2) and one stepper (step 5) per block kind -------------

def _read_linear(r: ReferenceStepper, v: _Voice, blk: Block, env: dict[str, float], sig: list[float]) -> None:
    s = v.states[blk.index]
    C = blk.linear()[2].value(env)
    for k in range(blk.n_out):
        sig[blk.out_signal + k] = float(C[k] @ s) if blk.n_state else 0.0


def _read_delay(r: ReferenceStepper, v: _Voice, blk: Block, env: dict[str, float], sig: list[float]) -> None:
    ring = v.rings[blk.index]
    sig[blk.out_signal] = ring[(v.pos - v.lens[blk.index]) % len(ring)]


def _read_field(r: ReferenceStepper, v: _Voice, blk: Block, env: dict[str, float], sig: list[float]) -> None:
    for k in range(blk.n_out):
        sig[blk.out_signal + k] = field_read(blk.fieldprog(), v.fields[blk.index], env, k)


def _step_linear(r: ReferenceStepper, v: _Voice, blk: Block, env: dict[str, float], u: list[float]) -> None:
    if blk.n_state:
        A, B, _, _ = blk.linear()
        s = np.asarray(v.states[blk.index])
        v.states[blk.index] = list(A.value(env) @ s + B.value(env) @ np.asarray(u))


def _step_delay(r: ReferenceStepper, v: _Voice, blk: Block, env: dict[str, float], u: list[float]) -> None:
    ring = v.rings[blk.index]
    ring[v.pos % len(ring)] = u[0] * v.relg[blk.index]


def _step_field(r: ReferenceStepper, v: _Voice, blk: Block, env: dict[str, float], u: list[float]) -> None:
    field_step(blk.fieldprog(), v.fields[blk.index], env, u)


_READ = {KIND_LINEAR: _read_linear, KIND_DELAY: _read_delay, KIND_FIELD: _read_field}
_STEP = {KIND_LINEAR: _step_linear, KIND_DELAY: _step_delay, KIND_FIELD: _step_field}

"""One voice of the plain preset against two yardsticks: the same loop as one IIR run by scipy.signal.lfilter, and the reference stepper.

Times in s (CPU time), rate in Hz.
"""

from __future__ import annotations

import math

import numpy as np

from sheafsynth.engine.backends.reference.stepper import ReferenceStepper
from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.ir.program import note_hz
from sheafsynth.engine.ir.tuning import tune_loop
from sheafsynth.host.bench.context import BLOCK, PLAIN_PRESET, RATE, BenchContext, Kernel, Skip, cpu_clock
from sheafsynth.host.bench.stats import interleave, spread

__all__ = ["one_voice"]


def _loop_iir(ctx: BenchContext, k: Kernel, note: int):
    """(b, a) of one voice: excitation in, voice output out (one tuned loop, output off the delay)."""
    from scipy import signal  # lazy: scipy.signal costs half a second of every command's start-up
    prog = k.inst.program
    env = k.inst.values
    if len(prog.loops) != 1:
        raise Skip("the loop IIR needs exactly one tuning loop")
    lp = prog.loops[0]
    d = prog.blocks[lp.delay]
    ln, tcoef = tune_loop(prog, lp, float(note), env)
    env = dict(env)
    if lp.tuner is not None:
        t32 = np.float32(tcoef)
        env[f"@tune{lp.index}"] = float(t32)
        env[f"@tunec{lp.index}"] = float(np.float32(math.sqrt(1.0 - float(t32) * float(t32))))
    num, den = np.array([1.0]), np.array([1.0])
    for st in lp.steps:
        blk = prog.blocks[st.block]
        if blk.is_delay or blk.is_field:
            raise Skip("the loop IIR handles filters between the pitch delay's ends only")
        if blk.A is None or blk.B is None or blk.C is None or blk.D is None:
            raise Skip(f"block {blk.name!r} on the loop has no state-space matrices")
        A = blk.A.value(env)
        B = blk.B.value(env)[:, [st.in_port]]
        C = blk.C.value(env)[[st.out_port], :]
        D = blk.D.value(env)[[st.out_port]][:, [st.in_port]]
        if blk.n_state:
            bb, aa = signal.ss2tf(A, B, C, D)
            bb = bb[0]
        else:
            bb, aa = D[0], np.array([1.0])
        num, den = np.polymul(num, bb), np.polymul(den, aa)
    g = float(np.prod([x.value(env) for x in lp.gains]))
    e_in = sum(t.gain.value(env) for t in d.inputs[0] if t.signal == 0)
    og = sum(t.gain.value(env) for t in prog.out_terms if t.signal == d.out_signal)
    if len(prog.out_terms) != 1 or og == 0.0:
        raise Skip("the loop IIR needs the voice output taken off the pitch delay")
    # ring w = relg (e x + g G z^-L w), y = og z^-L w, G = num/den (relg = 1 while held)
    zl = np.zeros(ln)
    zl_den = np.concatenate([zl, den])
    a = np.zeros(max(len(den), ln + len(num)))
    a[:len(den)] += den
    a[ln:ln + len(num)] -= g * num
    b = og * e_in * zl_den
    return np.trim_zeros(b, "b"), np.trim_zeros(a, "b"), ln


def _excitation(ctx: BenchContext, k: Kernel, note: int, velocity: int, started: int, frames: int) -> np.ndarray:
    exc = k.inst.program.excitation
    x = np.zeros(frames, np.float64)
    amp = np.float32(float(exc.get("gain", 1.0)) * velocity / 127.0)
    q = np.float32(0.9 * (1.0 - velocity / 127.0)) if exc.get("velocity_brightness") else np.float32(0.0)
    rng = V.seed_voice(0, started)
    y = np.float32(0.0)
    one = np.float32(1.0)
    for i in range(min(frames, max(1, int(math.floor(RATE / note_hz(note) + 0.5))))):
        rng = V.xorshift32(rng)
        y = (one - q) * np.float32(V.noise_value(rng)) + q * y
        x[i] = float(amp * y)
    return x


def one_voice(ctx: BenchContext) -> None:
    """``speedup_vs_lfilter`` and ``speedup_vs_reference``: one voice, note 60, against the yardsticks."""
    from scipy import signal  # lazy: scipy.signal costs half a second of every command's start-up
    k = ctx.plain()
    note, vel = 60, 100
    frames = RATE if not ctx.quick else RATE // 2
    nblk = frames // BLOCK
    frames = nblk * BLOCK
    ev = k.events([(0, 1, note, vel, 0.0)])
    # lfilter
    b, a, ln = _loop_iir(ctx, k, note)
    x = _excitation(ctx, k, note, vel, 1, frames).astype(np.float32)
    kout = np.zeros(frames, np.float32)
    k.run(nblk, ev, keep=kout)
    y = signal.lfilter(b.astype(np.float32), a.astype(np.float32), x)
    diff = float(np.max(np.abs(y.astype(np.float64) - kout)))

    def kernel_side():
        k.silence()
        return k.run(nblk, ev)

    def lfilter_side():
        t0 = cpu_clock()
        signal.lfilter(b.astype(np.float32), a.astype(np.float32), x)
        return cpu_clock() - t0

    res = interleave({"kernel": kernel_side, "lfilter": lfilter_side}, ctx.reps)
    s = spread([l / kk for l, kk in zip(res["lfilter"], res["kernel"])])
    ctx.report["speedup_vs_lfilter"] = s["median"]
    ctx.details["speedup_vs_lfilter"] = {
        "speedup": s, "preset": PLAIN_PRESET, "note": note, "frames": frames, "iir_order": len(a) - 1,
        "loop_length": ln, "dtype": "float32", "lfilter_s": spread(res["lfilter"]),
        "kernel_s": spread(res["kernel"]), "max_abs_diff": diff,
    }
    # reference stepper
    rframes = (BLOCK * 8) if ctx.quick else (BLOCK * 24)
    rblk = rframes // BLOCK

    def ref_side():
        ref = ReferenceStepper(k.inst.program, seed=0)
        t0 = cpu_clock()
        ref.render([(0, 1, note, vel, 0.0)], BLOCK)
        for _ in range(rblk - 1):
            ref.render([], BLOCK)
        return cpu_clock() - t0

    def kern_side():
        k.silence()
        return k.run(rblk, ev)

    rreps = 3 if ctx.quick else 5
    res = interleave({"kernel": kern_side, "reference": ref_side}, rreps)
    s = spread([r / kk for r, kk in zip(res["reference"], res["kernel"])])
    ctx.report["speedup_vs_reference"] = s["median"]
    ctx.details["speedup_vs_reference"] = {
        "speedup": s, "preset": PLAIN_PRESET, "note": note, "frames": rframes,
        "reference_s": spread(res["reference"]), "kernel_s": spread(res["kernel"]),
    }

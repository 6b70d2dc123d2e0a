"""Field measurements: a 64 x 64 torus plate against the hand-written stencil (csrc/bench/stencil_hand.c), and the largest factory field preset.

Real-time factors are audio seconds per second of compute; rate in Hz.
"""

from __future__ import annotations

import copy

import numpy as np

from sheafsynth.engine.errors import SheafsynthError
from sheafsynth.engine.ir.fields import coefficients, kappa2
from sheafsynth.engine.preset import factory_presets
from sheafsynth.host.bench.context import BLOCK, RATE, BenchContext, Kernel, Skip, preset_raw
from sheafsynth.host.bench.stats import interleave, spread

__all__ = ["fields", "field_size", "TORUS_SHAPE"]

TORUS_SHAPE = (64, 64)     # rows x columns of the benchmark torus, vertices


def field_size(raw: dict) -> int:
    """Vertices x stalk of a preset's field cells, read from the JSON (engine/model/cells/field.py's shapes)."""
    total = 0
    for c in raw.get("cells", []):
        if c.get("kind") != "field" or not isinstance(c.get("complex"), dict):
            continue
        cx = c["complex"]
        if isinstance(cx.get("grid"), list):
            n = int(np.prod([int(x) for x in cx["grid"]]))
        elif "path" in cx:
            n = int(cx["path"])
        else:
            v = cx.get("vertices", 0)
            n = len(v) if isinstance(v, list) else int(v)
        total += n * int(c.get("stalk", 1))
    return total


def fields(ctx: BenchContext) -> None:
    """``torus4096_realtime_factor`` and ``field_vs_handwritten``: a 64 x 64 torus plate, one voice."""
    torus = {
        "format": "sheafsynth-preset", "version": 1, "name": "bench-torus",
        "about": "64 x 64 torus plate, struck once (benchmark)",
        "polyphony": 1, "notes": [36, 84], "parameters": {},
        "cells": [{"id": "plate", "kind": "field", "complex": {"grid": list(TORUS_SHAPE), "wrap": "torus"},
                   "stalk": 1, "dynamics": "wave", "speed": 0.5, "loss": 0.0001,
                   "strike": [0.31, 0.27], "pickup": [0.62, 0.55]}],
        "wires": [{"from": "excite", "to": "plate"}, {"from": "plate", "to": "out", "gain": 1.0}],
        "excitation": {"kind": "impulse"},
    }
    try:
        k = Kernel(ctx, torus)
    except SheafsynthError as e:
        raise Skip(f"a 64x64 torus field does not compile: {e}") from None
    frames = (RATE // 8) if ctx.quick else (RATE // 2)
    nblk = frames // BLOCK
    frames = nblk * BLOCK
    vel = 100
    ev = k.events([(0, 1, 60, vel, 0.0)])
    hand, x_in = _hand_torus(ctx, k, vel, frames)
    # same arithmetic: the hand-written loop's output against the kernel's
    got = np.zeros(frames, np.float32)
    want = np.zeros(frames, np.float32)
    k.run(nblk, ev, keep=got)
    _torus_run(ctx, hand, x_in, want)
    same = float(np.max(np.abs(got - want)))

    def kern():
        k.silence()
        k.run(1, ev)
        return k.run(nblk - 1)

    def hand_side():
        hand2, _ = _hand_torus(ctx, k, vel, frames)
        return _torus_run(ctx, hand2, x_in, want, skip=BLOCK)

    reps = 3 if ctx.quick else 5
    res = interleave({"kernel": kern, "hand": hand_side}, reps)
    timed = frames - BLOCK
    rtf = spread([timed / RATE / t for t in res["kernel"]])
    ratio = spread([a / b for a, b in zip(res["kernel"], res["hand"])])
    ctx.report["torus4096_realtime_factor"] = rtf["median"]
    ctx.report["field_vs_handwritten"] = ratio["median"]
    fp = next(b for b in k.inst.program.blocks if b.is_field).field
    if fp is None:
        raise Skip("the torus lowered without a field program")
    ctx.details["torus4096_realtime_factor"] = {
        "realtime_factor": rtf, "frames": timed, "vertices": TORUS_SHAPE[0] * TORUS_SHAPE[1],
        "layout": fp.layout, "state_type": getattr(fp, "ctype", "float"),
        "setup": "one voice, struck by an impulse; the first block untimed",
        "handwritten_realtime_factor": spread([timed / RATE / t for t in res["hand"]]),
    }
    ctx.details["field_vs_handwritten"] = {"ratio": ratio, "max_abs_diff": same,
                                            "handwritten": "csrc/bench/stencil_hand.c"}
    if not ctx.quick and getattr(fp, "ctype", "float") != "float":
        _torus_single(ctx, torus, nblk)
    _largest_field_preset(ctx)


def _torus_single(ctx: BenchContext, torus: dict, nblk: int) -> None:
    """The same torus with float32 state ("precision": "single"): a figure beside the default's."""
    raw = copy.deepcopy(torus)
    raw["cells"][0]["precision"] = "single"
    try:
        k = Kernel(ctx, raw)
    except SheafsynthError as e:
        ctx.details["torus4096_realtime_factor"]["single_precision"] = f"not measured: {e}"
        return
    ev = k.events([(0, 1, 60, 100, 0.0)])

    def run():
        k.silence()
        k.run(1, ev)
        return k.run(nblk - 1)

    ts = [run() for _ in range(5)]
    ctx.details["torus4096_realtime_factor"]["single_precision"] = {
        "realtime_factor": spread([(nblk - 1) * BLOCK / RATE / t for t in ts]),
        "note": 'the same plate with "precision": "single" (float32 state; the default keeps a torus '
                "in double because its sheaf Laplacian has a drift mode)"}


def _hand_torus(ctx: BenchContext, k: Kernel, vel: int, frames: int):
    """csrc/bench/stencil_hand.c set up as the torus kernel's one voice; (memory, input samples)."""
    prog = k.inst.program
    blk = next(b for b in prog.blocks if b.is_field)
    fp = blk.field
    if fp is None:
        raise Skip("the torus lowered without a field program")
    st = fp.stencil
    if fp.layout != "stencil" or st is None or st.dims != 2 or st.rule0 != "periodic" \
            or st.rule1 != "periodic" or st.scale0 != 1.0 or st.scale1 != 1.0:
        raise Skip(f"the torus lowered to a {fp.layout} layout; the hand-written loop is a plain torus stencil")
    env = k.inst.values
    c = coefficients(fp, env, kappa2(fp, 60.0, RATE, env), 1.0)
    if c.get("ce") or c.get("cf"):
        raise Skip("the hand-written torus loop has no hf-loss or stiffness terms")
    rows, cols, width = st.rows, st.cols, st.width
    t = "d" if getattr(fp, "ctype", "float") == "double" else "f"

    def points(w):
        nz = np.flatnonzero(w)
        order = np.argsort(fp.storage[nz])
        idx, wt = [], []
        for d in nz[order]:
            s_ = int(fp.storage[d])
            idx.append((s_ // width - 1) * cols + (s_ % width - 1))
            wt.append(float(np.float32(w[d])))
        return np.array(idx, np.int32), np.array(wt, np.float32)

    si, sw = points(fp.weights(fp.inputs[0], env))
    pi, pw = points(fp.weights(fp.outputs[0], env))
    og = sum(t.gain.value(env) for t in prog.out_terms if t.signal == blk.out_signal)
    exc = prog.excitation
    x = np.zeros(frames, np.float32)
    x[0] = np.float32(float(exc.get("gain", 1.0)) * vel / 127.0)
    ffi, lib = ctx.ffi, ctx.lib
    mem = ffi.new("char[]", int(getattr(lib, f"ssb_torus_bytes_{t}")(rows, cols)))
    ptr = lambda a, ty: ffi.cast(ty, ffi.from_buffer(a))  # noqa: E731
    rc = getattr(lib, f"ssb_torus_init_{t}")(mem, rows, cols, c["cv"], c["cl"], c["cr"], len(si),
                                             ptr(si, "int32_t *"), ptr(sw, "float *"), len(pi),
                                             ptr(pi, "int32_t *"), ptr(pw, "float *"), float(og))
    if rc != 0:
        raise Skip("the torus has more strike or pickup points than the hand-written loop takes")
    return (mem, t), x


def _torus_run(ctx: BenchContext, mem, x: np.ndarray, out: np.ndarray, skip: int = 0) -> float:
    """Run the hand-written torus over x into out; seconds for the samples after ``skip``."""
    ffi = ctx.ffi
    mem, t = mem
    fn = getattr(ctx.lib, f"ssb_torus_run_{t}")
    if skip:
        fn(mem, ffi.cast("float *", ffi.from_buffer(x)), ffi.cast("float *", ffi.from_buffer(out)), skip)
    xs, os_ = x[skip:], out[skip:]
    ns = fn(mem, ffi.cast("float *", ffi.from_buffer(xs)), ffi.cast("float *", ffi.from_buffer(os_)), len(xs))
    return ns * 1e-9


def _largest_field_preset(ctx: BenchContext) -> None:
    best = None     # (vertices x stalk, name, raw): sized from the JSON, only the largest compiles
    for path in factory_presets():
        raw = preset_raw(str(path))
        size = field_size(raw)
        if size and (best is None or size > best[0]):
            best = (size, path.stem, raw)
    if best is None:
        ctx.details["torus4096_realtime_factor"]["largest_field_preset"] = None
        ctx.details["torus4096_realtime_factor"]["largest_field_preset_note"] = "no factory preset has a field"
        return
    size, name, raw = best
    k = Kernel(ctx, raw)
    size = sum(b.field.n_dof for b in k.inst.program.blocks if b.field is not None)
    ctypes_ = sorted({getattr(b.field, "ctype", "float") for b in k.inst.program.blocks if b.field is not None})
    frames = (RATE // 8) if ctx.quick else (RATE // 2)
    nblk = frames // BLOCK
    ev = k.events([(0, 1, 60, 100, 0.0)])

    def run():
        k.silence()
        k.run(1, ev)
        return k.run(nblk - 1)

    ts = [run() for _ in range(3 if ctx.quick else 5)]
    ctx.details["torus4096_realtime_factor"]["largest_field_preset"] = {
        "preset": name, "dofs": size, "state_type": "/".join(ctypes_),
        "realtime_factor": spread([(nblk - 1) * BLOCK / RATE / t for t in ts]),
        "setup": "one voice, note 60, velocity 100, the first block untimed"}

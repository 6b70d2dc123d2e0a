"""String measurements: the generated kernel against the hand-written loop (csrc/bench/pluck_hand.c), and voices at half a core.

Times in s (C thread CPU time), rate in Hz, blocks in frames.
"""

from __future__ import annotations

import copy
import math

import numpy as np

from sheafsynth.engine.errors import SheafsynthError
from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.ir.program import MAX_BEND_SEMITONES, note_hz
from sheafsynth.engine.ir.tuning import loop_slack, tune_loop
from sheafsynth.engine.preset import factory_presets
from sheafsynth.host.bench.context import BLOCK, PLAIN_PRESET, RATE, BenchContext, Kernel, Skip, preset_raw
from sheafsynth.host.bench.stats import interleave, solve_half, spread

__all__ = ["generated_vs_handwritten", "capacity", "spread_notes", "strike", "sustaining", "hold_params", "is_string", "kernel_ring_floats"]


def is_string(raw: dict) -> bool:
    """A string preset: it has a pitch-tracking delay loop (fields as bridges or bodies allowed)."""
    return any(c.get("kind") == "delay" and c.get("length") == "pitch" for c in raw.get("cells", []))


def spread_notes(lo: int, hi: int, n: int) -> list[int]:
    """``n`` MIDI notes spread over ``lo``..``hi`` (repeats when n exceeds the range)."""
    span = hi - lo + 1
    return [lo + (i * 37) % span if span > 1 else lo for i in range(n)]


def strike(k: Kernel, notes: list[int], velocity: int = 100) -> int:
    """Start one voice per entry of ``notes`` (repeats allowed) and render until all sound.

    A note struck again releases its previous voice, and a released voice
    is freed at the end of a block in which it is silent, so repeats of a
    note are struck one loop period apart: the earlier voice is already
    sounding when it is released (the presets used here release with
    decay 1, so it keeps ringing).  Every note's last strike falls at the
    same time; after that the block loop runs one lowest period more.
    Returns the blocks rendered.
    """
    groups: dict[int, int] = {}
    for nt in notes:
        groups[nt] = groups.get(nt, 0) + 1
    sched: list[tuple[int, int]] = []
    span = {nt: (cnt - 1) * (int(math.ceil(RATE / note_hz(nt))) + 2) for nt, cnt in groups.items()}
    end = max(span.values())
    for nt, cnt in groups.items():
        step = int(math.ceil(RATE / note_hz(nt))) + 2
        for j in range(cnt):
            sched.append((end - (cnt - 1 - j) * step, nt))
    sched.sort()
    settle = int(math.ceil(RATE / note_hz(min(notes)))) + 2 * BLOCK
    total = end + settle
    blocks = 0
    i = 0
    t = 0
    while t < total:
        while i < len(sched) and sched[i][0] < t + BLOCK:
            k.inst.note_on(sched[i][1], velocity, sched[i][0] - t)
            i += 1
        k.inst.process(BLOCK)
        t += BLOCK
        blocks += 1
    return blocks


def kernel_ring_floats(prog, blk, note: int) -> int:
    """Ring floats the kernel gives a voice of ``note`` on pitch delay ``blk``.

    The kernel's rule (ssk_voice_reset in the generated C): room for the
    period at note - MAX_BEND semitones times the loop's slack (engine.ir.tuning.loop_slack) -- 1 plus a
    half for every filter on the loop and every wire gain that can turn
    negative (each can add at most half a period of phase delay) -- plus 2.5
    samples, as a power of two, at most the preset's ring.
    """
    pmax = RATE / (note_hz(note - MAX_BEND_SEMITONES) * blk.pitch_ratio * 2.0 ** (blk.pitch_cents / 1200.0))
    need = max(pmax * loop_slack(prog, blk), pmax + 1.5)
    size = 4
    while size < prog.ring_size[blk.index] and size < need + 2.5:
        size *= 2
    return size


def sustaining(raw: dict) -> dict:
    """The preset with release decay 1 (re-struck notes ring on); see strike."""
    raw = copy.deepcopy(raw)
    raw["release"] = {"decay": 1.0}
    return raw


def hold_params(k: Kernel) -> dict:
    """Set every parameter named like a decay to its maximum (longest ring); returns the values set."""
    done = {}
    for p in k.inst.parameters:
        if "decay" in p.name:
            k.inst.set_now(p.name, p.hi)
            done[p.name] = p.hi
    return done


def _hand_pluck(ctx: BenchContext, k: Kernel, notes: list[int], velocity: int, bend_rings: bool = False):
    """The hand-written loop set up for the same voices as kernel ``k`` would play.

    bend_rings: give every voice the ring the kernel gives it (room for the
    longest loop a pitch bend of up to MAX_BEND semitones can ask for) instead
    of one sized to the note's own loop.
    """
    prog = k.inst.program
    env = k.inst.values
    if len(prog.loops) != 1 or prog.loops[0].tuner is None:
        raise Skip("the plain preset must have one tuned loop")
    lp = prog.loops[0]
    dblk = prog.blocks[lp.delay]
    out_gain = [t.gain.value(env) for t in prog.out_terms if t.signal == dblk.out_signal]
    gains = [g.value(env) for g in lp.gains]
    n = len(notes)
    lens = np.zeros(n, np.int32)
    tunes = np.zeros(n, np.float32)
    exl = np.zeros(n, np.int32)
    amp = np.zeros(n, np.float32)
    pole = np.zeros(n, np.float32)
    seeds_a = np.zeros(n, np.uint32)
    sizes = np.zeros(n, np.int32)
    exc = prog.excitation
    for i, nt in enumerate(notes):
        ln, a = tune_loop(prog, lp, float(nt), env)
        lens[i], tunes[i] = ln, a
        if bend_rings:
            sizes[i] = kernel_ring_floats(prog, dblk, nt)
        exl[i] = max(1, int(math.floor(RATE / note_hz(nt) + 0.5)))
        amp[i] = float(exc.get("gain", 1.0)) * velocity / 127.0
        pole[i] = 0.9 * (1.0 - velocity / 127.0) if exc.get("velocity_brightness") else 0.0
        seeds_a[i] = V.seed_voice(0, i + 1)
    ffi, lib = ctx.ffi, ctx.lib
    p32 = lambda a, t: ffi.cast(t, ffi.from_buffer(a))  # noqa: E731
    nbytes = lib.ssb_pluck_bytes(n, p32(lens, "int32_t *"), p32(sizes, "int32_t *"))
    mem = ffi.new("char[]", int(nbytes))
    decay = float(np.float32(np.prod(gains)))
    rc = lib.ssb_pluck_init(mem, n, p32(lens, "int32_t *"), p32(sizes, "int32_t *"), p32(tunes, "float *"),
                            p32(seeds_a, "uint32_t *"),
                            p32(exl, "int32_t *"), p32(amp, "float *"), p32(pole, "float *"),
                            decay, float(out_gain[0]) if out_gain else 0.0)
    if rc != 0:
        raise SheafsynthError("hand-written loop setup failed")
    return mem, int(nbytes)


def _hand_run(ctx: BenchContext, mem, nblocks: int, keep: np.ndarray | None = None) -> float:
    out = keep if keep is not None else np.zeros(BLOCK, np.float32)
    ns = ctx.lib.ssb_pluck_run(mem, ctx.ffi.cast("float *", ctx.ffi.from_buffer(out)), BLOCK, nblocks,
                                1 if keep is not None else 0)
    return ns * 1e-9


def generated_vs_handwritten(ctx: BenchContext) -> None:
    """``generated_vs_handwritten``: the compiled plain preset / csrc/bench/pluck_hand.c, per voice-sample."""
    raw = preset_raw(PLAIN_PRESET)
    # same arithmetic: a few distinct notes from a fresh pool, limiter off, outputs compared
    few = [40, 52, 57, 64, 71, 76, 83, 88]
    kc = ctx.plain()
    kc.reinit(limiter=False)
    mem, _ = _hand_pluck(ctx, kc, few, 100)
    nb = 40
    got = np.zeros(nb * BLOCK, np.float32)
    want = np.zeros(nb * BLOCK, np.float32)
    kc.run(nb, kc.events([(0, 1, nt, 100, 0.0) for nt in few]), keep=got)
    _hand_run(ctx, mem, nb, keep=want)
    same = float(np.max(np.abs(got - want)))
    kc.reinit()
    del mem

    n = 2048
    lo, hi = raw.get("notes", [28, 100])
    notes = spread_notes(lo, hi, n)
    k = ctx.kernel(PLAIN_PRESET, sustaining(raw), polyphony=n)
    held = hold_params(k)
    k.silence()
    strike(k, notes)
    hmem, hbytes = _hand_pluck(ctx, k, notes, 100)
    bmem, bbytes = _hand_pluck(ctx, k, notes, 100, bend_rings=True)
    # Before each timed run a side renders long enough for its longest ring to come round
    # once (the steady state of one instrument playing alone, not the state the other
    # side's run left the caches in).
    warm = max(1, max(k.inst.program.ring_size.values()) // BLOCK)
    nblk = 16 if ctx.quick else 32
    reps = 5 if ctx.quick else 11
    active: list[int] = []

    def gen_side():
        k.run(warm)
        t = k.run(nblk)
        active.append(k.active)
        return t

    res = interleave({"generated": gen_side,
                      "hand": lambda: (_hand_run(ctx, hmem, warm), _hand_run(ctx, hmem, nblk))[1],
                      "hand_bend": lambda: (_hand_run(ctx, bmem, warm), _hand_run(ctx, bmem, nblk))[1]},
                     reps)
    # per voice-sample: a kernel voice whose note died away is freed, the hand-written loop
    # renders all n to the end (the kernel's count after the run, so a conservative ratio)
    gen = [t / max(1, a) for t, a in zip(res["generated"], active)]
    s = spread([g / (h / n) for g, h in zip(gen, res["hand"])])
    sb = spread([g / (h / n) for g, h in zip(gen, res["hand_bend"])])
    per = lambda ts, m: spread([t / (nblk * BLOCK) / mm * 1e9 for t, mm in zip(ts, m)])  # noqa: E731
    ctx.report["generated_vs_handwritten"] = s["median"]
    ctx.details["generated_vs_handwritten"] = {
        "ratio": s, "preset": PLAIN_PRESET, "voices": n, "voices_active_min": min(active),
        "frames_per_rep": nblk * BLOCK, "warmup_blocks": warm,
        "generated_ns_per_voice_sample": per(res["generated"], active),
        "handwritten_ns_per_voice_sample": per(res["hand"], [n] * len(active)),
        "handwritten_ring_bytes": hbytes,
        "ratio_vs_bend_ready_rings": sb,
        "bend_ready_ns_per_voice_sample": per(res["hand_bend"], [n] * len(active)),
        "bend_ready_ring_bytes": bbytes,
        "parameters_set": held, "max_abs_diff_8_voices": same,
        "setup": f"{n} held notes spread over {lo}..{hi} (repeats struck a period apart, release decay 1), "
                 "decay at its maximum, excitation over before timing, kernel limiter on. Hand-written "
                 "rings: sized to each note's loop; bend_ready: the ring the kernel keeps per voice "
                 "(room for a bend of up to 24 semitones down)",
    }


def capacity(ctx: BenchContext) -> None:
    """``voices_at_half_core``: voices at 48 kHz in half of one core's real time, per factory string preset."""
    counts = [512, 2048] if ctx.quick else [1024, 2048, 3072, 4096]
    nblk = 8 if ctx.quick else 16
    block_s = BLOCK / RATE
    voices, det = {}, {}
    for path in factory_presets():
        raw = preset_raw(str(path))
        if not is_string(raw):
            continue
        name = raw.get("name", path.stem)
        lo, hi = raw.get("notes", [28, 100])
        ks = {}
        warm = 0
        for n in counts:
            key = PLAIN_PRESET if (name == PLAIN_PRESET and n == 2048) else name
            ks[n] = ctx.kernel(key, sustaining(raw), polyphony=n) if key == PLAIN_PRESET else \
                Kernel(ctx, sustaining(raw), polyphony=n)
            # steady state: every ring comes round once before the clock starts
            warm = max(warm, max(ks[n].inst.program.ring_size.values(), default=BLOCK) // BLOCK)
        per_rep: dict[int, list[float]] = {n: [] for n in counts}
        active: dict[int, list[int]] = {n: [] for n in counts}
        for r in range(ctx.reps):
            order = counts if r % 2 == 0 else counts[::-1]
            for n in order:
                k = ks[n]
                hold_params(k)
                k.silence()
                strike(k, spread_notes(lo, hi, n))
                k.run(warm)
                t = k.run(nblk)
                active[n].append(k.active)
                per_rep[n].append(t / nblk)
        caps = []
        for r in range(ctx.reps):
            pts = sorted((min(active[n][r], n), per_rep[n][r] / block_s) for n in counts)
            caps.append(solve_half(pts))
        s = spread(caps)
        voices[name] = int(s["median"]) if s["median"] is not None else None
        det[name] = {"voices": s, "counts": counts,
                     "load_per_count": {str(n): spread([x / block_s for x in per_rep[n]]) for n in counts},
                     "active_per_count": {str(n): min(active[n]) for n in counts}}
        ks.clear()
    ctx.report["voices_at_half_core"] = voices
    ctx.details["voices_at_half_core"] = {
        "presets": det, "rate": RATE, "block": BLOCK,
        "method": "load = render CPU time / real time per block at each voice count (held notes spread "
                  "over the preset's range, decay at its maximum, release decay 1 so repeated notes "
                  "ring on; every ring comes round once before timing); the count at load 0.5 "
                  "interpolated (extrapolated past the ends) linearly",
    }

"""``sheafsynth bench``: how fast the compiled kernels are, measured as ratios.

Everything runs in one process on this machine.  Each comparison runs its
two (or more) sides in alternation -- rep 1: A then B, rep 2: B then A, ...
-- so that drift (other programs, clock changes) hits both sides alike, and
reports the median with its spread (quartiles, min, max, count) of the
per-repetition values.  Kernel times are taken in C (csrc/bench/drive.c
calls the render function for a run of blocks and reads the thread's CPU
clock), so Python's call overhead enters only the measurement that is
about it.

Measurements (JSON keys):

``generated_vs_handwritten``
    time of the compiled plain plucked-string preset ÷ time of the
    hand-written loop in csrc/bench/pluck_hand.c, same voices, same notes,
    same frames, same arithmetic.
``speedup_vs_lfilter``
    one voice of that preset written as one IIR of the loop's order and run
    by ``scipy.signal.lfilter`` ÷ the kernel rendering the same note.
``speedup_vs_reference``
    engine.backends.reference.stepper.ReferenceStepper ÷ the kernel, same events and frames.
``voices_at_half_core``
    preset name -> voices rendered at 48 kHz in half of one core's real
    time, for every factory string preset (a pitch-tracking delay loop;
    solved from the time per block measured at a few voice counts).
``torus4096_realtime_factor``, ``field_vs_handwritten``
    one voice of a 64 x 64 torus plate (4096 vertices): audio seconds per
    second of compute, and its time ÷ csrc/bench/stencil_hand.c's loop of
    the same leapfrog update.
``host_overhead_us_per_block``
    Python time per block of ``Instrument.process`` outside the kernel
    (event sorting and conversion, the cffi call), in microseconds.
``compile_cold_s``, ``load_warm_s``
    preset to ready instrument with an empty kernel cache / with the kernel
    already compiled on disk.
``denormal_tail_ratio``
    a block deep in a note's decaying tail ÷ the first blocks of that note.
``machine``
    CPU model, cores, compiler and flags, library versions.

Speed goals are reported (``goals``), never asserted.
"""

from __future__ import annotations

import argparse
import copy
import json
import math
import os
import platform
import shlex
import shutil
import statistics
import subprocess
import sys
import sysconfig
import tempfile
import time
from pathlib import Path
from typing import Callable

import numpy as np

from sheafsynth.engine.errors import InputError, SheafsynthError
from sheafsynth.engine.locations import CSRC_DIR

RATE = 48000
BLOCK = 256
#: Timings of work done in this thread use the thread's CPU time (as the C
#: driver does): on a shared machine it leaves out the time other programs
#: held the core.  Compile and load times are wall-clock (the compiler is
#: another process).
cpu_clock = time.thread_time
BENCH_DIR = CSRC_DIR / "bench"
PLAIN_PRESET = "porch-pluck"
TORUS_SHAPE = (64, 64)

KEYS = ("generated_vs_handwritten", "speedup_vs_lfilter", "speedup_vs_reference", "voices_at_half_core",
        "torus4096_realtime_factor", "field_vs_handwritten", "host_overhead_us_per_block",
        "compile_cold_s", "load_warm_s", "denormal_tail_ratio", "machine")

# key -> (comparison, bound); voices_at_half_core applies to the plain preset
GOALS: dict[str, tuple[str, float]] = {
    "generated_vs_handwritten": ("<=", 1.25),
    "speedup_vs_lfilter": (">=", 30.0),
    "speedup_vs_reference": (">=", 100.0),
    "voices_at_half_core": (">=", 2000.0),
    "torus4096_realtime_factor": (">=", 8.0),
    "field_vs_handwritten": ("<=", 1.25),
    "host_overhead_us_per_block": ("<=", 50.0),
    "compile_cold_s": ("<=", 3.0),
    "load_warm_s": ("<=", 0.1),
    "denormal_tail_ratio": ("<=", 1.5),
}

_BENCH_CDEF = """
int ssb_set_clock(int cpu);
int64_t ssb_now_ns(void);
int64_t ssb_drive(uintptr_t render, void *state, const void *events, int n_events,
                  float *out, int frames, int nblocks, int keep);
int ssb_drive_each(uintptr_t render, void *state, const void *events, int n_events,
                   float *out, int frames, int nblocks, int64_t *times);
size_t ssb_pluck_bytes(int n, const int32_t *lens, const int32_t *sizes);
int ssb_pluck_init(void *mem, int n, const int32_t *lens, const int32_t *sizes, const float *tunes,
                   const uint32_t *seeds, const int32_t *exc_len, const float *exc_amp, const float *exc_pole,
                   float decay, float out_gain);
void ssb_pluck_render(void *mem, float *out, int frames);
int64_t ssb_pluck_run(void *mem, float *out, int frames, int nblocks, int keep);
""" + "".join(f"""
size_t ssb_torus_bytes_{t}(int rows, int cols);
int ssb_torus_init_{t}(void *mem, int rows, int cols, float cv, float cl, float cr,
                   int n_strike, const int32_t *strike, const float *sw,
                   int n_pick, const int32_t *pick, const float *pw, float out_gain);
int64_t ssb_torus_run_{t}(void *mem, const float *input, float *out, int frames);
""" for t in ("f", "d"))        # stencil_hand.c once per state type (float, double)
_BENCH_FILES = ("drive.c", "pluck_hand.c")
_STENCIL_TYPES = (("f", "float"), ("d", "double"))


class Skip(Exception):
    """A measurement that cannot run here; the report says why (value null)."""


# ---------------------------------------------------------------- statistics

def spread(xs: list[float]) -> dict:
    """Median with quartiles, min, max and count of a list of numbers."""
    xs = sorted(float(x) for x in xs if x is not None and math.isfinite(x))
    if not xs:
        return {"median": None, "q1": None, "q3": None, "min": None, "max": None, "n": 0}
    if len(xs) >= 2:
        q = statistics.quantiles(xs, n=4, method="inclusive")
        q1, q3 = q[0], q[2]
    else:
        q1 = q3 = xs[0]
    return {"median": statistics.median(xs), "q1": q1, "q3": q3, "min": xs[0], "max": xs[-1], "n": len(xs)}


def interleave(sides: dict[str, Callable[[], float]], reps: int) -> dict[str, list[float]]:
    """Run every side once per repetition, rotating the order (ab, ba, ...); each returns a time (s)."""
    names = list(sides)
    out: dict[str, list[float]] = {n: [] for n in names}
    for r in range(reps):
        k = r % len(names)
        for n in names[k:] + names[:k]:
            out[n].append(float(sides[n]()))
    return out


def _round(x, nd=4):
    if x is None:
        return None
    if isinstance(x, float):
        if not math.isfinite(x):
            return None
        return float(f"{x:.{nd}g}")
    if isinstance(x, dict):
        return {k: _round(v, nd) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_round(v, nd) for v in x]
    return x


# ---------------------------------------------------------------- machine

def _compiler_argv() -> list[str]:
    cc = os.environ.get("CC") or sysconfig.get_config_var("CC") or "cc"
    argv = shlex.split(cc)
    if not argv or shutil.which(argv[0]) is None:
        argv = ["cc"]
    return argv


def machine_info() -> dict:
    from sheafsynth.engine.backends.c.build import BASE_FLAGS

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    cc = _compiler_argv()
    try:
        res = subprocess.run(cc + ["--version"], capture_output=True, text=True, timeout=30,
                             stdin=subprocess.DEVNULL)
        ident = ((res.stdout or res.stderr).splitlines() or ["unknown"])[0].strip()
    except (OSError, subprocess.SubprocessError):
        ident = "unknown"
    try:
        load = [round(x, 2) for x in os.getloadavg()]
    except OSError:
        load = None
    import cffi
    import scipy

    return {"cpu": cpu, "cores": os.cpu_count(), "arch": platform.machine(),
            "compiler": f"{' '.join(cc)}: {ident}", "flags": " ".join(BASE_FLAGS),
            "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "cffi": cffi.__version__, "loadavg_at_start": load}


# ---------------------------------------------------------------- helpers

def _bench_module():
    from sheafsynth.engine.backends.c.build import compile_module

    text = []
    for name in _BENCH_FILES + ("stencil_hand.c",):
        p = BENCH_DIR / name
        if not p.exists():
            raise SheafsynthError(f"benchmark source {p} is missing")
        body = p.read_text(encoding="utf-8")
        if name != "stencil_hand.c":
            text.append(f"/* ---- {name} ---- */\n" + body)
            continue
        for suffix, ctype in _STENCIL_TYPES:
            text.append(f"/* ---- {name} ({ctype}) ---- */\n#define SSB_T_REAL {ctype}\n"
                        f"#define SSB_T_NAME(x) x##_{suffix}\n{body}\n#undef SSB_T_REAL\n#undef SSB_T_NAME\n")
    return compile_module(_BENCH_CDEF, "\n".join(text), tag="bench")


def _preset_raw(name: str) -> dict:
    from sheafsynth.host import bank

    return copy.deepcopy(bank.load(name).raw)


def _note_hz(note: float) -> float:
    return 440.0 * 2.0 ** ((note - 69.0) / 12.0)


def _has_field(raw: dict) -> bool:
    return any(c.get("kind") == "field" for c in raw.get("cells", []))


def _is_string(raw: dict) -> bool:
    """A string preset: it has a pitch-tracking delay loop (fields as bridges or bodies allowed)."""
    return any(c.get("kind") == "delay" and c.get("length") == "pitch" for c in raw.get("cells", []))


def _field_size(raw: dict) -> int:
    """Vertices x stalk of a preset's field cells, read from the JSON (engine/cells/field.py's shapes)."""
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


class _Kernel:
    """An Instrument plus what the C driver needs to time it."""

    def __init__(self, bench: "_Bench", raw, *, polyphony: int | None = None, limiter: bool = True,
                 max_block: int = BLOCK):
        from sheafsynth.engine.instrument import Instrument

        self.b = bench
        self.inst = Instrument(raw, rate=RATE, max_block=max_block, polyphony=polyphony, limiter=limiter)
        h = self.inst.handle()
        self.fn, self.state = h.render_fn, h.state
        self.kffi = self.inst.module.ffi
        self.out = np.zeros(max_block, dtype=np.float32)

    def events(self, evs: list[tuple]):
        buf = self.kffi.new("ss_event[]", max(1, len(evs)))
        for i, (off, typ, a, b, val) in enumerate(evs):
            buf[i].offset, buf[i].type, buf[i].a, buf[i].b, buf[i].value = off, typ, a, b, val
        return buf

    def run(self, nblocks: int, evs=None, keep: np.ndarray | None = None) -> float:
        """Render nblocks blocks in C; seconds."""
        ffi, lib = self.b.ffi, self.b.lib
        out = keep if keep is not None else self.out
        ev = self.kffi.cast("void *", evs) if evs is not None else ffi.NULL
        n_ev = len(evs) if evs is not None else 0
        ns = lib.ssb_drive(self.fn, ffi.cast("void *", self.state), ev, n_ev,
                           ffi.cast("float *", ffi.from_buffer(out)), BLOCK, nblocks, 1 if keep is not None else 0)
        if ns < 0:
            raise SheafsynthError(f"kernel render failed with status {ns}")
        return ns * 1e-9

    def reinit(self, limiter: bool = True) -> None:
        """Back to a freshly prepared kernel (sheafsynth_init: no voices, defaults, note count 0)."""
        lib = self.inst.module.lib
        st = self.kffi.cast("void *", self.state)
        if lib.sheafsynth_init(st, 0) != 0 or lib.sheafsynth_set_limiter(st, 1 if limiter else 0) != 0:
            raise SheafsynthError("kernel re-init failed")

    def silence(self) -> None:
        """Free every voice (all sound off, then one block for the fade)."""
        self.inst.all_sound_off()
        for _ in range(2):
            self.inst.process(BLOCK)

    @property
    def active(self) -> int:
        return self.inst.counters["voices_active"]


def _spread_notes(lo: int, hi: int, n: int) -> list[int]:
    span = hi - lo + 1
    return [lo + (i * 37) % span if span > 1 else lo for i in range(n)]


def _strike(k: _Kernel, notes: list[int], velocity: int = 100) -> int:
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
    span = {nt: (cnt - 1) * (int(math.ceil(RATE / _note_hz(nt))) + 2) for nt, cnt in groups.items()}
    end = max(span.values())
    for nt, cnt in groups.items():
        step = int(math.ceil(RATE / _note_hz(nt))) + 2
        for j in range(cnt):
            sched.append((end - (cnt - 1 - j) * step, nt))
    sched.sort()
    settle = int(math.ceil(RATE / _note_hz(min(notes)))) + 2 * BLOCK
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


def _kernel_ring_floats(prog, blk, note: int) -> int:
    """Ring floats the kernel gives a voice of ``note`` on pitch delay ``blk``.

    The kernel's rule (ssk_voice_reset in the generated C): room for the
    period at note - MAX_BEND semitones times the loop's slack (engine.backends.c.emit.loop_slack) -- 1 plus a
    half for every filter on the loop and every wire gain that can turn
    negative (each can add at most half a period of phase delay) -- plus 2.5
    samples, as a power of two, at most the preset's ring.
    """
    from sheafsynth.engine.backends.c.emit import loop_slack
    from sheafsynth.engine.ir.lower import MAX_BEND_SEMITONES

    pmax = RATE / (_note_hz(note - MAX_BEND_SEMITONES) * blk.pitch_ratio * 2.0 ** (blk.pitch_cents / 1200.0))
    need = max(pmax * loop_slack(prog, blk), pmax + 1.5)
    size = 4
    while size < prog.ring_size[blk.index] and size < need + 2.5:
        size *= 2
    return size


def _sustaining(raw: dict) -> dict:
    """The preset with release decay 1 (re-struck notes ring on); see _strike."""
    raw = copy.deepcopy(raw)
    raw["release"] = {"decay": 1.0}
    return raw


def _hold_params(k: _Kernel) -> dict:
    """Set every parameter named like a decay to its maximum (longest ring); returns the values set."""
    done = {}
    for p in k.inst.parameters:
        if "decay" in p.name:
            k.inst.set_now(p.name, p.hi)
            done[p.name] = p.hi
    return done


# ---------------------------------------------------------------- the bench

class _Bench:
    def __init__(self, quick: bool, progress: Callable[[str], None]):
        self.quick = quick
        self.say = progress
        self.reps = 3 if quick else 7
        self.report: dict = {}
        self.details: dict = {}
        self.notes: dict = {}
        mod = _bench_module()
        self.ffi, self.lib = mod.ffi, mod.lib
        self._kernels: dict = {}

    # -- bookkeeping ------------------------------------------------------
    def _item(self, key: str, fn: Callable[[], None]) -> None:
        self.say(f"bench: {key} ...")
        t0 = time.perf_counter()
        try:
            fn()
        except Skip as e:
            self.report.setdefault(key, None)
            self.notes[key] = str(e)
        except Exception as e:  # one failing item must not hide the others
            if os.environ.get("SHEAFSYNTH_DEBUG"):
                raise
            self.report.setdefault(key, None)
            self.notes[key] = f"failed: {type(e).__name__}: {e}"
        self.details.setdefault(key, {})["elapsed_s"] = time.perf_counter() - t0

    def kernel(self, name: str, raw, **kw) -> _Kernel:
        key = (name, tuple(sorted(kw.items())))
        if key not in self._kernels:
            self._kernels[key] = _Kernel(self, raw, **kw)
        return self._kernels[key]

    def drop_kernels(self) -> None:
        self._kernels.clear()

    def plain(self) -> _Kernel:
        """The plain preset at its own polyphony, silent, parameters at their defaults, limiter on."""
        k = self.kernel(PLAIN_PRESET + ":default", _preset_raw(PLAIN_PRESET))
        k.reinit()
        return k

    # -- 1. generated vs hand-written ---------------------------------------
    def _hand_pluck(self, k: _Kernel, notes: list[int], velocity: int, bend_rings: bool = False):
        """The hand-written loop set up for the same voices as kernel ``k`` would play.

        bend_rings: give every voice the ring the kernel gives it (room for the
        longest loop a pitch bend of up to MAX_BEND semitones can ask for) instead
        of one sized to the note's own loop.
        """
        from sheafsynth.engine.ir import voicing as V
        from sheafsynth.engine.ir.tuning import tune_loop

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
                sizes[i] = _kernel_ring_floats(prog, dblk, nt)
            exl[i] = max(1, int(math.floor(RATE / _note_hz(nt) + 0.5)))
            amp[i] = float(exc.get("gain", 1.0)) * velocity / 127.0
            pole[i] = 0.9 * (1.0 - velocity / 127.0) if exc.get("velocity_brightness") else 0.0
            seeds_a[i] = V.seed_voice(0, i + 1)
        ffi, lib = self.ffi, self.lib
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

    def _hand_run(self, mem, nblocks: int, keep: np.ndarray | None = None) -> float:
        out = keep if keep is not None else np.zeros(BLOCK, np.float32)
        ns = self.lib.ssb_pluck_run(mem, self.ffi.cast("float *", self.ffi.from_buffer(out)), BLOCK, nblocks,
                                    1 if keep is not None else 0)
        return ns * 1e-9

    def generated_vs_handwritten(self) -> None:
        raw = _preset_raw(PLAIN_PRESET)
        # same arithmetic: a few distinct notes from a fresh pool, limiter off, outputs compared
        few = [40, 52, 57, 64, 71, 76, 83, 88]
        kc = self.plain()
        kc.reinit(limiter=False)
        mem, _ = self._hand_pluck(kc, few, 100)
        nb = 40
        got = np.zeros(nb * BLOCK, np.float32)
        want = np.zeros(nb * BLOCK, np.float32)
        kc.run(nb, kc.events([(0, 1, nt, 100, 0.0) for nt in few]), keep=got)
        self._hand_run(mem, nb, keep=want)
        same = float(np.max(np.abs(got - want)))
        kc.reinit()
        del mem

        n = 2048
        lo, hi = raw.get("notes", [28, 100])
        notes = _spread_notes(lo, hi, n)
        k = self.kernel(PLAIN_PRESET, _sustaining(raw), polyphony=n)
        held = _hold_params(k)
        k.silence()
        _strike(k, notes)
        hmem, hbytes = self._hand_pluck(k, notes, 100)
        bmem, bbytes = self._hand_pluck(k, notes, 100, bend_rings=True)
        # Before each timed run a side renders long enough for its longest ring to come round
        # once (the steady state of one instrument playing alone, not the state the other
        # side's run left the caches in).
        warm = max(1, max(k.inst.program.ring_size.values()) // BLOCK)
        nblk = 16 if self.quick else 32
        reps = 5 if self.quick else 11
        active: list[int] = []

        def gen_side():
            k.run(warm)
            t = k.run(nblk)
            active.append(k.active)
            return t

        res = interleave({"generated": gen_side,
                          "hand": lambda: (self._hand_run(hmem, warm), self._hand_run(hmem, nblk))[1],
                          "hand_bend": lambda: (self._hand_run(bmem, warm), self._hand_run(bmem, nblk))[1]},
                         reps)
        # per voice-sample: a kernel voice whose note died away is freed, the hand-written loop
        # renders all n to the end (the kernel's count after the run, so a conservative ratio)
        gen = [t / max(1, a) for t, a in zip(res["generated"], active)]
        s = spread([g / (h / n) for g, h in zip(gen, res["hand"])])
        sb = spread([g / (h / n) for g, h in zip(gen, res["hand_bend"])])
        per = lambda ts, m: spread([t / (nblk * BLOCK) / mm * 1e9 for t, mm in zip(ts, m)])  # noqa: E731
        self.report["generated_vs_handwritten"] = s["median"]
        self.details["generated_vs_handwritten"] = {
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

    # -- 2. and 3. one voice against lfilter and the reference --------------
    def _loop_iir(self, k: _Kernel, note: int):
        """(b, a) of one voice: excitation in, voice output out (one tuned loop, output off the delay)."""
        from scipy import signal

        from sheafsynth.engine.ir.tuning import tune_loop

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

    def _excitation(self, k: _Kernel, note: int, velocity: int, started: int, frames: int) -> np.ndarray:
        from sheafsynth.engine.ir import voicing as V

        exc = k.inst.program.excitation
        x = np.zeros(frames, np.float64)
        amp = np.float32(float(exc.get("gain", 1.0)) * velocity / 127.0)
        q = np.float32(0.9 * (1.0 - velocity / 127.0)) if exc.get("velocity_brightness") else np.float32(0.0)
        rng = V.seed_voice(0, started)
        y = np.float32(0.0)
        one = np.float32(1.0)
        for i in range(min(frames, max(1, int(math.floor(RATE / _note_hz(note) + 0.5))))):
            rng = V.xorshift32(rng)
            y = (one - q) * np.float32(V.noise_value(rng)) + q * y
            x[i] = float(amp * y)
        return x

    def one_voice(self) -> None:
        from scipy import signal

        from sheafsynth.engine.backends.reference.stepper import ReferenceStepper

        k = self.plain()
        note, vel = 60, 100
        frames = RATE if not self.quick else RATE // 2
        nblk = frames // BLOCK
        frames = nblk * BLOCK
        ev = k.events([(0, 1, note, vel, 0.0)])
        # lfilter
        b, a, ln = self._loop_iir(k, note)
        x = self._excitation(k, note, vel, 1, frames).astype(np.float32)
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

        res = interleave({"kernel": kernel_side, "lfilter": lfilter_side}, self.reps)
        s = spread([l / kk for l, kk in zip(res["lfilter"], res["kernel"])])
        self.report["speedup_vs_lfilter"] = s["median"]
        self.details["speedup_vs_lfilter"] = {
            "speedup": s, "preset": PLAIN_PRESET, "note": note, "frames": frames, "iir_order": len(a) - 1,
            "loop_length": ln, "dtype": "float32", "lfilter_s": spread(res["lfilter"]),
            "kernel_s": spread(res["kernel"]), "max_abs_diff": diff,
        }
        # reference stepper
        rframes = (BLOCK * 8) if self.quick else (BLOCK * 24)
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

        rreps = 3 if self.quick else 5
        res = interleave({"kernel": kern_side, "reference": ref_side}, rreps)
        s = spread([r / kk for r, kk in zip(res["reference"], res["kernel"])])
        self.report["speedup_vs_reference"] = s["median"]
        self.details["speedup_vs_reference"] = {
            "speedup": s, "preset": PLAIN_PRESET, "note": note, "frames": rframes,
            "reference_s": spread(res["reference"]), "kernel_s": spread(res["kernel"]),
        }

    # -- 4. voice capacity ----------------------------------------------------
    def capacity(self) -> None:
        from sheafsynth.engine.preset import factory_presets

        counts = [512, 2048] if self.quick else [1024, 2048, 3072, 4096]
        nblk = 8 if self.quick else 16
        block_s = BLOCK / RATE
        voices, det = {}, {}
        for path in factory_presets():
            raw = _preset_raw(str(path))
            if not _is_string(raw):
                continue
            name = raw.get("name", path.stem)
            lo, hi = raw.get("notes", [28, 100])
            ks = {}
            warm = 0
            for n in counts:
                key = PLAIN_PRESET if (name == PLAIN_PRESET and n == 2048) else name
                ks[n] = self.kernel(key, _sustaining(raw), polyphony=n) if key == PLAIN_PRESET else \
                    _Kernel(self, _sustaining(raw), polyphony=n)
                # steady state: every ring comes round once before the clock starts
                warm = max(warm, max(ks[n].inst.program.ring_size.values(), default=BLOCK) // BLOCK)
            per_rep: dict[int, list[float]] = {n: [] for n in counts}
            active: dict[int, list[int]] = {n: [] for n in counts}
            for r in range(self.reps):
                order = counts if r % 2 == 0 else counts[::-1]
                for n in order:
                    k = ks[n]
                    _hold_params(k)
                    k.silence()
                    _strike(k, _spread_notes(lo, hi, n))
                    k.run(warm)
                    t = k.run(nblk)
                    active[n].append(k.active)
                    per_rep[n].append(t / nblk)
            caps = []
            for r in range(self.reps):
                pts = sorted((min(active[n][r], n), per_rep[n][r] / block_s) for n in counts)
                caps.append(_solve_half(pts))
            s = spread(caps)
            voices[name] = int(s["median"]) if s["median"] is not None else None
            det[name] = {"voices": s, "counts": counts,
                         "load_per_count": {str(n): spread([x / block_s for x in per_rep[n]]) for n in counts},
                         "active_per_count": {str(n): min(active[n]) for n in counts}}
            ks.clear()
        self.report["voices_at_half_core"] = voices
        self.details["voices_at_half_core"] = {
            "presets": det, "rate": RATE, "block": BLOCK,
            "method": "load = render CPU time / real time per block at each voice count (held notes spread "
                      "over the preset's range, decay at its maximum, release decay 1 so repeated notes "
                      "ring on; every ring comes round once before timing); the count at load 0.5 "
                      "interpolated (extrapolated past the ends) linearly",
        }

    # -- 5. fields --------------------------------------------------------------
    def fields(self) -> None:
        try:
            from sheafsynth.engine.model.cells import field as _field  # noqa: F401
            from sheafsynth.engine.ir import fields as _fp  # noqa: F401
        except ImportError:
            raise Skip("field cells (engine/cells/field.py) are not available yet") from None
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
            k = _Kernel(self, torus)
        except SheafsynthError as e:
            raise Skip(f"a 64x64 torus field does not compile: {e}") from None
        frames = (RATE // 8) if self.quick else (RATE // 2)
        nblk = frames // BLOCK
        frames = nblk * BLOCK
        vel = 100
        ev = k.events([(0, 1, 60, vel, 0.0)])
        hand, x_in = self._hand_torus(k, vel, frames)
        # same arithmetic: the hand-written loop's output against the kernel's
        got = np.zeros(frames, np.float32)
        want = np.zeros(frames, np.float32)
        k.run(nblk, ev, keep=got)
        self._torus_run(hand, x_in, want)
        same = float(np.max(np.abs(got - want)))

        def kern():
            k.silence()
            k.run(1, ev)
            return k.run(nblk - 1)

        def hand_side():
            hand2, _ = self._hand_torus(k, vel, frames)
            return self._torus_run(hand2, x_in, want, skip=BLOCK)

        reps = 3 if self.quick else 5
        res = interleave({"kernel": kern, "hand": hand_side}, reps)
        timed = frames - BLOCK
        rtf = spread([timed / RATE / t for t in res["kernel"]])
        ratio = spread([a / b for a, b in zip(res["kernel"], res["hand"])])
        self.report["torus4096_realtime_factor"] = rtf["median"]
        self.report["field_vs_handwritten"] = ratio["median"]
        fp = next(b for b in k.inst.program.blocks if b.is_field).field
        self.details["torus4096_realtime_factor"] = {
            "realtime_factor": rtf, "frames": timed, "vertices": TORUS_SHAPE[0] * TORUS_SHAPE[1],
            "layout": fp.layout, "state_type": getattr(fp, "ctype", "float"),
            "setup": "one voice, struck by an impulse; the first block untimed",
            "handwritten_realtime_factor": spread([timed / RATE / t for t in res["hand"]]),
        }
        self.details["field_vs_handwritten"] = {"ratio": ratio, "max_abs_diff": same,
                                                "handwritten": "csrc/bench/stencil_hand.c"}
        if not self.quick and getattr(fp, "ctype", "float") != "float":
            self._torus_single(torus, nblk)
        self._largest_field_preset()

    def _torus_single(self, torus: dict, nblk: int) -> None:
        """The same torus with float32 state ("precision": "single"): a figure beside the default's."""
        raw = copy.deepcopy(torus)
        raw["cells"][0]["precision"] = "single"
        try:
            k = _Kernel(self, raw)
        except SheafsynthError as e:
            self.details["torus4096_realtime_factor"]["single_precision"] = f"not measured: {e}"
            return
        ev = k.events([(0, 1, 60, 100, 0.0)])

        def run():
            k.silence()
            k.run(1, ev)
            return k.run(nblk - 1)

        ts = [run() for _ in range(5)]
        self.details["torus4096_realtime_factor"]["single_precision"] = {
            "realtime_factor": spread([(nblk - 1) * BLOCK / RATE / t for t in ts]),
            "note": 'the same plate with "precision": "single" (float32 state; the default keeps a torus '
                    "in double because its sheaf Laplacian has a drift mode)"}

    def _hand_torus(self, k: _Kernel, vel: int, frames: int):
        """csrc/bench/stencil_hand.c set up as the torus kernel's one voice; (memory, input samples)."""
        from sheafsynth.engine.ir.fields import coefficients, kappa2

        prog = k.inst.program
        blk = next(b for b in prog.blocks if b.is_field)
        fp = blk.field
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
        ffi, lib = self.ffi, self.lib
        mem = ffi.new("char[]", int(getattr(lib, f"ssb_torus_bytes_{t}")(rows, cols)))
        ptr = lambda a, ty: ffi.cast(ty, ffi.from_buffer(a))  # noqa: E731
        rc = getattr(lib, f"ssb_torus_init_{t}")(mem, rows, cols, c["cv"], c["cl"], c["cr"], len(si),
                                                 ptr(si, "int32_t *"), ptr(sw, "float *"), len(pi),
                                                 ptr(pi, "int32_t *"), ptr(pw, "float *"), float(og))
        if rc != 0:
            raise Skip("the torus has more strike or pickup points than the hand-written loop takes")
        return (mem, t), x

    def _torus_run(self, mem, x: np.ndarray, out: np.ndarray, skip: int = 0) -> float:
        """Run the hand-written torus over x into out; seconds for the samples after ``skip``."""
        ffi = self.ffi
        mem, t = mem
        fn = getattr(self.lib, f"ssb_torus_run_{t}")
        if skip:
            fn(mem, ffi.cast("float *", ffi.from_buffer(x)), ffi.cast("float *", ffi.from_buffer(out)), skip)
        xs, os_ = x[skip:], out[skip:]
        ns = fn(mem, ffi.cast("float *", ffi.from_buffer(xs)), ffi.cast("float *", ffi.from_buffer(os_)), len(xs))
        return ns * 1e-9

    def _largest_field_preset(self) -> None:
        from sheafsynth.engine.preset import factory_presets

        best = None     # (vertices x stalk, name, raw): sized from the JSON, only the largest compiles
        for path in factory_presets():
            raw = _preset_raw(str(path))
            size = _field_size(raw)
            if size and (best is None or size > best[0]):
                best = (size, path.stem, raw)
        if best is None:
            self.details["torus4096_realtime_factor"]["largest_field_preset"] = None
            self.details["torus4096_realtime_factor"]["largest_field_preset_note"] = "no factory preset has a field"
            return
        size, name, raw = best
        k = _Kernel(self, raw)
        size = sum(b.field.n_dof for b in k.inst.program.blocks if b.is_field)
        ctypes_ = sorted({getattr(b.field, "ctype", "float") for b in k.inst.program.blocks if b.is_field})
        frames = (RATE // 8) if self.quick else (RATE // 2)
        nblk = frames // BLOCK
        ev = k.events([(0, 1, 60, 100, 0.0)])

        def run():
            k.silence()
            k.run(1, ev)
            return k.run(nblk - 1)

        ts = [run() for _ in range(3 if self.quick else 5)]
        self.details["torus4096_realtime_factor"]["largest_field_preset"] = {
            "preset": name, "dofs": size, "state_type": "/".join(ctypes_),
            "realtime_factor": spread([(nblk - 1) * BLOCK / RATE / t for t in ts]),
            "setup": "one voice, note 60, velocity 100, the first block untimed"}

    # -- 6. host overhead ---------------------------------------------------------
    def host_overhead(self) -> None:
        from sheafsynth.engine.ir import voicing as V

        k = self.plain()
        inst = k.inst
        evs = [(10, V.EV_PARAM, 0, 0, 0.99), (60, V.EV_NOTE_OFF, 61, 0, 0.0),
               (120, V.EV_PARAM, 0, 0, 0.995), (200, V.EV_NOTE_OFF, 62, 0, 0.0)]
        cev = k.events(evs)
        loops = 200 if self.quick else 1000

        def py_events():
            t0 = cpu_clock()
            for _ in range(loops):
                for e in evs:
                    inst.push_event(*e)
                inst.process(BLOCK)
            return (cpu_clock() - t0) / loops

        def py_plain():
            t0 = cpu_clock()
            for _ in range(loops):
                inst.process(BLOCK)
            return (cpu_clock() - t0) / loops

        def c_events():
            tot = 0.0
            for _ in range(loops // 10):
                tot += k.run(1, cev)
            return tot / (loops // 10)

        def c_plain():
            return k.run(loops) / loops

        res = interleave({"py_events": py_events, "py_plain": py_plain, "c_events": c_events,
                          "c_plain": c_plain}, self.reps)
        over_ev = [(p - c) * 1e6 for p, c in zip(res["py_events"], res["c_events"])]
        over_plain = [(p - c) * 1e6 for p, c in zip(res["py_plain"], res["c_plain"])]
        s = spread(over_ev)
        self.report["host_overhead_us_per_block"] = s["median"]
        det = {
            "overhead_us_4_events": s, "overhead_us_no_events": spread(over_plain),
            "kernel_us_empty_block": spread([c * 1e6 for c in res["c_plain"]]),
            "path": "Instrument.process(256 frames) with 4 queued events minus the same render called from C; "
                    "no voices sounding, so the kernel part is small and the rest is Python",
        }
        try:
            det.update(self._live_overhead(k))
        except Exception as e:  # the runtime module may be unavailable; say so
            if os.environ.get("SHEAFSYNTH_DEBUG"):
                raise
            det["live"] = f"not measured: {type(e).__name__}: {e}"
        self.details["host_overhead_us_per_block"] = det

    def _live_overhead(self, k: _Kernel) -> dict:
        from sheafsynth.host.live.runtime import EV_PARAM, HostRuntime

        rt = HostRuntime(float(RATE), BLOCK, channels=2)
        rt.set_kernel(k.fn, k.state, keep=k)
        loops = 200 if self.quick else 1000
        now = rt.now_ns()

        def proc():
            nonlocal now
            t0 = cpu_clock()
            for _ in range(loops):
                now += int(BLOCK / RATE * 1e9)
                rt.process(BLOCK, now)
            return (cpu_clock() - t0) / loops

        def push():
            tot = 0.0
            for _ in range(loops // 50 or 1):
                t0 = cpu_clock()
                for _ in range(50):
                    rt.push(EV_PARAM, 0, 0, 0.99)
                tot += cpu_clock() - t0
                rt.process(BLOCK, rt.now_ns())
            return tot / ((loops // 50 or 1) * 50)

        res = interleave({"proc": proc, "push": push}, self.reps)
        c = rt.counters()
        cb_us = c.cb_last_ns / 1e3
        rt.set_kernel(None, None)
        rt.release_all_kernels()
        return {
            "live_callback_python_us_per_block": 0.0,
            "live_note": "the live callback is C (csrc/host_rt.c, a PortAudio callback): no Python runs "
                         "per audio block; Python only pushes MIDI events into the C ring",
            "midi_push_us_per_event": spread([x * 1e6 for x in res["push"]]),
            "hand_driven_callback_us_per_block": spread([x * 1e6 for x in res["proc"]]),
            "hand_driven_note": f"HostRuntime.process from Python (tests/offline only), callback itself "
                                f"{cb_us:.2f} us in C",
        }

    # -- 7. compile and load ------------------------------------------------------
    def compile_load(self) -> None:
        from sheafsynth.engine.instrument import Instrument

        from sheafsynth.host import bank

        src_path = str(bank.load(PLAIN_PRESET).source)
        reps = 1 if self.quick else 3
        self._imports: list[float] = []
        tmp = Path(tempfile.mkdtemp(prefix="sheafsynth-bench-"))
        old = os.environ.get("SHEAFSYNTH_CACHE_DIR")
        # Every repetition builds a different polyphony (one #define apart), so no
        # repetition can reuse another's shared object.
        try:
            cold, cold_cpu, warm_fresh, warm_here, cold_here = [], [], [], [], []
            for r in range(reps):
                d = tmp / f"rep{r}"
                t, c = self._helper(src_path, 16 + r, d)        # fresh process, empty cache
                cold.append(t)
                cold_cpu.append(c)
                warm_fresh.append(self._helper(src_path, 16 + r, d)[0])   # fresh process, cached
                os.environ["SHEAFSYNTH_CACHE_DIR"] = str(d)
                t0 = time.perf_counter()
                inst = Instrument(src_path, rate=RATE, max_block=512, polyphony=16 + r)
                warm_here.append(time.perf_counter() - t0)
                if not inst.cached:
                    raise SheafsynthError("the warm load compiled")
                os.environ["SHEAFSYNTH_CACHE_DIR"] = str(tmp / f"here{r}")
                t0 = time.perf_counter()
                inst = Instrument(src_path, rate=RATE, max_block=512, polyphony=64 + r)
                cold_here.append(time.perf_counter() - t0)
                del inst
        finally:
            if old is None:
                os.environ.pop("SHEAFSYNTH_CACHE_DIR", None)
            else:
                os.environ["SHEAFSYNTH_CACHE_DIR"] = old
            shutil.rmtree(tmp, ignore_errors=True)
        sc, sw = spread(cold), spread(warm_fresh)
        self.report["compile_cold_s"] = sc["median"]
        self.report["load_warm_s"] = sw["median"]
        what = "Instrument(preset) to a ready kernel (load and check the preset, lower, generate C, "
        self.details["compile_cold_s"] = {
            "seconds": sc, "cpu_seconds": spread(cold_cpu), "in_this_process_seconds": spread(cold_here),
            "preset": PLAIN_PRESET,
            "path": what + "compile, load, init) with an empty kernel cache, timed inside a fresh process "
                           "(imports excluded); wall-clock: the compiler is a child process (cpu_seconds "
                           "counts its CPU time too); in_this_process: the same after this process compiled before"}
        self.details["load_warm_s"] = {
            "seconds": sw, "in_this_process_seconds": spread(warm_here), "preset": PLAIN_PRESET,
            "library_import_s": spread(self._imports),
            "path": what + "load the cached shared object, init), timed inside a fresh process (library "
                           "imports excluded: library_import_s is jsonschema's one-time import, which a "
                           "process pays on its first preset); in_this_process: a shared object this "
                           "process had not loaded yet"}

    def _helper(self, src_path: str, polyphony: int, cache: Path) -> tuple[float, float]:
        """Time Instrument(preset) in a fresh Python process; (wall s, CPU s incl. the compiler).

        Library imports happen before the clock starts, jsonschema's too (the
        preset check imports it on first use); its import time is kept apart.
        """
        code = (
            "import json, resource, sys, time\n"
            "from sheafsynth.engine.instrument import Instrument\n"
            "i0 = time.perf_counter()\n"
            "import jsonschema  # noqa: F401  (imported lazily by the first preset check)\n"
            "imp = time.perf_counter() - i0\n"
            "c0 = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
            "p0 = time.process_time()\n"
            "t0 = time.perf_counter()\n"
            f"Instrument({src_path!r}, rate={RATE}, max_block=512, polyphony={int(polyphony)})\n"
            "t = time.perf_counter() - t0\n"
            "c1 = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
            "cpu = time.process_time() - p0 + (c1.ru_utime - c0.ru_utime) + (c1.ru_stime - c0.ru_stime)\n"
            "print(json.dumps([t, cpu, imp]))\n"
        )
        env = dict(os.environ)
        env["SHEAFSYNTH_CACHE_DIR"] = str(cache)
        root = str(Path(__file__).resolve().parent.parent)
        env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                             cwd=root, timeout=600, stdin=subprocess.DEVNULL)
        if res.returncode != 0:
            tail = (res.stderr or res.stdout).strip().splitlines()[-1:] or ["no output"]
            raise SheafsynthError(f"helper process failed: {tail[0]}")
        t, cpu, imp = json.loads(res.stdout.strip().splitlines()[-1])
        self._imports.append(float(imp))
        return float(t), float(cpu)

    # -- 8. denormals -------------------------------------------------------------
    def denormals(self) -> None:
        k = self.plain()
        # the preset's top note and above at the lowest decay: tails that reach the float denormal
        # range (below 1.2e-38) before the kernel frees a quiet voice (0.5 s below 1e-6)
        notes = [104, 105, 106, 107, 108]
        params = {p.name: p.lo for p in k.inst.parameters if "decay" in p.name}
        for name, v in params.items():
            k.inst.set_now(name, v)
        ev = k.events([(0, 1, nt, 127, 0.0) for nt in notes])
        nblk = int(1.5 * RATE / BLOCK)
        times = self.ffi.new("int64_t[]", nblk)
        first_n = 4
        ratios, tails, levels = [], [], []
        reps = self.reps + 2
        for _ in range(reps):
            k.silence()
            out = np.zeros(BLOCK, np.float32)
            peaks = []
            # per-block times, and the output level of every block
            t_each = []
            for b in range(nblk):
                rc = self.lib.ssb_drive_each(k.fn, self.ffi.cast("void *", k.state),
                                             k.kffi.cast("void *", ev) if b == 0 else self.ffi.NULL,
                                             len(notes) if b == 0 else 0,
                                             self.ffi.cast("float *", self.ffi.from_buffer(out)), BLOCK, 1, times)
                if rc < 0:
                    raise SheafsynthError("render failed")
                t_each.append(times[0] * 1e-9)
                peaks.append(float(np.max(np.abs(out))))
                if k.active == 0:
                    break
            # deep tail: blocks still rendering voices whose output is within 1000x of the float
            # denormal threshold (1.2e-38): there the loop's products would be subnormal without
            # FTZ/DAZ -- else the last live blocks
            live = len(t_each) - (1 if k.active == 0 else 0)
            deep = [i for i in range(first_n, live) if peaks[i] < 1.2e-35]
            if not deep:
                deep = list(range(max(first_n, live - 8), live))
            if not deep:
                continue
            head = statistics.median(t_each[:first_n])
            tail = statistics.median(t_each[i] for i in deep)
            ratios.append(tail / head)
            tails.append(len(deep))
            levels.append(min(peaks[i] for i in deep))
        s = spread(ratios)
        self.report["denormal_tail_ratio"] = s["median"]
        self.details["denormal_tail_ratio"] = {
            "ratio": s, "preset": PLAIN_PRESET, "notes": notes, "parameters_set": params,
            "first_blocks": first_n, "tail_blocks": spread(tails), "tail_level_min": min(levels) if levels else None,
            "method": "per-block times of one chord from note-on until the voices are freed; tail = blocks "
                      "whose output is below 1.2e-35 (within 1000x of the float denormal threshold: without "
                      "FTZ/DAZ the loop's products would be subnormal) while the voices still render",
        }

    # -- all --------------------------------------------------------------------
    def run(self) -> dict:
        t0 = time.perf_counter()
        self.report["machine"] = machine_info()
        items = [
            ("compile_cold_s", self.compile_load),
            ("generated_vs_handwritten", self.generated_vs_handwritten),
            ("voices_at_half_core", self.capacity),
            ("speedup_vs_lfilter", self.one_voice),
            ("host_overhead_us_per_block", self.host_overhead),
            ("denormal_tail_ratio", self.denormals),
            ("torus4096_realtime_factor", self.fields),
        ]
        for key, fn in items:
            self._item(key, fn)
            if key == "voices_at_half_core":
                self.drop_kernels()
        for key, partner in (("compile_cold_s", "load_warm_s"), ("speedup_vs_lfilter", "speedup_vs_reference"),
                             ("torus4096_realtime_factor", "field_vs_handwritten")):
            if key in self.notes and partner not in self.report:
                self.notes[partner] = self.notes[key]
        out = {key: self.report.get(key) for key in KEYS}
        out["goals"] = goals_met(out)
        out["details"] = self.details
        out["notes"] = self.notes
        out["mode"] = "quick" if self.quick else "full"
        out["reps"] = self.reps
        out["elapsed_s"] = time.perf_counter() - t0
        return _round(out)


def _solve_half(pts: list[tuple[float, float]]) -> float | None:
    """Voice count at load 0.5 from (voices, load) points: linear interpolation, extrapolated at the ends."""
    pts = [p for p in pts if p[0] > 0]
    if len(pts) < 2:
        if pts and pts[0][1] > 0:
            return 0.5 * pts[0][0] / pts[0][1]
        return None
    seg = None
    for (n0, l0), (n1, l1) in zip(pts[:-1], pts[1:]):
        if l0 <= 0.5 <= l1:
            seg = ((n0, l0), (n1, l1))
            break
    if seg is None:
        seg = (pts[0], pts[1]) if pts[0][1] > 0.5 else (pts[-2], pts[-1])
    (n0, l0), (n1, l1) = seg
    if l1 == l0:
        return None
    return n0 + (0.5 - l0) * (n1 - n0) / (l1 - l0)


def goals_met(report: dict) -> dict:
    out = {}
    for key, (op, bound) in GOALS.items():
        v = report.get(key)
        if key == "voices_at_half_core":
            v = (v or {}).get(PLAIN_PRESET)
        met = None if v is None else (v <= bound if op == "<=" else v >= bound)
        out[key] = {"goal": f"{op} {bound:g}", "value": v, "met": met}
    out["voices_at_half_core"]["preset"] = PLAIN_PRESET
    return out


# ---------------------------------------------------------------- table

_LABELS = {
    "generated_vs_handwritten": ("generated / hand-written time", ""),
    "speedup_vs_lfilter": ("speed-up vs scipy lfilter", "x"),
    "speedup_vs_reference": ("speed-up vs reference stepper", "x"),
    "torus4096_realtime_factor": ("64x64 torus, real-time factor", "x"),
    "field_vs_handwritten": ("torus: generated / hand-written", ""),
    "host_overhead_us_per_block": ("host overhead per block", "us"),
    "compile_cold_s": ("cold compile", "s"),
    "load_warm_s": ("warm load", "s"),
    "denormal_tail_ratio": ("deep-tail block / first block", ""),
}


def _spread_of(details: dict, key: str) -> dict | None:
    d = details.get(key) or {}
    for v in d.values():
        if isinstance(v, dict) and "median" in v and "q1" in v:
            return v
    return None


def format_table(rep: dict) -> str:
    m = rep["machine"]
    lines = [f"sheafsynth bench ({rep['mode']}, {rep['reps']} reps, {rep['elapsed_s']:.0f} s)",
             f"machine: {m['cpu']}, {m['cores']} cores; {m['compiler']}; {m['flags']}", ""]
    head = f"{'measurement':<42} {'median':>10} {'q1 .. q3':>22} {'goal':>10}  met"
    lines += [head, "-" * len(head)]
    goals = rep["goals"]

    def row(label, v, unit, sp, goal, met):
        val = "n/a" if v is None else f"{v:.4g}{unit}"
        rng = "" if not sp or sp.get("q1") is None else f"{sp['q1']:.4g} .. {sp['q3']:.4g}"
        flag = "-" if met is None else ("yes" if met else "NO")
        lines.append(f"{label:<42} {val:>10} {rng:>22} {goal:>10}  {flag}")

    for key in KEYS:
        if key == "machine":
            continue
        if key == "voices_at_half_core":
            vs = rep[key] or {}
            det = ((rep["details"].get(key) or {}).get("presets")) or {}
            if not vs:
                row("voices at half a core", None, "", None, goals[key]["goal"], None)
            for name, v in vs.items():
                g = goals[key]["goal"] if name == PLAIN_PRESET else ""
                met = goals[key]["met"] if name == PLAIN_PRESET else None
                row(f"voices at half a core: {name}", v, "", (det.get(name) or {}).get("voices"), g, met)
            continue
        label, unit = _LABELS[key]
        row(label, rep[key], unit, _spread_of(rep["details"], key), goals[key]["goal"], goals[key]["met"])
        det = rep["details"].get(key) or {}
        if key == "generated_vs_handwritten" and isinstance(det.get("ratio_vs_bend_ready_rings"), dict):
            sp = det["ratio_vs_bend_ready_rings"]
            row("  ... hand-written with bend-ready rings", sp.get("median"), "", sp, "", None)
        if key == "torus4096_realtime_factor" and isinstance(det.get("single_precision"), dict):
            sp = det["single_precision"].get("realtime_factor") or {}
            row("  ... the same torus, float32 state", sp.get("median"), "x", sp, "", None)
        if key == "torus4096_realtime_factor" and isinstance(det.get("largest_field_preset"), dict):
            fp = det["largest_field_preset"]
            sp = fp.get("realtime_factor") or {}
            row(f"  ... largest field preset {fp.get('preset')}", sp.get("median"), "x", sp, "", None)
    if rep["notes"]:
        lines.append("")
        for key, text in rep["notes"].items():
            lines.append(f"note: {key}: {text}")
    return "\n".join(lines)


# ---------------------------------------------------------------- command

def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--quick", action="store_true", help="fewer repetitions and shorter runs (under a minute)")
    p.add_argument("--out", metavar="FILE.json", help="also write the JSON report to FILE.json")


def run_bench(quick: bool = False, progress: Callable[[str], None] | None = None) -> dict:
    """Run every measurement; returns the report (module doc)."""
    return _Bench(quick, progress or (lambda s: None)).run()


def _run(args) -> int:
    if args.out is not None:
        target = Path(args.out)
        if not str(args.out).strip() or target.is_dir():
            raise InputError(f"--out {args.out!r}: expected a file name")
        if not target.parent.resolve().is_dir():
            raise InputError(f"--out {args.out}: folder {str(target.parent)!r} does not exist")
    tty = sys.stderr.isatty()
    rep = run_bench(args.quick, (lambda s: print(s, file=sys.stderr, flush=True)) if tty or not args.json else None)
    text = json.dumps(rep, indent=2)
    if args.out:
        path = Path(args.out)
        try:
            tmp = path.with_name(path.name + ".tmp")
            tmp.write_text(text + "\n", encoding="utf-8")
            os.replace(tmp, path)
        except OSError as e:
            raise InputError(f"--out {args.out}: {e.strerror}") from None
    print(text if args.json else format_table(rep))
    return 0


COMMANDS = [("bench", "measure kernel speed against hand-written C, SciPy and the real-time budget", _add, _run)]

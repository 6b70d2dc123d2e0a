"""What every bench measurement shares: the rate and block, the C driver module, a timed kernel, the context.

Kernel times are taken in C (csrc/bench/drive.c calls the render function
for a run of blocks and reads the thread's CPU clock), so Python's call
overhead enters only the measurement that is about it.  Rate in Hz, blocks
in frames, times in s.
"""

from __future__ import annotations

import copy
import os
import time
from typing import Callable

import numpy as np

from sheafsynth.engine.backends.c.build import CompiledModule, compile_module
from sheafsynth.engine.errors import SheafsynthError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.locations import CSRC_DIR
from sheafsynth.host import bank

__all__ = ["RATE", "BLOCK", "cpu_clock", "BENCH_DIR", "PLAIN_PRESET", "Skip", "Kernel", "BenchContext",
           "bench_module", "preset_raw"]

RATE = 48000        # Hz
BLOCK = 256         # frames per kernel call
#: Timings of work done in this thread use the thread's CPU time (as the C
#: driver does): on a shared machine it leaves out the time other programs
#: held the core.  Compile and load times are wall-clock (the compiler is
#: another process).
cpu_clock = time.thread_time
BENCH_DIR = CSRC_DIR / "bench"
PLAIN_PRESET = "porch-pluck"

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


def bench_module() -> CompiledModule:
    """The C driver and hand-written loops of csrc/bench (stencil_hand.c once per state type), compiled."""
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


def preset_raw(name: str) -> dict:
    """A deep copy of the JSON of a factory/user preset or file."""
    return copy.deepcopy(bank.load(name).raw)


class Kernel:
    """An Instrument plus what the C driver needs to time it."""

    def __init__(self, bench: "BenchContext", raw, *, polyphony: int | None = None, limiter: bool = True,
                 max_block: int = BLOCK):
        self.b = bench
        self.inst = Instrument(raw, rate=RATE, max_block=max_block, polyphony=polyphony, limiter=limiter)
        h = self.inst.handle()              # the kernel reached only through the instrument's handle
        self.fn, self.state = h.render_fn, h.state
        self.kffi, self.klib = h.module.ffi, h.module.lib
        self.out = np.zeros(max_block, dtype=np.float32)

    def events(self, evs: list[tuple]):
        """An ss_event array of (offset samples, type, a, b, value) tuples, in the kernel's ffi."""
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
        lib = self.klib
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
        """Voices sounding now."""
        return self.inst.counters["voices_active"]


class BenchContext:
    """The state the measurements share: mode, repetitions, the report being filled, the C driver, kernels."""

    def __init__(self, quick: bool, progress: Callable[[str], None]):
        self.quick = quick
        self.say = progress
        self.reps = 3 if quick else 7
        self.report: dict = {}
        self.details: dict = {}
        self.notes: dict = {}
        mod = bench_module()
        self.ffi, self.lib = mod.ffi, mod.lib
        self._kernels: dict = {}

    # -- bookkeeping ------------------------------------------------------
    def item(self, key: str, fn: Callable[[], None]) -> None:
        """Run one measurement; a Skip or a failure leaves its value null and says why in ``notes``."""
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

    def kernel(self, name: str, raw, **kw) -> Kernel:
        """The kernel of preset ``raw`` kept under ``name`` (built once per name and options)."""
        key = (name, tuple(sorted(kw.items())))
        if key not in self._kernels:
            self._kernels[key] = Kernel(self, raw, **kw)
        return self._kernels[key]

    def drop_kernels(self) -> None:
        """Forget the kept kernels (frees their memory)."""
        self._kernels.clear()

    def plain(self) -> Kernel:
        """The plain preset at its own polyphony, silent, parameters at their defaults, limiter on."""
        k = self.kernel(PLAIN_PRESET + ":default", preset_raw(PLAIN_PRESET))
        k.reinit()
        return k

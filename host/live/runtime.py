"""Python side of the C live runtime (csrc/host_rt.c).

The runtime is one small cffi module, built once through engine.backends.c.build
(tag "host") and shared by every stream.  :class:`HostRuntime` owns one
``ss_host``: two kernel slots with a click-free switch, the timestamped
event ring the MIDI thread writes, the record ring and the counters.

Thread rules (the C side relies on them):
  * one thread pushes events (``push``/``push_at``);
  * one thread reads the record ring (``read_record``);
  * everything else runs on one control thread (the main thread).
Build (``load_runtime``) in the main thread before any stream starts.

Every C status code of the runtime and the stall probe goes through
:func:`check_status` (pointers through :func:`check_created`): one place
turns them into AudioError (or a subclass) naming what failed.  Event
codes are the IR's (``sheafsynth.engine.ir.voicing``; csrc/ss_abi.h
carries the same to C).
"""

from __future__ import annotations

import dataclasses
import threading
import time
from typing import Any, NamedTuple

import numpy as np

from sheafsynth.engine.backends.c.abi import read_cdef_part
from sheafsynth.engine.backends.c.build import CompiledModule, compile_module
from sheafsynth.engine.errors import AudioError

__all__ = [
    "HostRuntime",
    "HostCounters",
    "SlowCallback",
    "KernelSwitchError",
    "load_runtime",
    "check_status",
    "check_created",
]

_HEADERS = ("host_rt.h", "stall_probe.h")
_SOURCE = '#include "host_rt.c"\n#include "stall_probe.c"\n'

# What each error status (csrc/host_rt.h, csrc/stall_probe.h) means; the values come from the compiled module.
_STATUS_TEXT = {
    "SS_HOST_ERR_BUSY": "a kernel switch is still pending",
    "SS_HOST_ERR_FULL": "the event ring is full",
    "SS_HOST_ERR_ARG": "bad argument",
    "SS_HOST_ERR_RETRY": "the snapshot raced the audio thread",
    "SS_PROBE_ERR_ARG": "bad argument to the stall probe",
    "SS_PROBE_ERR_THREAD": "no probe thread could be started",
}

_runtime_lock = threading.Lock()
_runtime: list[CompiledModule] = []


class KernelSwitchError(AudioError):
    """A kernel switch could not be handed to the audio thread."""


def check_status(lib: Any, code: int, what: str, error: type[AudioError] = AudioError) -> int:
    """The one choke point for C status codes: ``code`` when it is >= 0, else ``error``
    saying ``what`` failed and why (the SS_HOST_ERR_* meaning, or the raw code)."""
    code = int(code)
    if code >= 0:
        return code
    for name, text in _STATUS_TEXT.items():
        if int(getattr(lib, name)) == code:
            raise error(f"{what}: {text} ({name})")
    raise error(f"{what}: failed with status {code}")


def check_created(ffi: Any, ptr: Any, what: str, error: type[AudioError] = AudioError) -> Any:
    """``ptr`` from a C constructor, or ``error(what)`` when it is NULL."""
    if ptr == ffi.NULL:
        raise error(what)
    return ptr


def _cdef() -> str:
    return "".join(read_cdef_part(name) for name in _HEADERS)


def load_runtime(*, strict: bool = False) -> CompiledModule:
    """Build (or load from the cache) the host runtime module.

    Call from the main thread before any stream starts.  ``strict`` compiles
    with -Wall -Wextra -Werror (tests do).
    """
    with _runtime_lock:
        if _runtime and not strict:
            return _runtime[0]
        mod = compile_module(_cdef(), _SOURCE, tag="host", strict=strict)
        if not strict:
            _runtime.append(mod)
        return mod


class SlowCallback(NamedTuple):
    """One callback that took longer than half a block period.

    ``dur_ns`` is wall-clock time; ``cpu_ns`` the time the audio thread was on
    its CPU meanwhile (None if the clock could not be read).  Where the kernel
    leaves steal time out of thread CPU time (a paravirtual guest, as CI's VM
    is) a callback far longer than its CPU time was held off the CPU -- by the
    hypervisor or a higher-priority thread -- rather than slow itself.
    """

    start_ns: int
    dur_ns: int
    cpu_ns: int | None


@dataclasses.dataclass(frozen=True)
class HostCounters:
    """A consistent snapshot of the runtime's counters.

    Times in ns; ``hist`` counts callbacks by duration / block period in
    bins of ``hist_bin_width`` periods (the last bin also holds longer ones);
    ``cpu_hist`` the same for the time the audio thread was on its CPU in
    each callback.  ``cb_blocked`` counts callbacks in which the audio thread
    blocked (gave up its CPU: it must stay 0); ``cb_preempted`` those in
    which the system switched it out for another thread.
    """

    callbacks: int
    frames: int
    underflows: int
    overflows: int
    priming: int
    nonfinite: int
    clipped: int
    kernel_errors: int
    events_pushed: int
    events_dropped: int
    events_delivered: int
    events_late: int
    events_unrouted: int
    record_frames: int
    record_dropped: int
    switches: int
    fade_timeouts: int
    generation: int
    retired: int
    last_start_ns: int
    cb_last_ns: int
    cb_worst_ns: int
    cb_cpu_worst_ns: int
    cb_blocked: int
    cb_preempted: int
    fading_active: bool
    last_frames: int
    peak: float
    peak_hold: float
    hist: tuple
    hist_bin_width: float
    cpu_hist: tuple

    @property
    def xruns(self) -> int:
        """Output underflows plus overflows reported by the device."""
        return self.underflows + self.overflows

    def load_percentile(self, q: float = 99.9, *, on_cpu: bool = False) -> float:
        """Callback time at percentile ``q`` as a fraction of the block period.

        Wall-clock time, or with ``on_cpu`` the time the audio thread spent
        on its CPU.  Upper edge of the histogram bin; NaN before the first
        callback.
        """
        if not 0.0 <= q <= 100.0:
            raise ValueError(f"percentile q={q} must be within 0..100")
        counts = np.asarray(self.cpu_hist if on_cpu else self.hist, dtype=np.float64)
        total = counts.sum()
        if total == 0:
            return float("nan")
        idx = int(np.searchsorted(np.cumsum(counts), total * q / 100.0, side="left"))
        idx = min(idx, len(counts) - 1)
        return (idx + 1) * self.hist_bin_width


_COUNTER_FIELDS = [f.name for f in dataclasses.fields(HostCounters)
                   if f.name not in ("hist", "hist_bin_width", "cpu_hist")]


def _address(ffi, obj: Any) -> int:
    if isinstance(obj, int):
        return obj
    return int(ffi.cast("uintptr_t", obj))


class HostRuntime:
    """One ss_host: kernel slots, event ring, record ring and counters.

    rate in Hz; max_block = most frames per kernel render (longer device
    blocks are split); channels 1..8 (the mono mix goes to every channel);
    event_capacity in events; record_seconds sizes the record ring.
    """

    def __init__(self, rate: float, max_block: int, channels: int = 2, *,
                 event_capacity: int = 4096, record_seconds: float = 4.0):
        if not isinstance(channels, int) or not 1 <= channels <= 8:
            raise AudioError(f"channels={channels!r}: must be an integer 1..8")
        if not isinstance(max_block, int) or not 1 <= max_block <= 1 << 20:
            raise AudioError(f"max_block={max_block!r}: must be an integer 1..1048576 frames")
        if not (isinstance(rate, (int, float)) and 0 < rate <= 1e7):
            raise AudioError(f"rate={rate!r}: must be a positive sample rate in Hz")
        if not (0 < record_seconds <= 600):
            raise AudioError(f"record_seconds={record_seconds!r}: must be within (0, 600] s")
        if not (isinstance(event_capacity, int) and 1 <= event_capacity <= 1 << 20):
            raise AudioError(f"event_capacity={event_capacity!r}: must be an integer 1..1048576")
        self._mod = load_runtime()
        self.ffi = self._mod.ffi
        self.lib = self._mod.lib
        rec_frames = int(record_seconds * rate)
        ptr = check_created(self.ffi, self.lib.ss_host_create(float(rate), max_block, channels, event_capacity,
                                                              rec_frames),
                            "could not create the audio runtime (out of memory?)")
        self._ptr = self.ffi.gc(ptr, self.lib.ss_host_destroy)
        self.rate = float(rate)
        self.max_block = max_block
        self.channels = channels
        self._keep: dict[int, Any] = {}
        self._snap = self.ffi.new("ss_host_counters *")
        self._bin_width = self.lib.SS_HOST_HIST_SPAN / self.lib.SS_HOST_HIST_BINS

    # -- addresses for the audio backend ---------------------------------
    @property
    def address(self) -> int:
        """Address of the ss_host (the callback's userdata)."""
        return int(self.ffi.cast("uintptr_t", self._ptr))

    @property
    def callback_address(self) -> int:
        """Address of ss_host_callback, a PortAudio stream callback."""
        return int(self.ffi.cast("uintptr_t", self.ffi.addressof(self.lib, "ss_host_callback")))

    # -- configuration -----------------------------------------------------
    def set_rate(self, rate: float) -> None:
        """Set the sample rate in Hz; only while no stream runs."""
        check_status(self.lib, self.lib.ss_host_set_rate(self._ptr, float(rate)),
                     f"rate={rate!r}: must be a positive sample rate in Hz")
        self.rate = float(rate)

    def set_ceiling(self, ceiling: float) -> None:
        """Safety clip level, linear full scale (0 < ceiling <= 4)."""
        check_status(self.lib, self.lib.ss_host_set_ceiling(self._ptr, float(ceiling)),
                     f"ceiling={ceiling!r}: must be within (0, 4] (linear)")

    def set_fade(self, timeout_s: float, ramp_s: float) -> None:
        """A fading kernel rings at most timeout_s seconds, then ramps out in ramp_s s."""
        check_status(self.lib, self.lib.ss_host_set_fade(self._ptr, float(timeout_s), float(ramp_s)),
                     f"fade timeout={timeout_s!r} s, ramp={ramp_s!r} s: need 0 <= timeout <= 3600 and 0 < ramp <= 10")

    def set_recording(self, on: bool) -> None:
        """Start or stop copying the output into the record ring."""
        self.lib.ss_host_set_recording(self._ptr, 1 if on else 0)

    def reset_peak(self) -> None:
        """Restart peak_hold at the next callback."""
        self.lib.ss_host_reset_peak(self._ptr)

    # -- kernels -------------------------------------------------------------
    def set_kernel(self, render: Any, state: Any, keep: Any = None, *,
                   wait_s: float = 1.0) -> int:
        """Hand a kernel to the audio thread; returns its generation.

        render: ss_render_fn (cffi function pointer or address); state: its
        state pointer (or address); render=None/0 removes the kernel (the
        old one fades out).  ``keep`` (default: render and state) is held
        until the audio thread no longer uses the kernel.  Waits up to
        wait_s seconds for a previous switch to be taken.
        """
        r = 0 if render is None else _address(self.ffi, render)
        s = 0 if state is None else _address(self.ffi, state)
        if r and not s:
            raise KernelSwitchError("set_kernel: a kernel needs a state pointer")
        deadline = time.monotonic() + wait_s
        while True:
            gen = self.lib.ss_host_set_kernel(self._ptr, r, s)
            if gen != self.lib.SS_HOST_ERR_BUSY:
                break
            if time.monotonic() >= deadline:
                raise KernelSwitchError(
                    f"the previous kernel switch was not taken within {wait_s} s: "
                    "is the audio stream running?")
            time.sleep(0.002)
        gen = check_status(self.lib, gen, "set_kernel refused the kernel", KernelSwitchError)
        self._keep[int(gen)] = keep if keep is not None else (render, state)
        self.collect()
        return int(gen)

    def collect(self) -> None:
        """Drop references to kernels the audio thread has retired."""
        retired = self.counters().retired
        for gen in [g for g in self._keep if g <= retired]:
            del self._keep[gen]

    def release_all_kernels(self) -> None:
        """Forget every kernel; only after the stream has stopped."""
        self._keep.clear()

    # -- events --------------------------------------------------------------
    def push(self, type_: int, a: int = 0, b: int = 0, value: float = 0.0) -> int | None:
        """Queue one event stamped now; returns the stamp in ns, None if the ring is full.

        Only one thread may push.  Does not block.
        """
        r = self.lib.ss_host_push(self._ptr, type_, a, b, value)
        return None if r == self.lib.SS_HOST_ERR_FULL else check_status(self.lib, r, "push event")

    def push_at(self, stamp_ns: int, type_: int, a: int = 0, b: int = 0,
                value: float = 0.0) -> int | None:
        """Queue one event with an explicit CLOCK_MONOTONIC stamp (ns)."""
        r = self.lib.ss_host_push_at(self._ptr, int(stamp_ns), type_, a, b, value)
        return None if r == self.lib.SS_HOST_ERR_FULL else check_status(self.lib, r, "push event")

    def now_ns(self) -> int:
        """CLOCK_MONOTONIC in ns, the clock of event stamps."""
        return int(self.lib.ss_host_now_ns())

    # -- recording and counters ------------------------------------------------
    def read_record(self, max_frames: int = 1 << 16, out: np.ndarray | None = None) -> np.ndarray:
        """Drain up to max_frames recorded frames: float32 array (frames, channels).

        With ``out`` (float32, C-contiguous, shape (n, channels)) the frames go
        there and a view of it is returned: a recorder that reuses one buffer
        allocates nothing per call.
        """
        if out is None:
            out = np.empty((max_frames, self.channels), dtype=np.float32)
        elif out.dtype != np.float32 or out.ndim != 2 or out.shape[1] != self.channels \
                or not out.flags.c_contiguous:
            raise ValueError(f"read_record: out must be C-contiguous float32 (n, {self.channels})")
        max_frames = min(int(max_frames), out.shape[0])
        n = self.lib.ss_host_read_record(self._ptr, self.ffi.from_buffer("float[]", out), max_frames)
        return out[:n]

    def counters(self) -> HostCounters:
        """A consistent snapshot of the counters."""
        for _ in range(100):
            rc = self.lib.ss_host_snapshot(self._ptr, self._snap)
            if rc != self.lib.SS_HOST_ERR_RETRY:
                check_status(self.lib, rc, "read the audio counters")
                break
            time.sleep(0.0005)
        else:
            raise AudioError("could not read the audio counters (audio thread too busy)")
        c = self._snap
        values = {name: getattr(c, name) for name in _COUNTER_FIELDS}
        values["fading_active"] = bool(values["fading_active"])
        return HostCounters(hist=tuple(c.hist), hist_bin_width=self._bin_width, cpu_hist=tuple(c.cpu_hist),
                            **values)

    def xrun_times(self) -> list[int]:
        """CLOCK_MONOTONIC start times (ns) of the callbacks flagged with an xrun (the first 1024)."""
        cap = int(self.lib.SS_HOST_XRUN_LOG)
        buf = self.ffi.new("int64_t[]", cap)
        n = check_status(self.lib, self.lib.ss_host_xrun_times(self._ptr, buf, cap), "read the xrun log")
        return [int(buf[i]) for i in range(n)]

    def slow_callbacks(self) -> list[SlowCallback]:
        """The callbacks longer than half a block period (the first 1024), oldest first."""
        cap = int(self.lib.SS_HOST_SLOW_LOG)
        start = self.ffi.new("int64_t[]", cap)
        dur = self.ffi.new("int64_t[]", cap)
        cpu = self.ffi.new("int64_t[]", cap)
        n = check_status(self.lib, self.lib.ss_host_slow_callbacks(self._ptr, start, dur, cpu, cap),
                         "read the slow-callback log")
        return [SlowCallback(int(start[i]), int(dur[i]), int(cpu[i]) if cpu[i] >= 0 else None)
                for i in range(n)]

    def process(self, frames: int, now_ns: int, flags: int = 0) -> np.ndarray:
        """Run one callback by hand at CLOCK_MONOTONIC time now_ns.

        For tests and offline use only, never while a stream runs (the audio
        side is single-threaded).  Returns float32 (frames, channels).
        """
        out = np.zeros((frames, self.channels), dtype=np.float32)
        self.lib.ss_host_process(self._ptr, self.ffi.from_buffer("float[]", out), frames,
                                 int(now_ns), flags)
        return out

"""Live audio output: a PortAudio stream whose callback is C.

The stream callback is ``ss_host_callback`` from the C runtime
(csrc/host_rt.c, wrapped by host.live.runtime): no Python runs on the audio
thread.  sounddevice is used for opening the stream only, through its
``_StreamBase`` with ``wrap_callback=None``, which accepts a cffi function
pointer and a ``userdata`` pointer.  That class is private, so the version
range is pinned in pyproject.toml and a live test covers it.

sounddevice has its own ``ffi``; a cdata of ours cannot be handed to it as
it is, so the callback and the runtime are passed as integer addresses cast
into sounddevice's ffi (``PaStreamCallback *`` and ``void *``).

Every failure to open or run the device raises AudioError (the CLI maps it
to exit status 3).  sounddevice is imported lazily, so importing this
module works on a machine without PortAudio.
"""

from __future__ import annotations

import dataclasses
import threading
from pathlib import Path
from typing import Any

import numpy as np

from sheafsynth.engine.errors import AudioError
from sheafsynth.host.live.runtime import HostCounters, HostRuntime, KernelSwitchError

__all__ = [
    "AudioDevice",
    "AudioOutputBase",
    "AudioOutput",
    "Recorder",
    "RecorderError",
    "KernelSwitchError",
    "list_audio_devices",
    "rescan_devices",
    "sounddevice_module",
    "OutputDevice",
    "resolve_output_device",
    "check_output_settings",
]


class RecorderError(AudioError):
    """The recording file could not be written."""


def sounddevice_module() -> Any:
    """Import sounddevice, turning a missing PortAudio into AudioError.

    Lazy on purpose: importing sounddevice loads PortAudio, which costs
    start-up time and fails on machines without it.
    """
    try:
        import sounddevice
    except OSError as exc:  # PortAudio shared library not found
        raise AudioError(f"PortAudio is not available ({exc}); "
                         "install it, e.g. apt-get install libportaudio2") from None
    return sounddevice


def rescan_devices() -> None:
    """Re-initialise PortAudio so that it sees servers started since import.

    PortAudio lists host APIs (such as a JACK server) only when it starts.
    Call only while no stream is open.
    """
    sd = sounddevice_module()
    try:
        sd._terminate()
        sd._initialize()
    except sd.PortAudioError as exc:
        raise AudioError(f"could not restart PortAudio: {exc}") from None


@dataclasses.dataclass(frozen=True)
class AudioDevice:
    """One output-capable device; latencies in s, rate in Hz."""

    index: int
    name: str
    hostapi: str
    max_output_channels: int
    default_samplerate: float
    default_low_latency: float
    is_default: bool


def list_audio_devices() -> list[AudioDevice]:
    """Every device with at least one output channel."""
    sd = sounddevice_module()
    try:
        devices = sd.query_devices()
        hostapis = sd.query_hostapis()
        try:
            default_out = sd.default.device[1]
        except (TypeError, IndexError):
            default_out = -1
    except sd.PortAudioError as exc:
        raise AudioError(f"could not list audio devices: {exc}") from None
    out = []
    for d in devices:
        if d["max_output_channels"] < 1:
            continue
        out.append(AudioDevice(
            index=d["index"],
            name=d["name"],
            hostapi=hostapis[d["hostapi"]]["name"],
            max_output_channels=d["max_output_channels"],
            default_samplerate=float(d["default_samplerate"]),
            default_low_latency=float(d["default_low_output_latency"]),
            is_default=d["index"] == default_out,
        ))
    return out


@dataclasses.dataclass(frozen=True)
class OutputDevice:
    """The audio output ``--device`` chose: PortAudio index, host API name, its own rate (Hz), its name."""

    index: int
    hostapi: str
    default_rate: float
    name: str


def resolve_output_device(device: str | None) -> OutputDevice:
    """The output device an index or part of a name picks (None: the default); AudioError if none matches."""
    sd = sounddevice_module()
    spec: Any = device
    if isinstance(device, str) and device.strip().isdigit():
        spec = int(device)
    try:
        info = sd.query_devices(spec, kind="output")
        api = sd.query_hostapis(info["hostapi"])["name"]
    except (ValueError, sd.PortAudioError) as exc:
        what = "no default audio output" if device is None else f"--device {device!r}"
        raise AudioError(f"{what}: {str(exc).splitlines()[0]} (see `sheafsynth ports`)") from None
    return OutputDevice(int(info["index"]), str(api), float(info["default_samplerate"]), str(info["name"]))


def check_output_settings(index: int, rate: float, device_rate: float) -> None:
    """AudioError now if device ``index`` cannot run at ``rate`` Hz in stereo float (``device_rate``: its own)."""
    sd = sounddevice_module()
    try:
        sd.check_output_settings(device=index, samplerate=rate, channels=2, dtype="float32")
    except (ValueError, sd.PortAudioError) as exc:
        hint = f" (the device's own rate is {device_rate:g} Hz: try --rate {device_rate:g})" \
            if abs(device_rate - rate) > 1e-6 else ""
        raise AudioError(f"the audio output cannot play {rate:g} Hz stereo: "
                         f"{str(exc).splitlines()[0]}{hint}") from None


class Recorder:
    """Non-real-time thread that drains the runtime's record ring to a sound file.

    Polls every ``poll_s`` seconds; the ring must hold more than that
    (HostRuntime's record_seconds).  Format: WAV, 32-bit float by default.
    """

    def __init__(self, runtime: HostRuntime, path: str | Path, *,
                 subtype: str = "FLOAT", poll_s: float = 0.01):
        self._rt = runtime
        self.path = Path(path)
        self._subtype = subtype
        self._poll = poll_s
        self._buf: np.ndarray | None = None     # reused: no allocation per drain
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._file: Any = None                 # soundfile.SoundFile while recording
        self._error: BaseException | None = None
        self.frames_written = 0

    def start(self) -> None:
        """Open the file and start copying."""
        import soundfile  # lazy: loads libsndfile, needed only when recording (start-up time)

        try:
            self._file = soundfile.SoundFile(str(self.path), mode="w",
                                             samplerate=int(round(self._rt.rate)),
                                             channels=self._rt.channels,
                                             format="WAV", subtype=self._subtype)
        except (RuntimeError, OSError, ValueError) as exc:
            raise RecorderError(f"cannot write recording {str(self.path)!r}: {exc}") from None
        while len(self._rt.read_record()):  # discard anything left from before
            pass
        self._stop.clear()
        self._thread = threading.Thread(target=self._run, name="sheafsynth-recorder",
                                        daemon=True)
        self._thread.start()
        self._rt.set_recording(True)

    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                if not self._drain():
                    self._stop.wait(self._poll)
            self._drain_all()
        except BaseException as exc:  # kept and raised by stop()
            self._error = exc

    def _drain(self) -> int:
        if self._buf is None:
            self._buf = np.empty((1 << 14, self._rt.channels), dtype=np.float32)
        block = self._rt.read_record(out=self._buf)
        if len(block):
            self._file.write(block)
            self.frames_written += len(block)
        return len(block)

    def _drain_all(self) -> None:
        while self._drain():
            pass

    def stop(self) -> int:
        """Stop, flush and close; returns the number of frames written."""
        self._rt.set_recording(False)
        if self._thread is not None:
            self._stop.set()
            self._thread.join()
            self._thread = None
        if self._file is not None:
            self._file.close()
            self._file = None
        if self._error is not None:
            err, self._error = self._error, None
            raise RecorderError(f"recording to {str(self.path)!r} failed: {err}") from None
        return self.frames_written


class AudioOutputBase:
    """A live output around one HostRuntime: ``open()``/``close()`` are
    public; a backend implements ``_open()``/``_close()`` (start and stop
    whatever calls the runtime's callback).

    rate in Hz, blocksize in frames (0 = let the device choose), max_block
    = most frames per kernel render call (kernels are prepared with it).
    Build kernels before ``open()`` in the main thread.
    """

    def __init__(self, *, rate: float = 48000, blocksize: int = 128, channels: int = 2,
                 max_block: int | None = None, record_seconds: float = 4.0,
                 event_capacity: int = 4096):
        if not isinstance(blocksize, int) or blocksize < 0:
            raise AudioError(f"blocksize={blocksize!r}: must be a whole number of frames >= 0")
        if max_block is None:
            max_block = blocksize if blocksize > 0 else 1024
        self.rate = float(rate)
        self.blocksize = blocksize
        self.channels = channels
        self.max_block = max_block
        self.runtime = HostRuntime(self.rate, max_block, channels,
                                   event_capacity=event_capacity, record_seconds=record_seconds)
        self._recorder: Recorder | None = None
        self._is_open = False

    # -- template methods ----------------------------------------------------
    def open(self) -> "AudioOutputBase":
        """Open and start the output; raises AudioError when it cannot."""
        if self._is_open:
            raise AudioError("audio output is already open")
        self._open()
        self._is_open = True
        return self

    def close(self) -> None:
        """Stop the output, finish any recording, release retired kernels."""
        if not self._is_open:
            return
        try:
            self._close()
        finally:
            self._is_open = False
            if self._recorder is not None:
                self.stop_recording()
            self.runtime.release_all_kernels()

    def _open(self) -> None:
        raise NotImplementedError

    def _close(self) -> None:
        raise NotImplementedError

    @property
    def is_open(self) -> bool:
        """True while the stream is open."""
        return self._is_open

    def __enter__(self) -> "AudioOutputBase":
        return self.open()

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # -- conveniences forwarding to the runtime -------------------------------
    def set_kernel(self, render: Any, state: Any, keep: Any = None) -> int:
        """Switch to a kernel (see HostRuntime.set_kernel); returns its generation."""
        return self.runtime.set_kernel(render, state, keep)

    def push(self, type_: int, a: int = 0, b: int = 0, value: float = 0.0) -> int | None:
        """Queue one event (one producer thread only); stamp in ns or None if full."""
        return self.runtime.push(type_, a, b, value)

    def counters(self) -> HostCounters:
        """Snapshot of the runtime counters."""
        return self.runtime.counters()

    def start_recording(self, path: str | Path, *, subtype: str = "FLOAT") -> Recorder:
        """Record the output to a WAV file until stop_recording()."""
        if self._recorder is not None:
            raise RecorderError("already recording")
        rec = Recorder(self.runtime, path, subtype=subtype)
        rec.start()
        self._recorder = rec
        return rec

    def stop_recording(self) -> int:
        """Finish the recording; returns frames written (0 if none was running)."""
        rec, self._recorder = self._recorder, None
        return rec.stop() if rec is not None else 0


class AudioOutput(AudioOutputBase):
    """Output through a PortAudio stream (sounddevice) with the C callback.

    device: index, name substring or None for the default output.
    latency: s, or 'low'/'high', or None for the device default.
    """

    def __init__(self, *, device: int | str | None = None, latency: float | str | None = None,
                 **kwargs: Any):
        super().__init__(**kwargs)
        self.device = device
        self.latency = latency
        self._stream = None

    def _describe(self) -> str:
        dev = "default device" if self.device is None else f"device {self.device!r}"
        return f"{dev}, {self.rate:g} Hz, block {self.blocksize}, {self.channels} channel(s)"

    def _open(self) -> None:
        sd = sounddevice_module()
        rt = self.runtime
        # Our cdata belongs to another ffi: pass plain addresses, cast by sounddevice's ffi.
        callback = sd._ffi.cast("PaStreamCallback *", rt.callback_address)
        userdata = sd._ffi.cast("void *", rt.address)
        try:
            stream = sd._StreamBase(kind="output", samplerate=self.rate, blocksize=self.blocksize,
                                    device=self.device, channels=self.channels, dtype="float32",
                                    latency=self.latency, callback=callback, userdata=userdata,
                                    wrap_callback=None)
        except (sd.PortAudioError, ValueError, TypeError) as exc:
            raise AudioError(f"cannot open audio output ({self._describe()}): {exc}") from None
        if abs(stream.samplerate - self.rate) > 1e-6:
            rt.set_rate(stream.samplerate)
            self.rate = float(stream.samplerate)
        try:
            stream.start()
        except sd.PortAudioError as exc:
            stream.close(ignore_errors=True)
            raise AudioError(f"cannot start audio output ({self._describe()}): {exc}") from None
        self._stream = stream

    def _close(self) -> None:
        stream, self._stream = self._stream, None
        if stream is None:
            return
        sd = sounddevice_module()
        if not stream.active:
            # The stream ended by itself: the device (or the JACK server) went away.
            # Stopping or closing it -- and PortAudio's own clean-up at exit -- would
            # then wait forever for a server that is gone, so the stream is left alone.
            import atexit  # stdlib; needed only on this rare path

            handler = getattr(sd, "_exit_handler", None)
            if handler is not None:
                atexit.unregister(handler)
            raise AudioError(f"the audio device stopped while playing ({self._describe()})")
        try:
            stream.stop(ignore_errors=False)
        except sd.PortAudioError as exc:
            stream.close(ignore_errors=True)
            raise AudioError(f"error stopping audio output: {exc}") from None
        stream.close(ignore_errors=True)

    @property
    def stream_latency(self) -> float | None:
        """Output latency reported by PortAudio, s."""
        return None if self._stream is None else float(self._stream.latency)

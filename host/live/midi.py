"""MIDI input for the live host: ports through python-rtmidi, messages through mido.

A port is read by polling (``MidiInputBase.poll``) from the one MIDI thread
of the live host; no Python callback is registered with the MIDI library,
so with the JACK MIDI API no Python ever runs inside the JACK process
thread.  The port library keeps its own queue of complete messages with
the time between them; :class:`ArrivalClock` turns those gaps into
CLOCK_MONOTONIC arrival stamps (ns), the clock the C event ring uses, so a
message keeps its arrival time even when it is picked up a little later.

Port kinds (template methods: ``open``/``close``/``poll``/``check`` are
public, a backend implements ``_open``/``_close``/``_read``/``_sources``):

* a hardware (or another program's) port found by a name substring; when it
  disappears the input reports ``state == "lost"`` and ``check()``
  reconnects as soon as a port of that name is listed again;
* a virtual port of our own name that other programs connect to.

Parsing: ``parse`` returns a mido message, or None for malformed bytes;
the caller counts those.  MIDI clock and active sensing are filtered at the
port (they carry no notes or controls); system exclusive passes through
and is counted as ignored by the translator.

Failures of the MIDI system raise :class:`MidiError` (an AudioError: the
CLI exits with status 3); a name that matches no port raises InputError
(status 2).
"""

from __future__ import annotations

import os
import time
from typing import Callable

from sheafsynth.engine.errors import AudioError, InputError

__all__ = [
    "open_midi_input",
    "MidiError",
    "ArrivalClock",
    "MidiInputBase",
    "RtMidiInput",
    "API_NAMES",
    "api_id",
    "default_api",
    "available_apis",
    "list_midi_inputs",
    "parse",
    "find_port",
]

# Our names for the port libraries' interfaces.
API_NAMES = ("alsa", "jack", "coremidi", "winmm")

QUEUE_LIMIT = 8192          # messages the port library may queue between polls


class MidiError(AudioError):
    """The MIDI system or a MIDI port could not be opened or failed."""


def _rtmidi():
    os.environ.setdefault("JACK_NO_START_SERVER", "1")   # never start a JACK server behind the user's back
    try:
        import rtmidi  # lazy: loads the MIDI system's library (start-up time; `render` never needs it)
    except ImportError as exc:  # pragma: no cover - a dependency of the package
        raise MidiError(f"python-rtmidi is not installed ({exc})") from None
    return rtmidi


def api_id(name: str | None) -> int:
    """The python-rtmidi API constant for one of API_NAMES (None: the platform default)."""
    rtmidi = _rtmidi()
    if name is None:
        return rtmidi.API_UNSPECIFIED
    table = {"alsa": rtmidi.API_LINUX_ALSA, "jack": rtmidi.API_UNIX_JACK,
             "coremidi": rtmidi.API_MACOSX_CORE, "winmm": rtmidi.API_WINDOWS_MM}
    if name not in table:
        raise InputError(f"MIDI API {name!r}: expected one of {', '.join(API_NAMES)}")
    if table[name] not in rtmidi.get_compiled_api():
        raise MidiError(f"MIDI API {name!r} is not built into python-rtmidi here "
                        f"(available: {', '.join(available_apis()) or 'none'})")
    return table[name]


def available_apis() -> list[str]:
    """Our names of the MIDI APIs python-rtmidi was built with."""
    rtmidi = _rtmidi()
    back = {rtmidi.API_LINUX_ALSA: "alsa", rtmidi.API_UNIX_JACK: "jack",
            rtmidi.API_MACOSX_CORE: "coremidi", rtmidi.API_WINDOWS_MM: "winmm"}
    return [back[a] for a in rtmidi.get_compiled_api() if a in back]


def default_api(audio_hostapi: str | None) -> str | None:
    """MIDI API that goes with an audio host API: JACK MIDI with JACK audio, else the platform default."""
    if audio_hostapi and "jack" in audio_hostapi.lower() and "jack" in available_apis():
        return "jack"
    return None


def _open_rt(api: str | None, client: str):
    rtmidi = _rtmidi()
    rtapi = api_id(api)
    try:
        return rtmidi.MidiIn(rtapi=rtapi, name=client, queue_size_limit=QUEUE_LIMIT)
    except (RuntimeError, rtmidi.RtMidiError) as exc:
        raise MidiError(f"cannot open the MIDI system ({api or 'default API'}): "
                        f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}") from None


def list_midi_inputs(api: str | None = None) -> list[str]:
    """Names of the MIDI sources (ports we can read from) the API lists."""
    mi = _open_rt(api, "sheafsynth-list")
    try:
        return list(mi.get_ports())
    except Exception as exc:  # the library raises its own error types
        raise MidiError(f"cannot list MIDI inputs: {exc}") from None
    finally:
        mi.delete()


def find_port(names: list[str], pattern: str) -> int | None:
    """Index of the first name containing ``pattern`` (case-insensitive), or None."""
    p = pattern.lower()
    for i, n in enumerate(names):
        if p in n.lower():
            return i
    return None


def parse(data) -> "object | None":
    """A mido message from one complete MIDI message's bytes, or None if malformed."""
    import mido  # lazy (start-up time); cached by Python after the first message

    data = list(data)
    try:
        msg = mido.Message.from_bytes(data)
    except (ValueError, TypeError, IndexError, KeyError):
        return None
    # mido skips stray trailing bytes; a complete message has none
    return msg if msg.bytes() == data else None


class ArrivalClock:
    """CLOCK_MONOTONIC arrival stamps from the port library's inter-message gaps.

    ``stamp(gap_s, now_ns)``: a message picked up at ``now_ns`` that arrived
    ``gap_s`` seconds after the previous one.  The estimate is the earlier of
    (previous arrival + gap) and the pick-up time, so it never lies in the
    future and tightens whenever a message is picked up promptly.  ``reset``
    after a (re)connect, when the library's gaps restart.
    """

    def __init__(self) -> None:
        self._last: int | None = None

    def reset(self) -> None:
        """Forget the previous arrival (the next one starts a new burst)."""
        self._last = None

    def stamp(self, gap_s: float, now_ns: int) -> int:
        """CLOCK_MONOTONIC ns of a message that came ``gap_s`` s after the previous one, read at ``now_ns``."""
        if self._last is None or not (gap_s >= 0.0):
            est = now_ns
        else:
            est = min(self._last + int(round(gap_s * 1e9)), now_ns)
            est = max(est, self._last)
        self._last = est
        return est


class MidiInputBase:
    """One MIDI input.  Call everything after ``open`` from one thread.

    ``state``: "connected", "virtual" (our own port, always usable),
    "lost" (the source disappeared; audio goes on) or "closed".
    ``description`` names the port for the status line.
    """

    def __init__(self, *, name: str | None = None, virtual: str | None = None,
                 clock: Callable[[], int] | None = None):
        if (name is None) == (virtual is None):
            raise InputError("a MIDI input needs either a port name to find or a virtual port name")
        if virtual is not None and not virtual.strip():
            raise InputError("--virtual-midi: the port name is empty")
        self.pattern = name or ""       # empty with a virtual port (never searched then)
        self.virtual = virtual
        self.port_name: str | None = None
        self.state = "closed"
        self.reconnects = 0
        self.lost_count = 0
        self._clock = clock or time.monotonic_ns
        self._arrival = ArrivalClock()

    # -- public ---------------------------------------------------------------
    def open(self) -> "MidiInputBase":
        """Open the port; InputError if no port matches the name."""
        if self.virtual is not None:
            self._open_virtual(self.virtual)
            self.port_name = self.virtual
            self.state = "virtual"
        else:
            names = self._sources()
            i = find_port(names, self.pattern)
            if i is None:
                listed = ", ".join(repr(n) for n in names) or "none"
                self._close()
                raise InputError(f"--midi-in {self.pattern!r}: no MIDI input matches "
                                 f"(inputs: {listed}; see `sheafsynth ports`)")
            self._connect(i, names[i])
            self.state = "connected"
        self._arrival.reset()
        return self

    def close(self) -> None:
        """Close the port (idempotent)."""
        if self.state != "closed":
            self._close()
            self.state = "closed"

    def poll(self, limit: int = 256) -> list[tuple[list[int], int]]:
        """Messages waiting now: (bytes, arrival stamp in CLOCK_MONOTONIC ns)."""
        out = []
        for _ in range(limit):
            got = self._read()
            if got is None:
                break
            data, gap = got
            out.append((data, self._arrival.stamp(gap, self._clock())))
        return out

    def check(self) -> str:
        """Watch the source: notice when it vanishes, reconnect when it returns.  Returns state."""
        if self.state in ("virtual", "closed"):
            return self.state
        try:
            names = self._sources()
        except MidiError:
            names = []
        if self.state == "connected":
            if self.port_name not in names:
                self.state = "lost"
                self.lost_count += 1
                self._disconnect()
        if self.state == "lost":
            i = find_port(names, self.pattern)
            if i is not None:
                try:
                    self._connect(i, names[i])
                except MidiError:
                    return self.state
                self.state = "connected"
                self.reconnects += 1
                self._arrival.reset()
        return self.state

    @property
    def description(self) -> str:
        """The input as the status line and start-up message name it."""
        if self.state == "virtual":
            return f"virtual port {self.virtual!r}"
        if self.state == "connected":
            return f"{self.port_name!r}"
        if self.state == "lost":
            return f"{self.pattern!r} LOST - waiting for it to return"
        return "closed"

    # -- backend --------------------------------------------------------------
    def _sources(self) -> list[str]:
        raise NotImplementedError

    def _open_virtual(self, name: str) -> None:
        raise NotImplementedError

    def _connect(self, index: int, name: str) -> None:
        raise NotImplementedError

    def _disconnect(self) -> None:
        raise NotImplementedError

    def _read(self) -> tuple[list[int], float] | None:
        raise NotImplementedError

    def _close(self) -> None:
        raise NotImplementedError


class RtMidiInput(MidiInputBase):
    """A python-rtmidi input, polled (no library callback).

    api: one of API_NAMES or None for the platform default; client: our
    client name as other programs see it.
    """

    def __init__(self, *, api: str | None = None, client: str = "sheafsynth", **kwargs):
        super().__init__(**kwargs)
        self.api = api
        self._mi = _open_rt(api, client)
        # Clock and active sensing are dropped by the library; sysex passes (and is counted as ignored).
        self._mi.ignore_types(sysex=False, timing=True, active_sense=True)

    def _sources(self) -> list[str]:
        try:
            return list(self._mi.get_ports())
        except Exception as exc:
            raise MidiError(f"cannot list MIDI inputs: {exc}") from None

    def _open_virtual(self, name: str) -> None:
        try:
            self._mi.open_virtual_port(name)
        except Exception as exc:
            raise MidiError(f"cannot create virtual MIDI port {name!r}: {exc}") from None

    def _connect(self, index: int, name: str) -> None:
        try:
            if self._mi.is_port_open():
                self._mi.close_port()
            self._mi.open_port(index, name="in")
        except Exception as exc:
            raise MidiError(f"cannot open MIDI input {name!r}: {exc}") from None
        self.port_name = name

    def _disconnect(self) -> None:
        try:
            self._mi.close_port()
        except Exception:
            pass

    def _read(self):
        got = self._mi.get_message()
        if got is None:
            return None
        data, gap = got
        return data, gap

    def _close(self) -> None:
        try:
            self._mi.close_port()
        finally:
            self._mi.delete()


def open_midi_input(api: str | None, *, name: str | None = None, virtual: str | None = None) -> MidiInputBase:
    """The opened input ``play`` reads: the port whose name contains ``name``, or a virtual port
    called ``virtual``; neither given, the first source that is not a loop-back port, else a
    virtual port "sheafsynth in"."""
    if name is not None:
        return RtMidiInput(api=api, name=name).open()
    if virtual is not None:
        return RtMidiInput(api=api, virtual=virtual).open()
    names = [n for n in list_midi_inputs(api) if "through" not in n.lower()]
    if names:
        return RtMidiInput(api=api, name=names[0]).open()
    return RtMidiInput(api=api, virtual="sheafsynth in").open()

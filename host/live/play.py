"""``sheafsynth play`` and ``sheafsynth ports``: the live host.

Threads and what each may do:

* **audio thread** -- PortAudio's; runs only the C function
  ``ss_host_callback`` (csrc/host_rt.c): no Python, no allocation, no lock.
* **MIDI thread** (one, ours) -- polls the MIDI port, parses with mido,
  translates with :class:`host.controls.MidiTranslator` and pushes
  timestamped events into the C ring; it is the ring's only producer.  A
  program change is carried out here too (wait until the ring has drained
  into the old kernel, hand the new one over with ``set_kernel``), so events
  before and after a switch reach the right kernel.
* **main thread** -- builds every kernel of the bank before the stream
  starts, then draws the status line, reads keys, keeps timing anchors and
  ends the session.  Runtime control calls (counters, kernel switch, peak
  reset) from the main and MIDI threads are serialised by one Python lock;
  the audio side never takes it.
* **recorder thread** -- host.live.audio.Recorder, drains the record ring to WAV.

Every preset of the bank (factory presets, then the user folder; program
numbers follow that listing) is compiled twice over (two kernel instances
share one compiled module), so a program change never compiles and the
instance being faded out is never the one started.
"""

from __future__ import annotations

import argparse
import collections
import copy
import json
import math
import os
import signal
import sys
import threading
import time
from array import array
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sheafsynth.engine.errors import AudioError, InputError, PresetError, SheafsynthError

__all__ = ["PlayOptions", "LiveHost", "COMMANDS", "controls_doc"]

TAIL_S = 0.5               # how long released notes may ring out at the end, s
STALL_S = 3.0              # no callbacks for this long: the audio device has stopped, s
MAIN_POLL_S = 0.005        # main loop period (timing anchors), s
STATUS_EVERY_S = 0.1       # status line refresh, s
PORT_CHECK_S = 0.1         # MIDI source watch period, s
MIDI_IDLE_S = 0.0005       # MIDI thread sleep when no message is waiting, s
DRAIN_WAIT_S = 0.05        # longest wait for the ring to drain before a switch, s
RETIRE_WAIT_S = 2.0        # longest wait for a faded instance to be released, s
GIL_SWITCH_S = 0.0005      # interpreter switch interval while playing, s
LOG_LIMIT = 200_000        # most MIDI messages / anchors kept for the report
ANCHOR_EVERY_S = 0.05      # audio-clock anchors for the report: one callback's (frame, time) this often


class _MidiLog:
    """(arrival stamp, bytes) of received MIDI messages, packed: about 15 bytes a message,
    so a long session with --report does not grow the resident memory by megabytes."""

    def __init__(self) -> None:
        self._stamps = array("q")
        self._ends = array("Q")
        self._data = bytearray()

    def __len__(self) -> int:
        return len(self._stamps)

    def append(self, item) -> None:
        stamp, data = item
        self._data.extend(bytes(data))
        self._stamps.append(int(stamp))
        self._ends.append(len(self._data))

    def to_list(self) -> list:
        out, start = [], 0
        for stamp, end in zip(self._stamps, self._ends):
            out.append([stamp, list(self._data[start:end])])
            start = end
        return out


class _PairLog:
    """[int, int] pairs (timing anchors), packed."""

    def __init__(self) -> None:
        self._a = array("q")
        self._b = array("q")

    def __len__(self) -> int:
        return len(self._a)

    def __getitem__(self, i: int) -> list:
        return [self._a[i], self._b[i]]

    def append(self, item) -> None:
        self._a.append(int(item[0]))
        self._b.append(int(item[1]))

    def to_list(self) -> list:
        return [[a, b] for a, b in zip(self._a, self._b)]


@dataclass
class PlayOptions:
    """Everything ``sheafsynth play`` takes; times in s, rate in Hz, buffer in frames."""

    preset: str
    midi_in: str | None = None
    virtual_midi: str | None = None
    midi_api: str | None = None
    device: str | None = None
    rate: int | None = None
    buffer: int = 128
    channel: int | None = None          # 1-16, None = omni
    seconds: float | None = None
    record: str | None = None
    report: str | None = None
    learn: str | None = None
    bank_dir: str | None = None
    save_as: str | None = None
    allow_unstable: bool = False
    no_limiter: bool = False
    sets: dict[str, float] = field(default_factory=dict)
    seed: int = 0
    stall_probe: bool = False
    shallow_idle: bool = False
    timing_log: bool = True             # --report keeps every MIDI arrival and audio-clock anchors

    def check(self) -> None:
        """Raise InputError naming the first bad option."""
        if not (isinstance(self.buffer, int) and 16 <= self.buffer <= 4096):
            raise InputError(f"--buffer {self.buffer}: expected 16..4096 frames")
        if self.rate is not None and not 8000 <= self.rate <= 192000:
            raise InputError(f"--rate {self.rate}: expected 8000..192000 Hz")
        if self.channel is not None and not 1 <= self.channel <= 16:
            raise InputError(f"--channel {self.channel}: MIDI channels are 1-16")
        if self.seconds is not None and not (0 < self.seconds <= 7 * 24 * 3600):
            raise InputError(f"--seconds {self.seconds:g}: expected a positive duration")
        if self.midi_in is not None and self.virtual_midi is not None:
            raise InputError("--midi-in and --virtual-midi: choose one")
        if self.save_as is not None:
            from sheafsynth.engine.locations import FACTORY_DIR
            from sheafsynth.host.bank import _NAME_RE

            if not _NAME_RE.match(self.save_as):
                raise InputError(f"--save-as {self.save_as!r}: use 1-64 letters, digits, spaces, '-' or '_'")
            if (FACTORY_DIR / f"{self.save_as}.json").exists():
                raise InputError(f"--save-as {self.save_as!r} is a factory preset; choose another name")
        if self.record is not None and not str(self.record).lower().endswith(".wav"):
            raise InputError(f"--record {self.record!r}: the recording is a .wav file")
        for opt, path in (("--record", self.record), ("--report", self.report)):
            if path is not None:
                parent = Path(path).expanduser().resolve().parent
                if not parent.is_dir():
                    raise InputError(f"{opt} {path!r}: folder {str(parent)!r} does not exist")


@dataclass
class _Slot:
    """One program of the bank: its preset, two kernel instances, its translator."""

    number: int | None
    name: str
    preset: Any
    defaults: dict[str, float]
    instances: list
    gens: list[int]
    translator: Any
    warnings: list[str] = field(default_factory=list)


def controls_doc(translator) -> list[dict]:
    """The translator's live control map as preset JSON ``controls`` entries."""
    params = translator.preset.parameters
    out: list[dict] = []

    def entry(spec, head: dict) -> dict:
        d = dict(head)
        d["parameter"] = spec.parameter
        if spec.curve != "linear":
            d["curve"] = spec.curve
        p = params[spec.parameter]
        if spec.lo is not None and spec.lo != p.lo:
            d["min"] = spec.lo
        if spec.hi is not None and spec.hi != p.hi:
            d["max"] = spec.hi
        return d

    for cc, b in sorted(translator.cc_map.items()):
        out.append(entry(b.spec, {"cc": cc}))
    for b in translator.velocity:
        out.append(entry(b.spec, {"source": "velocity"}))
    for b in translator.pressure:
        out.append(entry(b.spec, {"source": "pressure"}))
    out.append({"source": "pitchbend", "range_semitones": float(translator.bend_range)})
    return out


def _resolve_device(device: str | None):
    """(device index, hostapi name, default rate Hz) of an output device; AudioError if none matches."""
    from sheafsynth.host.live.audio import _sounddevice

    sd = _sounddevice()
    spec: Any = device
    if isinstance(device, str) and device.strip().isdigit():
        spec = int(device)
    try:
        info = sd.query_devices(spec, kind="output")
        api = sd.query_hostapis(info["hostapi"])["name"]
    except (ValueError, sd.PortAudioError) as exc:
        what = "no default audio output" if device is None else f"--device {device!r}"
        raise AudioError(f"{what}: {str(exc).splitlines()[0]} (see `sheafsynth ports`)") from None
    return int(info["index"]), str(api), float(info["default_samplerate"]), str(info["name"])


def _check_output(index: int, rate: float, device_rate: float) -> None:
    """AudioError now if the device cannot run at ``rate`` Hz in stereo float."""
    from sheafsynth.host.live.audio import _sounddevice

    sd = _sounddevice()
    try:
        sd.check_output_settings(device=index, samplerate=rate, channels=2, dtype="float32")
    except (ValueError, sd.PortAudioError) as exc:
        hint = f" (the device's own rate is {device_rate:g} Hz: try --rate {device_rate:g})" \
            if abs(device_rate - rate) > 1e-6 else ""
        raise AudioError(f"the audio output cannot play {rate:g} Hz stereo: "
                         f"{str(exc).splitlines()[0]}{hint}") from None


def _atomic_write_text(path: Path, text: str) -> None:
    from sheafsynth.engine.preset.document import atomic_write_text

    atomic_write_text(path, text)


class LiveHost:
    """One live session: ``prepare()`` (main thread, compiles), then ``run()``."""

    def __init__(self, opts: PlayOptions, *, out=None, err=None):
        opts.check()
        self.opts = opts
        self.out = out or sys.stdout
        self.err = err or sys.stderr
        self._lock = threading.RLock()
        self._stop = threading.Event()
        self._midi_stop = threading.Event()
        self._midi_thread: threading.Thread | None = None
        self.slots: list[_Slot | None] = []
        self.slot: _Slot | None = None
        self.inst = None
        self.rt = None
        self.audio = None
        self.midi = None
        self.messages: collections.deque[str] = collections.deque()   # any thread appends, main prints
        self.midi_received = 0
        self.midi_malformed = 0
        self.midi_errors = 0
        self.program_log: list[dict] = []
        self.probe = None
        self.idle = None
        self._idle_held: bool | None = None
        self._probe_result = None
        self._pedal = 0
        self._bend_frac = 0.0
        self._log_midi: list | None = None
        self._anchors: list | None = None
        self._learned_seen = 0
        self.saved: list[str] = []

    # ---------------------------------------------------------------- prepare
    def _say(self, text: str) -> None:
        self.messages.append(text)

    def prepare(self) -> None:
        """Resolve everything and compile the bank, before any stream exists."""
        from sheafsynth.host import bank
        from sheafsynth.host.controls import MidiTranslator
        from sheafsynth.engine.instrument import Instrument

        o = self.opts
        if o.bank_dir is not None:
            folder = Path(o.bank_dir).expanduser()
            if folder.exists() and not folder.is_dir():
                raise InputError(f"--bank-dir {o.bank_dir!r} is not a folder")
            os.environ["SHEAFSYNTH_USER_DIR"] = str(folder)
        first = bank.load(o.preset)
        for name in o.sets:
            if name not in first.parameters:
                known = ", ".join(first.parameters) or "none"
                raise InputError(f'--set {name}: preset "{first.name}" has no such parameter (it has: {known})')
        if o.learn is not None and o.learn not in first.parameters:
            known = ", ".join(first.parameters) or "none"
            raise InputError(f'--learn {o.learn}: preset "{first.name}" has no such parameter (it has: {known})')

        self.device_index, self.hostapi, dev_rate, self.device_name = _resolve_device(o.device)
        self.device_rate = dev_rate
        self.rate = float(o.rate) if o.rate is not None else (dev_rate if 8000 <= dev_rate <= 192000 else 48000.0)
        _check_output(self.device_index, self.rate, dev_rate)      # before the long compile
        for line in self._guard(first, fatal=True):
            self._say(f"warning: {first.name}: {line}")
        channel = None if o.channel is None else o.channel - 1

        def make_slot(number, name, preset, values, ramps=None) -> _Slot:
            if ramps is None:
                ramps = self._ramp_limits(preset)
            insts = [Instrument(preset, rate=self.rate, max_block=o.buffer, seed=o.seed + k,
                                limiter=not o.no_limiter, min_ramp_s=ramps) for k in range(2)]
            defaults = {p.name: p.value for p in insts[0].program.params}
            defaults.update(values)
            for inst in insts:
                for pname, v in defaults.items():
                    inst.set_now(pname, v)
            tr = MidiTranslator(preset, dict(insts[0].program.param_index), channel=channel,
                                on_program=self._program)
            return _Slot(number, name, preset, defaults, insts, [0, 0], tr)

        first_path = Path(first.source).resolve() if first.source.endswith(".json") else None
        start: _Slot | None = None
        for number, e in enumerate(bank.entries()):
            if e.error:
                self.slots.append(None)
                continue
            if first_path is not None and e.path.resolve() == first_path:
                start = make_slot(number, e.name, first, o.sets)
                self.slots.append(start)
                continue
            try:
                preset = bank.load(str(e.path))
                if self._checked_before(preset):
                    warnings = self._guard(preset, fatal=False)
                    slot = make_slot(number, e.name, preset, {})
                elif e.origin == "factory" or o.allow_unstable:
                    # No analysis at start-up for the rest of the bank (it can take minutes);
                    # factory presets are checked by the project's own tests.
                    warnings = [f"not checked on this machine yet (`sheafsynth check {e.name}` "
                                "checks it and lets its knobs move as fast as the proof allows)"]
                    slot = make_slot(number, e.name, preset, {}, ramps={})
                else:
                    self._say(f"program {number} ({e.name}) left out: not checked yet; run "
                              f"`sheafsynth check {e.name}` once (or pass --allow-unstable)")
                    self.slots.append(None)
                    continue
                slot.warnings = warnings        # said when the program is chosen
                self.slots.append(slot)
            except Exception as exc:  # one bad bank preset must not stop the others
                self._say(f"program {number} ({e.name}) left out: {exc}")
                self.slots.append(None)
        if start is None:
            start = make_slot(None, first.name, first, o.sets)
        self.slot = start
        self.inst = start.instances[0]
        if o.learn is not None:
            refused = self._learn(start, o.learn)
            if refused:
                raise InputError(f"--learn {o.learn}: {refused}")

    def _checked_before(self, preset) -> bool:
        """True when engine.analysis.report has this preset's report cached (so guarding it is quick)."""
        try:
            from sheafsynth.engine.analysis import report as A
        except ImportError:
            return True
        try:
            return A.is_checked(preset)
        except Exception:   # an analysis that cannot read this preset: treat it as unchecked
            return False

    def _learn(self, slot: _Slot, parameter: str) -> str | None:
        """Arm learn mode for ``parameter``; returns why it is refused, or None.

        A learned knob spans the parameter's range in the preset's controls,
        the box the stability analysis checked; a parameter no control maps
        was checked only at its value, so it is refused unless --allow-unstable.
        """
        try:
            from sheafsynth.engine.analysis.report import mapped_box
        except ImportError:
            slot.translator.learn(parameter)
            return None
        box = mapped_box(slot.preset)
        if parameter in box:
            slot.translator.learn(parameter, *box[parameter])
            return None
        if self.opts.allow_unstable:
            slot.translator.learn(parameter)
            return None
        mapped = ", ".join(sorted(box)) or "none"
        return (f'no control of "{slot.name}" maps it, so its stability was checked only at its '
                f"value (mapped: {mapped}; --allow-unstable learns it anyway)")

    def _ramp_limits(self, preset) -> dict[str, float]:
        """Ramp times (s) a ramp-limited stability certificate asks for, when analysis exists."""
        try:
            from sheafsynth.engine.analysis import report as analysis
        except ImportError:
            return {}
        limits = getattr(analysis, "ramp_limits", None)
        return dict(limits(preset, self.rate)) if limits is not None else {}

    def _guard(self, preset, *, fatal: bool) -> list[str]:
        """Frozen-stability guard from sheafsynth.engine.analysis.report, when that exists; returns its warnings."""
        try:
            from sheafsynth.engine.analysis import report as analysis
        except ImportError:
            return []
        guard = getattr(analysis, "guard", None)
        if guard is None:
            return []
        try:
            return list(guard(preset, allow_unstable=self.opts.allow_unstable, rate=self.rate) or [])
        except SheafsynthError:
            if fatal:
                raise
            raise PresetError("not stable (pass --allow-unstable to play it anyway)", preset.name) from None

    # ---------------------------------------------------------------- MIDI thread
    def _midi_loop(self) -> None:
        """The MIDI thread: poll, parse, translate, push.  Never touches the audio thread."""
        from sheafsynth.host.live.midi import MidiError, parse

        midi = self.midi
        next_check = 0.0
        while not self._midi_stop.is_set():
            try:
                got = midi.poll()
            except MidiError:
                got = []
            for data, stamp in got:
                try:
                    self._on_midi(data, stamp, parse)
                except Exception as exc:  # keep playing; say it once
                    self.midi_errors += 1
                    if self.midi_errors == 1:
                        self._say(f"MIDI message {list(data)} could not be handled: {exc}")
            now = time.monotonic()
            if now >= next_check:
                try:
                    midi.check()
                except Exception as exc:
                    self._say(f"MIDI port check failed: {exc}")
                next_check = now + PORT_CHECK_S
            if not got:
                time.sleep(MIDI_IDLE_S)

    def _on_midi(self, data, stamp: int, parse) -> None:
        from sheafsynth.engine.ir import voicing as V

        self.midi_received += 1
        log = self._log_midi
        if log is not None and len(log) < LOG_LIMIT:
            log.append([stamp, list(data)])
        msg = parse(data)
        if msg is None:
            self.midi_malformed += 1
            return
        with self._lock:
            events = self.slot.translator.translate(msg)
            rt = self.rt
            for _off, typ, a, b, value in events:
                if typ == V.EV_SUSTAIN:
                    self._pedal = b
                elif typ == V.EV_BEND:
                    rng = self.slot.translator.bend_range
                    self._bend_frac = value / rng if rng else 0.0
                rt.push_at(stamp, typ, a, b, value)

    def _program(self, number: int) -> None:
        """Program change (MIDI thread, inside translate, lock held)."""
        from sheafsynth.engine.ir import voicing as V

        if not 0 <= number < len(self.slots) or self.slots[number] is None:
            self._say(f"program {number}: no usable preset there "
                      f"(the bank has {len(self.slots)}; see `sheafsynth presets`)")
            return
        slot = self.slots[number]
        if slot is self.slot:
            return
        rt = self.rt
        # Events already queued belong to the old kernel: let the audio thread take them first.
        deadline = time.monotonic() + DRAIN_WAIT_S
        while time.monotonic() < deadline:
            c = rt.counters()
            if c.events_delivered + c.events_unrouted >= c.events_pushed:
                break
            time.sleep(0.0005)
        k = self._free_instance(slot)
        if k is None:
            self._say(f"program {number} ({slot.name}): still fading out from before; try again")
            return
        inst = slot.instances[k]
        self._recall(slot, inst)
        h = inst.handle()
        gen = rt.set_kernel(h.render_fn, h.state, keep=inst)
        slot.gens[k] = gen
        self.slot, self.inst = slot, inst
        now = rt.now_ns()
        if self._pedal:
            rt.push_at(now, V.EV_SUSTAIN, 0, 1, 0.0)
        if self._bend_frac:
            rt.push_at(now, V.EV_BEND, 0, 0, self._bend_frac * slot.translator.bend_range)
        self.program_log.append({"program": number, "name": slot.name, "stamp_ns": now})
        for line in slot.warnings:
            self._say(f"warning: {slot.name}: {line}")

    def _free_instance(self, slot: _Slot) -> int | None:
        """An instance of ``slot`` the audio thread no longer uses (waits a little)."""
        deadline = time.monotonic() + RETIRE_WAIT_S
        while True:
            retired = self.rt.counters().retired
            for k, gen in enumerate(slot.gens):
                if gen <= retired:
                    return k
            if time.monotonic() >= deadline:
                return None
            time.sleep(0.002)

    @staticmethod
    def _recall(slot: _Slot, inst) -> None:
        """Bring a retired instance back to the stored preset: silent, pedal up, no bend, defaults."""
        inst.all_sound_off()
        inst.sustain(False)
        inst.bend(0.0)
        for _ in range(64):
            inst.process(inst.max_block)
            if inst.counters["voices_active"] == 0:
                break
        for name, v in slot.defaults.items():
            inst.set_now(name, v)

    # ---------------------------------------------------------------- main thread
    def _counters(self):
        with self._lock:
            return self.rt.counters()

    def _open_midi(self):
        from sheafsynth.host.live.midi import RtMidiInput, default_api, list_midi_inputs

        o = self.opts
        api = o.midi_api if o.midi_api is not None else default_api(self.hostapi)
        if o.midi_in is not None:
            return RtMidiInput(api=api, name=o.midi_in).open()
        if o.virtual_midi is not None:
            return RtMidiInput(api=api, virtual=o.virtual_midi).open()
        # Neither given: the first source that is not a loop-back port, else a virtual port.
        names = [n for n in list_midi_inputs(api) if "through" not in n.lower()]
        if names:
            return RtMidiInput(api=api, name=names[0]).open()
        return RtMidiInput(api=api, virtual="sheafsynth in").open()

    def run(self) -> dict:
        """Play until --seconds pass, SIGINT/SIGTERM or the q key; returns the report."""
        from sheafsynth.engine.ir.lower import LIMITER_CEILING
        from sheafsynth.host.live.audio import AudioOutput
        from sheafsynth.host.live.status import KEY_HELP, Keyboard, StatusLine

        o = self.opts
        status = StatusLine(self.out)
        self._print_messages(None)

        self.midi = self._open_midi()
        try:
            self.audio = AudioOutput(device=self.device_index, rate=self.rate, blocksize=o.buffer,
                                     channels=2, max_block=o.buffer)
        except SheafsynthError:
            self.midi.close()
            raise
        self.rt = self.audio.runtime
        self.rt.set_ceiling(1.0 if o.no_limiter else LIMITER_CEILING)
        h = self.inst.handle()
        self.slot.gens[0] = self.rt.set_kernel(h.render_fn, h.state, keep=self.inst)
        if o.report is not None:
            if o.timing_log:
                self._log_midi = _MidiLog()
                self._anchors = _PairLog() if o.record else None
        frames_recorded = 0
        old_handlers = {}
        error: BaseException | None = None
        t_start = time.monotonic()
        old_switch = sys.getswitchinterval()
        sys.setswitchinterval(GIL_SWITCH_S)       # the MIDI thread gets the interpreter back quickly
        try:
            if o.record is not None:
                self.audio.start_recording(o.record)
            try:
                self.audio.open()
            except AudioError as exc:
                if abs(self.device_rate - self.rate) > 1e-6:
                    raise AudioError(f"{exc} (the device's own rate is {self.device_rate:g} Hz: "
                                     f"try --rate {self.device_rate:g})") from None
                raise
            if abs(self.audio.rate - self.rate) > 1e-6:
                raise AudioError(f"the device runs at {self.audio.rate:g} Hz, not {self.rate:g} Hz; "
                                 f"pass --rate {self.audio.rate:g}")
            if o.shallow_idle:
                from sheafsynth.host.live.idle_latency import ShallowIdle

                self.idle = ShallowIdle().open()
                self._idle_held = self.idle.held
                if not self.idle.held:
                    self._say(f"--shallow-idle: {self.idle.reason}; the CPUs may still sleep deeply")
            if o.stall_probe:
                from sheafsynth.host.live.stall_probe import PLAY_TICKS, StallProbe

                self.probe = StallProbe(o.buffer / self.rate, ticks_per_period=PLAY_TICKS).start()
            t_start = time.monotonic()
            for sig in (signal.SIGINT, signal.SIGTERM):
                old_handlers[sig] = signal.signal(sig, lambda *_: self._stop.set())
            self._midi_thread = threading.Thread(target=self._midi_loop, name="sheafsynth-midi", daemon=True)
            self._midi_thread.start()
            latency = o.buffer / self.rate * 1000.0
            print(f"playing {self.slot.name} on {self.device_name} ({self.hostapi}), "
                  f"{self.rate:g} Hz, buffer {o.buffer} ({latency:.1f} ms); MIDI {self.midi.description}; "
                  f"{'limiter OFF' if o.no_limiter else 'limiter on'}; Ctrl-C stops", file=self.out, flush=True)
            with Keyboard() as keys:
                if keys.enabled and status.enabled:
                    status.say(KEY_HELP)
                self._main_loop(status, keys, t_start)
        except BaseException as exc:
            error = exc
            raise
        finally:
            sys.setswitchinterval(old_switch)
            for sig, hnd in old_handlers.items():
                signal.signal(sig, hnd)
            status.clear()
            try:
                self._finish()
            finally:
                frames_recorded = self.audio.stop_recording() if o.record is not None else 0
                self.audio.close()
                self._read_probe()
                if self.idle is not None:
                    self.idle.close()
                if self.midi is not None:
                    self.midi.close()
                if error is not None and o.report is not None:       # best effort: counters up to the failure
                    try:
                        rep = self._report(frames_recorded, time.monotonic() - t_start)
                        rep["error"] = str(error) or type(error).__name__
                        _atomic_write_text(Path(o.report), json.dumps(rep, indent=1) + "\n")
                    except Exception:
                        pass
        elapsed = time.monotonic() - t_start
        if o.save_as:
            self._save(o.save_as)
        report = self._report(frames_recorded, elapsed)
        if o.report is not None:
            _atomic_write_text(Path(o.report), json.dumps(report, indent=1) + "\n")
        self._print_messages(None)
        print(f"stopped after {elapsed:.1f} s: {report['callbacks']} callbacks, {_xrun_summary(report)}, "
              f"worst callback {100 * report['load_worst']:.0f}% of the block period, "
              f"MIDI {report['midi']['received']} received"
              + (f", recorded {frames_recorded} frames to {o.record}" if o.record else ""),
              file=self.out, flush=True)
        return report

    def _print_messages(self, status) -> None:
        """Say what the other threads had to say (main thread)."""
        while self.messages:
            line = self.messages.popleft()
            if status is not None and status.enabled:
                status.say(line)
            else:
                print(f"sheafsynth: {line}", file=self.err)

    def _main_loop(self, status, keys, t_start: float) -> None:
        from sheafsynth.host.live.status import StatusInfo, format_status

        o = self.opts
        period_ns = o.buffer / self.rate * 1e9
        last_cb, last_cb_t = -1, time.monotonic()
        next_status = 0.0
        next_anchor = 0.0
        learn_cycle = 0
        while not self._stop.is_set():
            now = time.monotonic()
            if o.seconds is not None and now - t_start >= o.seconds:
                break
            c = self._counters()
            if c.callbacks != last_cb:
                last_cb, last_cb_t = c.callbacks, now
            elif now - last_cb_t > STALL_S:
                raise AudioError(f"the audio device stopped: no callback for {STALL_S:g} s")
            anchors = self._anchors
            if anchors is not None and c.last_frames and len(anchors) < LOG_LIMIT \
                    and now >= next_anchor:
                a = [int(c.frames - c.last_frames), int(c.last_start_ns)]
                if not anchors or anchors[-1] != a:
                    anchors.append(a)
                    next_anchor = now + ANCHOR_EVERY_S
            if now >= next_status:
                next_status = now + STATUS_EVERY_S
                self._print_messages(status)
                tr = self.slot.translator
                if len(tr.learned) > self._learned_seen:
                    for cc, name in tr.learned[self._learned_seen:]:
                        status.say(f"learned: CC {cc} -> {name}")
                    self._learned_seen = len(tr.learned)
                if status.enabled:
                    with self._lock:
                        self.rt.reset_peak()
                    status.show(format_status(StatusInfo(
                        preset=self.slot.name, program=self.slot.number,
                        voices=self.inst.counters["voices_active"],
                        polyphony=self.inst.program.polyphony,
                        load=c.cb_last_ns / period_ns, load_p999=c.load_percentile(99.9),
                        xruns=c.xruns, peak=c.peak_hold, last_control=tr.counters.last_control,
                        midi=self.midi.description, learn=tr.learn_target)))
            for key in keys.read():
                if key in "qQ":
                    self._stop.set()
                elif key in "sS":
                    self._save(self.opts.save_as or None)
                elif key in "lL":
                    names = [p.name for p in self.inst.program.params]
                    for _ in range(len(names)):
                        name = names[learn_cycle % len(names)]
                        learn_cycle += 1
                        with self._lock:
                            if self._learn(self.slot, name) is None:
                                break
                    else:
                        status.say("learn: no parameter of this preset can be learned")
                elif key == "?":
                    from sheafsynth.host.live.status import KEY_HELP
                    status.say(KEY_HELP)
            time.sleep(MAIN_POLL_S)

    def _finish(self) -> None:
        """Stop MIDI, let released notes ring out briefly, then fade to silence."""
        from sheafsynth.engine.ir import voicing as V

        self._midi_stop.set()
        if self._midi_thread is not None:
            self._midi_thread.join(timeout=5.0)
        if not (self.audio is not None and self.audio.is_open):
            return
        # The MIDI thread has ended: the main thread is now the ring's only producer.
        self.rt.push(V.EV_RELEASE_ALL)
        deadline = time.monotonic() + TAIL_S
        while time.monotonic() < deadline:
            c = self._counters()
            if self.inst.counters["voices_active"] == 0 and not c.fading_active:
                break
            time.sleep(0.01)
        self.rt.push(V.EV_ALL_SOUND_OFF)
        time.sleep(3 * self.opts.buffer / self.rate + 0.01)

    # ---------------------------------------------------------------- save / report
    def _save(self, name: str | None) -> Path | None:
        """Current values and control map of the current program as a user preset."""
        from sheafsynth.host import bank

        slot, inst = self.slot, self.inst
        if not name:
            name = f"{slot.name[:40]}-{time.strftime('%Y%m%d-%H%M%S')}"
        with self._lock:
            values = {}
            for p in inst.program.params:
                v = inst.values[p.name]
                values[p.name] = min(p.hi, max(p.lo, v)) if math.isfinite(v) else p.value
            controls = controls_doc(slot.translator)
        try:
            doc = copy.deepcopy(slot.preset.with_values(values).raw)
            doc["controls"] = controls
            path = bank.save_user_preset(doc, name)
        except (PresetError, OSError) as exc:
            self._say(f"could not save preset {name!r}: {exc}")
            return None
        self.saved.append(str(path))
        self._say(f"saved preset {name!r} to {path}")
        return path

    def _report(self, frames_recorded: int, elapsed: float) -> dict:
        c = self.rt.counters()
        period_ns = self.opts.buffer / self.rate * 1e9
        kc = {"voices_stolen": 0, "guard_resets": 0, "events_ignored": 0}
        tr_received = tr_ignored = 0
        for slot in self._all_slots():
            for inst in slot.instances:
                cn = inst.counters
                for k in kc:
                    kc[k] += cn[k]
            tr_received += slot.translator.counters.received
            tr_ignored += slot.translator.counters.ignored
        p999 = c.load_percentile(99.9)
        cpu_p999 = c.load_percentile(99.9, on_cpu=True)
        rep = {
            "format": "sheafsynth-play-report", "version": 1,
            "preset": self.opts.preset, "final_program": self.slot.name,
            "rate": self.rate, "buffer": self.opts.buffer, "device": self.device_name,
            "hostapi": self.hostapi, "seconds": round(elapsed, 3),
            "callbacks": int(c.callbacks), "frames": int(c.frames),
            "xruns": int(c.xruns), "underflows": int(c.underflows), "overflows": int(c.overflows),
            "load_worst": c.cb_worst_ns / period_ns,
            "load_p999": p999 if math.isfinite(p999) else None,
            "load_cpu_worst": c.cb_cpu_worst_ns / period_ns,
            "load_cpu_p999": cpu_p999 if math.isfinite(cpu_p999) else None,
            "callbacks_blocked": int(c.cb_blocked),
            "callbacks_preempted": int(c.cb_preempted),
            "midi": {"port": (self.midi.virtual or self.midi.port_name) if self.midi else None,
                     "received": self.midi_received, "malformed": self.midi_malformed,
                     "ignored": tr_ignored, "translated": tr_received, "errors": self.midi_errors,
                     "lost": self.midi.lost_count if self.midi else 0,
                     "reconnects": self.midi.reconnects if self.midi else 0},
            "events": {"pushed": int(c.events_pushed), "dropped": int(c.events_dropped),
                       "delivered": int(c.events_delivered), "late": int(c.events_late)},
            "voices_stolen": kc["voices_stolen"], "guard_resets": kc["guard_resets"],
            "kernel_events_ignored": kc["events_ignored"],
            "frames_recorded": int(frames_recorded), "record_dropped": int(c.record_dropped),
            "nonfinite_samples": int(c.nonfinite), "clipped_samples": int(c.clipped),
            "kernel_errors": int(c.kernel_errors),
            "switches": int(c.switches), "fade_timeouts": int(c.fade_timeouts),
            "programs": self.program_log,
            "learned": [{"preset": s.name, "cc": cc, "parameter": name}
                        for s in self._all_slots() for cc, name in s.translator.learned],
            "saved_presets": self.saved,
        }
        rep["shallow_idle"] = self._idle_held
        machine = self._machine_report(elapsed)
        if machine is not None:
            rep["machine"] = machine
        if self._log_midi is not None:
            rep["timing"] = {"clock": "CLOCK_MONOTONIC ns",
                             "midi": self._log_midi.to_list(),
                             "anchors": self._anchors.to_list() if self._anchors is not None else []}
        return rep

    def _read_probe(self) -> None:
        """Stop the stall probe and keep what it saw (after the stream has closed)."""
        probe, self.probe = self.probe, None
        if probe is None:
            return
        try:
            self._probe_result = (probe.read(), probe.stalls())
        finally:
            probe.stop()

    def _machine_report(self, elapsed: float) -> dict | None:
        """The stall probe's figures and which xruns the machine's stalls explain."""
        if self._probe_result is None:
            return None
        from sheafsynth.host.live.stall_probe import (CAUSE_ELSEWHERE, CAUSE_PREEMPTED, CAUSE_SLOW, EXPLAIN_WINDOW_S,
                                      explain_coverage, explain_xruns, xrun_causes)

        reading, stalls = self._probe_result
        xrun_ns = self.rt.xrun_times()
        slow = self.rt.slow_callbacks()
        gaps = explain_xruns(xrun_ns, stalls)
        causes = xrun_causes(xrun_ns, stalls, slow, reading.period_s)
        return {"probe": reading.as_dict(), "explain_window_s": EXPLAIN_WINDOW_S,
                "explain_coverage": explain_coverage(stalls, elapsed),
                "xrun_times_ns": xrun_ns,
                "xrun_stall_gap_s": gaps,
                "xrun_causes": causes,
                "xruns_explained": sum(g is not None for g in gaps),
                "xruns_unexplained": sum(g is None for g in gaps),
                "xruns_preempted": causes.count(CAUSE_PREEMPTED),
                "xruns_slow_callback": causes.count(CAUSE_SLOW),
                "xruns_elsewhere": causes.count(CAUSE_ELSEWHERE),
                "slow_callbacks": [list(c) for c in slow],
                "stalls": [[st.deadline_ns, st.late_ns, st.cpu] for st in stalls[:4096]]}

    def _all_slots(self) -> list[_Slot]:
        """Every slot once (the start preset may be outside the bank)."""
        return list({id(s): s for s in self.slots + [self.slot] if s is not None}.values())


def _xrun_summary(report: dict) -> str:
    """"N xruns", with their causes when the stall probe ran, and a blocked-callback warning."""
    n = int(report["xruns"])
    text = f"{n} xruns"
    m = report.get("machine")
    if m and n:
        text += (f" ({m['xruns_explained'] + m['xruns_preempted']} the machine's, "
                 f"{m['xruns_slow_callback']} after slow callbacks, {m['xruns_elsewhere']} elsewhere)")
    if report.get("callbacks_blocked"):
        text += f", the audio thread BLOCKED in {report['callbacks_blocked']} callbacks (a host bug: please report it)"
    return text


# ---------------------------------------------------------------- CLI

def _add_play(p: argparse.ArgumentParser) -> None:
    p.add_argument("preset", metavar="PRESET", help="preset file or factory/user preset name")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--midi-in", metavar="NAME", help="MIDI input to read: any port whose name contains NAME")
    src.add_argument("--virtual-midi", metavar="NAME", help="open a MIDI input port of our own called NAME")
    p.add_argument("--midi-api", choices=("alsa", "jack", "coremidi", "winmm"), default=None,
                   help="MIDI system (default: JACK MIDI with JACK audio, else the platform's own)")
    p.add_argument("--device", metavar="NAME", help="audio output: index or part of the name (see `sheafsynth ports`)")
    p.add_argument("--rate", type=int, default=None, help="sample rate in Hz (default: the device's, else 48000)")
    p.add_argument("--buffer", type=int, default=128, help="frames per audio block (default 128; latency = buffer / rate)")
    p.add_argument("--channel", type=int, default=None, help="MIDI channel 1-16 to listen to (default: all)")
    p.add_argument("--seconds", type=float, default=None, help="stop by itself after this many seconds")
    p.add_argument("--record", metavar="FILE.wav", help="record exactly what goes to the output")
    p.add_argument("--report", metavar="FILE.json", help="write counters (callbacks, xruns, load, MIDI) on exit")
    p.add_argument("--learn", metavar="PARAM", help="bind the next moved knob (CC) to parameter PARAM")
    p.add_argument("--bank-dir", metavar="DIR", help="folder of user presets (default: the user data folder)")
    p.add_argument("--save-as", metavar="NAME", help="on exit, save current values and knob map as user preset NAME")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", help="start a parameter at VALUE (repeatable)")
    p.add_argument("--seed", type=int, default=0, help="noise seed")
    p.add_argument("--no-limiter", action="store_true", help="turn the output safety limiter off (not advised)")
    p.add_argument("--allow-unstable", action="store_true", help="play even if the preset is not stable")
    p.add_argument("--no-timing-log", action="store_true",
                   help="leave the per-message MIDI arrival log and audio-clock anchors out of --report "
                        "(counters only; for long sessions)")
    p.add_argument("--stall-probe", action="store_true",
                   help="watch how promptly the machine wakes real-time threads, and tell in --report "
                        "which xruns its stalls explain")
    p.add_argument("--shallow-idle", action="store_true",
                   help="while playing, keep the CPUs out of slow idle states (Linux /dev/cpu_dma_latency; "
                        "needs the right to open it; costs power)")


def _run_play(args) -> int:
    from sheafsynth.host.cli import CAUTION, _parse_set

    opts = PlayOptions(preset=args.preset, midi_in=args.midi_in, virtual_midi=args.virtual_midi,
                       midi_api=args.midi_api, device=args.device, rate=args.rate, buffer=args.buffer,
                       channel=args.channel, seconds=args.seconds, record=args.record, report=args.report,
                       learn=args.learn, bank_dir=args.bank_dir, save_as=args.save_as,
                       allow_unstable=args.allow_unstable, no_limiter=args.no_limiter,
                       sets=_parse_set(args.set), seed=args.seed, stall_probe=args.stall_probe,
                       shallow_idle=args.shallow_idle, timing_log=not args.no_timing_log)
    if opts.no_limiter:
        print("warning: the output limiter is OFF. " + CAUTION, file=sys.stderr)
    host = LiveHost(opts)
    host.prepare()
    host.run()
    return 0


def _add_ports(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="machine-readable listing")


def _run_ports(args) -> int:
    from sheafsynth.host.live.audio import list_audio_devices
    from sheafsynth.host.live.midi import MidiError, available_apis, list_midi_inputs

    result: dict = {"audio": [], "audio_error": None, "midi": {}}
    try:
        result["audio"] = [dict(index=d.index, name=d.name, hostapi=d.hostapi,
                                channels=d.max_output_channels, rate=d.default_samplerate,
                                default=d.is_default) for d in list_audio_devices()]
    except AudioError as exc:
        result["audio_error"] = str(exc)
    for api in available_apis():
        try:
            result["midi"][api] = {"inputs": list_midi_inputs(api), "error": None}
        except (MidiError, InputError) as exc:
            result["midi"][api] = {"inputs": [], "error": str(exc)}
    if args.json:
        print(json.dumps(result, indent=2))
        return 0
    print("Audio outputs (--device):")
    if result["audio_error"]:
        print(f"  not available: {result['audio_error']}")
    elif not result["audio"]:
        print("  none")
    for d in result["audio"]:
        print(f"  {d['index']:>3}  {d['name']}  ({d['hostapi']}, {d['channels']} ch, {d['rate']:g} Hz)"
              + ("  [default]" if d["default"] else ""))
    for api, m in result["midi"].items():
        print(f"MIDI inputs via {api} (--midi-in, --midi-api {api}):")
        if m["error"]:
            print(f"  not available: {m['error']}")
        elif not m["inputs"]:
            print("  none")
        for name in m["inputs"]:
            print(f"       {name}")
    return 0


COMMANDS = [
    ("play", "play a preset live from a MIDI controller or a virtual MIDI port", _add_play, _run_play),
    ("ports", "list audio output devices and MIDI inputs", _add_ports, _run_ports),
]

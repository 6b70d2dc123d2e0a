"""One live session of ``sheafsynth play``: the threads and what each may do.

* **audio thread** -- PortAudio's; runs only the C function
  ``ss_host_callback`` (csrc/host_rt.c): no Python, no allocation, no lock.
* **MIDI thread** (one, ours) -- polls the MIDI port, parses with mido,
  translates with :class:`sheafsynth.host.controls.MidiTranslator` and pushes
  timestamped events into the C ring; it is the ring's only producer.  A
  program change is carried out here too (host.live.programs), so events
  before and after a switch reach the right kernel.
* **main thread** -- builds every kernel of the bank before the stream
  starts, then draws the status line, reads keys, keeps timing anchors and
  ends the session.  Runtime control calls (counters, kernel switch, peak
  reset) from the main and MIDI threads are serialised by one Python lock;
  the audio side never takes it.
* **recorder thread** -- host.live.audio.Recorder, drains the record ring to WAV.

Times in s unless a name says ns; rates in Hz; buffers in frames.
"""

from __future__ import annotations

import collections
import json
import signal
import sys
import threading
import time
from pathlib import Path
from typing import Any, TextIO

from sheafsynth.engine.errors import AudioError, InputError, PresetError, SheafsynthError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.ir.program import LIMITER_CEILING
from sheafsynth.engine.preset import atomic_write_text
from sheafsynth.host import bank
from sheafsynth.host.live.audio import AudioOutput, check_output_settings, resolve_output_device
from sheafsynth.host.live.idle_latency import ShallowIdle
from sheafsynth.host.live.midi import MidiError, MidiInputBase, default_api, open_midi_input, parse
from sheafsynth.host.live.options import PlayOptions
from sheafsynth.host.live.programs import ProgramBank, ProgramSlot, point_user_folder
from sheafsynth.host.live.report import (LOG_LIMIT, MidiLog, PairLog, latency_ms, latency_text, machine_report,
                                         play_report, xrun_summary)
from sheafsynth.host.live.runtime import HostCounters, HostRuntime
from sheafsynth.host.live.stall_probe import PLAY_TICKS, ProbeReading, Stall, StallProbe
from sheafsynth.host.live.status import KEY_HELP, Keyboard, StatusInfo, StatusLine, format_status

__all__ = ["LiveHost", "TAIL_S", "STALL_S"]

TAIL_S = 0.5               # how long released notes may ring out at the end, s
STALL_S = 3.0              # no callbacks for this long: the audio device has stopped, s
MAIN_POLL_S = 0.005        # main loop period (timing anchors), s
STATUS_EVERY_S = 0.1       # status line refresh, s
PORT_CHECK_S = 0.1         # MIDI source watch period, s
MIDI_IDLE_S = 0.0005       # MIDI thread sleep when no message is waiting, s
GIL_SWITCH_S = 0.0005      # interpreter switch interval while playing, s
ANCHOR_EVERY_S = 0.05      # audio-clock anchors for the report: one callback's (frame, time) this often


class LiveHost:
    """One live session: ``prepare()`` (main thread, compiles), then ``run()``."""

    def __init__(self, opts: PlayOptions, *, out: TextIO | None = None, err: TextIO | None = None):
        opts.check()
        self.opts = opts
        self.out = out or sys.stdout
        self.err = err or sys.stderr
        self._lock = threading.RLock()
        self._stop = threading.Event()
        self._midi_stop = threading.Event()
        self._midi_thread: threading.Thread | None = None
        self.programs: ProgramBank | None = None
        self.rt: HostRuntime | None = None
        self.audio: AudioOutput | None = None
        self.midi: MidiInputBase | None = None
        self.messages: collections.deque[str] = collections.deque()   # any thread appends, main prints
        self.midi_received = 0
        self.midi_malformed = 0
        self.midi_errors = 0
        self.probe: StallProbe | None = None
        self.idle: ShallowIdle | None = None
        self._idle_held: bool | None = None
        self._probe_result: tuple[ProbeReading, list[Stall]] | None = None
        self._pedal = 0
        self._bend_frac = 0.0
        self._log_midi: MidiLog | None = None
        self._anchors: PairLog | None = None
        self._learned_seen = 0
        self._learn_cycle = 0              # the l key arms learn for the parameters in turn
        self.saved: list[str] = []
        self.device_index, self.hostapi, self.device_name = -1, "", ""
        self.device_rate = self.rate = 0.0
        self.latency: dict = {}            # latency_ms() of the opened stream

    # ---------------------------------------------------------------- state every thread reads
    @property
    def slots(self) -> list[ProgramSlot | None]:
        """The bank's programs by number (None where a preset is left out)."""
        return self._bank.slots

    @property
    def slot(self) -> ProgramSlot:
        """The current program."""
        cur = self._bank.current
        if cur is None:
            raise AudioError("the session has not been prepared")
        return cur

    @property
    def inst(self) -> Instrument:
        """The kernel instance of the current program the audio thread runs."""
        inst = self._bank.inst
        if inst is None:
            raise AudioError("the session has not been prepared")
        return inst

    @property
    def _bank(self) -> ProgramBank:
        if self.programs is None:
            raise AudioError("the session has not been prepared")
        return self.programs

    @property
    def _rt(self) -> HostRuntime:
        if self.rt is None:
            raise AudioError("the audio output is not open")
        return self.rt

    def _say(self, text: str) -> None:
        self.messages.append(text)

    # ---------------------------------------------------------------- prepare (main thread)
    def prepare(self) -> None:
        """Resolve everything and compile the bank, before any stream exists."""
        o = self.opts
        point_user_folder(o.bank_dir)
        first = bank.load(o.preset)
        for name in o.sets:
            if name not in first.parameters:
                known = ", ".join(first.parameters) or "none"
                raise InputError(f'--set {name}: preset "{first.name}" has no such parameter (it has: {known})')
        if o.learn is not None and o.learn not in first.parameters:
            known = ", ".join(first.parameters) or "none"
            raise InputError(f'--learn {o.learn}: preset "{first.name}" has no such parameter (it has: {known})')

        dev = resolve_output_device(o.device)
        self.device_index, self.hostapi, self.device_name = dev.index, dev.hostapi, dev.name
        self.device_rate = dev.default_rate
        self.rate = float(o.rate) if o.rate is not None else (
            dev.default_rate if 8000 <= dev.default_rate <= 192000 else 48000.0)
        check_output_settings(dev.index, self.rate, dev.default_rate)      # before the long compile
        self.programs = ProgramBank(o, self.rate, self._say, self._program)
        # the guard covers the preset as it starts: with the --set values applied
        for line in self.programs.guard(first.with_values(o.sets) if o.sets else first, fatal=True):
            self._say(f"warning: {first.name}: {line}")
        self.programs.build(first)

    # ---------------------------------------------------------------- MIDI thread
    def _midi_loop(self) -> None:
        """The MIDI thread: poll, parse, translate, push.  Never touches the audio thread."""
        midi = self.midi
        assert midi is not None
        next_check = 0.0
        while not self._midi_stop.is_set():
            try:
                got = midi.poll()
            except MidiError:
                got = []
            for data, stamp in got:
                try:
                    self._on_midi(data, stamp)
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

    def _on_midi(self, data: Any, stamp: int) -> None:
        """One received message (arrival ``stamp`` in ns): log, parse, translate, push."""
        self.midi_received += 1
        log = self._log_midi
        if log is not None and len(log) < LOG_LIMIT:
            log.append((stamp, list(data)))
        msg = parse(data)
        if msg is None:
            self.midi_malformed += 1
            return
        with self._lock:
            events = self.slot.translator.translate(msg)
            rt = self._rt
            for _off, typ, a, b, value in events:
                if typ == V.EV_SUSTAIN:
                    self._pedal = b
                elif typ == V.EV_BEND:
                    rng = self.slot.translator.bend_range
                    self._bend_frac = value / rng if rng else 0.0
                rt.push_at(stamp, typ, a, b, value)

    def _program(self, number: int) -> None:
        """Program change (MIDI thread, inside translate, lock held)."""
        self._bank.switch(number, self._rt, pedal=self._pedal, bend_frac=self._bend_frac)

    # ---------------------------------------------------------------- main thread
    def _counters(self) -> HostCounters:
        with self._lock:
            return self._rt.counters()

    def _open_output(self) -> AudioOutput:
        """The audio output with the current program's kernel in place (not yet started)."""
        o = self.opts
        api = o.midi_api if o.midi_api is not None else default_api(self.hostapi)
        midi = open_midi_input(api, name=o.midi_in, virtual=o.virtual_midi)
        self.midi = midi
        try:
            audio = AudioOutput(device=self.device_index, rate=self.rate, blocksize=o.buffer,
                                channels=2, max_block=o.buffer, latency=o.buffer / self.rate)
        except SheafsynthError:
            midi.close()
            raise
        self.audio = audio
        self.rt = audio.runtime
        self.rt.set_ceiling(1.0 if o.no_limiter else LIMITER_CEILING)
        h = self.inst.handle()
        self.slot.gens[0] = self.rt.set_kernel(h.render_fn, h.state, keep=self.inst)
        if o.report is not None and o.timing_log:
            self._log_midi = MidiLog()
            self._anchors = PairLog() if o.record else None
        return audio

    def _start_stream(self, audio: AudioOutput) -> None:
        """Start recording, the stream, and the optional idle hold and stall probe."""
        o = self.opts
        if o.record is not None:
            audio.start_recording(o.record)
        try:
            audio.open()
        except AudioError as exc:
            if abs(self.device_rate - self.rate) > 1e-6:
                raise AudioError(f"{exc} (the device's own rate is {self.device_rate:g} Hz: "
                                 f"try --rate {self.device_rate:g})") from None
            raise
        if abs(audio.rate - self.rate) > 1e-6:
            raise AudioError(f"the device runs at {audio.rate:g} Hz, not {self.rate:g} Hz; "
                             f"pass --rate {audio.rate:g}")
        self.latency = latency_ms(o.buffer, self.rate, audio.stream_latency)
        if o.shallow_idle:
            self.idle = ShallowIdle().open()
            self._idle_held = self.idle.held
            if not self.idle.held:
                self._say(f"--shallow-idle: {self.idle.reason}; the CPUs may still sleep deeply")
        if o.stall_probe:
            self.probe = StallProbe(o.buffer / self.rate, ticks_per_period=PLAY_TICKS).start()

    def run(self) -> dict:
        """Play until --seconds pass, SIGINT/SIGTERM or the q key; returns the report."""
        o = self.opts
        status = StatusLine(self.out)
        self._print_messages(None)
        audio = self._open_output()
        frames_recorded = 0
        old_handlers: dict[signal.Signals, Any] = {}
        error: BaseException | None = None
        t_start = time.monotonic()
        old_switch = sys.getswitchinterval()
        sys.setswitchinterval(GIL_SWITCH_S)       # the MIDI thread gets the interpreter back quickly
        try:
            self._start_stream(audio)
            t_start = time.monotonic()
            for sig in (signal.SIGINT, signal.SIGTERM):
                old_handlers[sig] = signal.signal(sig, lambda *_: self._stop.set())
            self._midi_thread = threading.Thread(target=self._midi_loop, name="sheafsynth-midi", daemon=True)
            self._midi_thread.start()
            midi_text = self.midi.description if self.midi is not None else "none"
            print(f"playing {self.slot.name} on {self.device_name} ({self.hostapi}), "
                  f"{self.rate:g} Hz, buffer {o.buffer}; {latency_text(self.latency)}; MIDI {midi_text}; "
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
            frames_recorded = self._teardown(audio, error, t_start)
        return self._conclude(frames_recorded, time.monotonic() - t_start)

    def _teardown(self, audio: AudioOutput, error: BaseException | None, t_start: float) -> int:
        """Fade out and close everything; on ``error``, a best-effort report. Returns the frames recorded."""
        o = self.opts
        frames_recorded = 0
        try:
            self._finish()
        finally:
            frames_recorded = audio.stop_recording() if o.record is not None else 0
            audio.close()
            self._read_probe()
            if self.idle is not None:
                self.idle.close()
            if self.midi is not None:
                self.midi.close()
            if error is not None and o.report is not None:       # best effort: counters up to the failure
                try:
                    rep = self._report(frames_recorded, time.monotonic() - t_start)
                    rep["error"] = str(error) or type(error).__name__
                    atomic_write_text(Path(o.report), json.dumps(rep, indent=1) + "\n")
                except Exception:
                    pass
        return frames_recorded

    def _conclude(self, frames_recorded: int, elapsed: float) -> dict:
        """After a clean stop: --save-as, --report, and the stop line."""
        o = self.opts
        if o.save_as:
            self._save(o.save_as)
        report = self._report(frames_recorded, elapsed)
        if o.report is not None:
            atomic_write_text(Path(o.report), json.dumps(report, indent=1) + "\n")
        self._print_messages(None)
        print(f"stopped after {elapsed:.1f} s: {report['callbacks']} callbacks, {xrun_summary(report)}, "
              f"worst callback {100 * report['load_worst']:.0f}% of the block period, "
              f"MIDI {report['midi']['received']} received"
              + (f", recorded {frames_recorded} frames to {o.record}" if o.record else ""),
              file=self.out, flush=True)
        return report

    def _print_messages(self, status: StatusLine | None) -> None:
        """Say what the other threads had to say (main thread)."""
        while self.messages:
            line = self.messages.popleft()
            if status is not None and status.enabled:
                status.say(line)
            else:
                print(f"sheafsynth: {line}", file=self.err)

    def _main_loop(self, status: StatusLine, keys: Keyboard, t_start: float) -> None:
        """Watch the callbacks, keep anchors, draw the status line and read keys until stopped."""
        o = self.opts
        last_cb, last_cb_t = -1, time.monotonic()
        next_status = 0.0
        next_anchor = 0.0
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
                self._draw_status(status, c)
            for key in keys.read():
                self._on_key(key, status)
            time.sleep(MAIN_POLL_S)

    def _draw_status(self, status: StatusLine, c: HostCounters) -> None:
        """Messages, newly learned knobs and the status line (main thread)."""
        self._print_messages(status)
        tr = self.slot.translator
        if len(tr.learned) > self._learned_seen:
            for cc, name in tr.learned[self._learned_seen:]:
                status.say(f"learned: CC {cc} -> {name}")
            self._learned_seen = len(tr.learned)
        if status.enabled:
            period_ns = self.opts.buffer / self.rate * 1e9
            with self._lock:                # the MIDI thread counts out-of-range notes under it
                self._rt.reset_peak()
                out_of_range = self._bank.out_of_range()[0]
            status.show(format_status(StatusInfo(
                preset=self.slot.name, program=self.slot.number,
                voices=self.inst.counters["voices_active"],
                polyphony=self.inst.program.polyphony,
                load=c.cb_last_ns / period_ns, load_p999=c.load_percentile(99.9),
                xruns=c.xruns, peak=c.peak_hold, last_control=tr.counters.last_control,
                midi=self.midi.description if self.midi is not None else "none", learn=tr.learn_target,
                latency_ms=self.latency.get("key_to_sound_ms"), out_of_range=out_of_range)))

    def _on_key(self, key: str, status: StatusLine) -> None:
        """q quits, s saves, l arms learn for the next parameter, ? shows the keys."""
        if key in "qQ":
            self._stop.set()
        elif key in "sS":
            self._save(self.opts.save_as or None)
        elif key in "lL":
            names = [p.name for p in self.inst.program.params]
            for _ in range(len(names)):
                name = names[self._learn_cycle % len(names)]
                self._learn_cycle += 1
                with self._lock:
                    if self._bank.learn(self.slot, name) is None:
                        break
            else:
                status.say("learn: no parameter of this preset can be learned")
        elif key == "?":
            status.say(KEY_HELP)

    def _finish(self) -> None:
        """Stop MIDI, let released notes ring out briefly (TAIL_S), then fade to silence."""
        self._midi_stop.set()
        if self._midi_thread is not None:
            self._midi_thread.join(timeout=5.0)
        if not (self.audio is not None and self.audio.is_open):
            return
        # The MIDI thread has ended: the main thread is now the ring's only producer.
        rt = self._rt
        rt.push(V.EV_RELEASE_ALL)
        deadline = time.monotonic() + TAIL_S
        while time.monotonic() < deadline:
            c = self._counters()
            if self.inst.counters["voices_active"] == 0 and not c.fading_active:
                break
            time.sleep(0.01)
        rt.push(V.EV_ALL_SOUND_OFF)
        time.sleep(3 * self.opts.buffer / self.rate + 0.01)

    # ---------------------------------------------------------------- save / report
    def _save(self, name: str | None) -> Path | None:
        """Current values and control map of the current program as a user preset."""
        if not name:
            name = f"{self.slot.name[:40]}-{time.strftime('%Y%m%d-%H%M%S')}"
        try:
            with self._lock:
                doc = self._bank.current_as_preset()
            path = bank.save_user_preset(doc, name)
        except (PresetError, OSError) as exc:
            self._say(f"could not save preset {name!r}: {exc}")
            return None
        self.saved.append(str(path))
        self._say(f"saved preset {name!r} to {path}")
        return path

    def _report(self, frames_recorded: int, elapsed: float) -> dict:
        """The --report dict (``elapsed`` in s)."""
        c = self._rt.counters()
        kc = {"voices_stolen": 0, "guard_resets": 0, "events_ignored": 0}
        tr_received = tr_ignored = 0
        slots = self._bank.all_slots()
        for slot in slots:
            for inst in slot.instances:
                cn = inst.counters
                for k in kc:
                    kc[k] += cn[k]
            tr_received += slot.translator.counters.received
            tr_ignored += slot.translator.counters.ignored
        m = self.midi
        rep = play_report(
            c, period_ns=self.opts.buffer / self.rate * 1e9,
            head={"preset": self.opts.preset, "final_program": self.slot.name,
                  "rate": self.rate, "buffer": self.opts.buffer, "device": self.device_name,
                  "hostapi": self.hostapi, "seconds": round(elapsed, 3)},
            midi={"port": (m.virtual or m.port_name) if m else None,
                  "received": self.midi_received, "malformed": self.midi_malformed,
                  "ignored": tr_ignored, "translated": tr_received, "errors": self.midi_errors,
                  "lost": m.lost_count if m else 0,
                  "reconnects": m.reconnects if m else 0},
            kernels=kc, frames_recorded=frames_recorded,
            tail={"programs": self._bank.log,
                  "learned": [{"preset": s.name, "cc": cc, "parameter": name}
                              for s in slots for cc, name in s.translator.learned],
                  "saved_presets": self.saved})
        rep["shallow_idle"] = self._idle_held
        rep["latency_ms"] = self.latency or latency_ms(self.opts.buffer, self.rate, None)
        rep["notes_out_of_range"], rep["notes_out_of_range_which"] = self._bank.out_of_range()
        if self._probe_result is not None:
            rep["machine"] = machine_report(*self._probe_result, self._rt, elapsed)
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

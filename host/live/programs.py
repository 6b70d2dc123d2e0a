"""The bank of programs a live session can switch between, and the switch itself.

Every preset of the bank (factory presets, then the user folder; program
numbers follow that listing) is compiled at start-up into two kernel
instances sharing one compiled module, so a program change never compiles
and the instance being faded out is never the one started.  A switch runs on
the MIDI thread (inside the translator, the session lock held): it waits for
the event ring to drain into the old kernel, recalls a retired instance of the
new program and hands it to the audio thread with ``set_kernel``.
Times in s, rates in Hz, frames in samples.
"""

from __future__ import annotations

import copy
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from sheafsynth.engine.analysis import report as analysis
from sheafsynth.engine.errors import InputError, PresetError, SheafsynthError
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.preset import Preset
from sheafsynth.host import bank
from sheafsynth.host.controls import MidiTranslator
from sheafsynth.host.guard import run_guard
from sheafsynth.host.live.options import PlayOptions
from sheafsynth.host.live.runtime import HostRuntime

__all__ = ["ProgramSlot", "ProgramBank", "controls_doc", "point_user_folder", "DRAIN_WAIT_S", "RETIRE_WAIT_S"]

DRAIN_WAIT_S = 0.05        # longest wait for the ring to drain before a switch, s
RETIRE_WAIT_S = 2.0        # longest wait for a faded instance to be released, s


@dataclass
class ProgramSlot:
    """One program of the bank: its preset, two kernel instances (and their kernel generations), its translator."""

    number: int | None
    name: str
    preset: Preset
    defaults: dict[str, float]
    instances: list[Instrument]
    gens: list[int]
    translator: MidiTranslator
    warnings: list[str] = field(default_factory=list)


def controls_doc(translator: MidiTranslator) -> list[dict]:
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


def _checked_before(preset: Preset, rate: float) -> bool:
    """True when the analysis has this preset's report at ``rate`` Hz cached (so guarding it is quick)."""
    try:
        return analysis.is_checked(preset, rate=rate)
    except Exception:   # an analysis that cannot read this preset: treat it as unchecked
        return False


class ProgramBank:
    """The session's programs (``slots``, None where a preset is left out) and the current one.

    ``say`` queues a message line for the main thread; ``on_program`` is what
    every translator calls on a MIDI program change.
    """

    def __init__(self, opts: PlayOptions, rate: float, say: Callable[[str], None],
                 on_program: Callable[[int], None]) -> None:
        self.opts = opts
        self.rate = rate
        self._say = say
        self._on_program = on_program
        self.slots: list[ProgramSlot | None] = []
        self.current: ProgramSlot | None = None
        self.inst: Instrument | None = None
        self.log: list[dict] = []          # {"program", "name", "stamp_ns"} of every switch

    # ---------------------------------------------------------------- start-up (main thread)
    def guard(self, preset: Preset, *, fatal: bool) -> list[str]:
        """The frozen-stability guard's warnings at the session rate (bounded in time, host.guard);
        PresetError when the preset is not stable or its stability is not decided."""
        try:
            return run_guard(preset, self.rate, self.opts.allow_unstable)
        except SheafsynthError as e:
            if fatal:
                raise
            raise PresetError(str(e), preset.name) from None      # the message names --allow-unstable

    def _make_slot(self, number: int | None, name: str, preset: Preset, values: dict[str, float],
                   ramps: dict[str, float] | None = None) -> ProgramSlot:
        o = self.opts
        if ramps is None:       # the proof of the preset as it starts (--set values applied)
            ramps = dict(analysis.ramp_limits(preset.with_values(values) if values else preset, self.rate))
        insts = [Instrument(preset, rate=self.rate, max_block=o.buffer, seed=o.seed + k,
                            limiter=not o.no_limiter, min_ramp_s=ramps) for k in range(2)]
        defaults = {p.name: p.value for p in insts[0].program.params}
        defaults.update(values)
        for inst in insts:
            for pname, v in defaults.items():
                inst.set_now(pname, v)
        channel = None if o.channel is None else o.channel - 1
        tr = MidiTranslator(preset, dict(insts[0].program.param_index), channel=channel,
                            on_program=self._on_program)
        return ProgramSlot(number, name, preset, defaults, insts, [0, 0], tr)

    def _bank_slot(self, number: int, entry: bank.BankEntry) -> ProgramSlot | None:
        """A slot for a bank preset other than the start one, or None (said why) when it is left out."""
        preset = bank.load(str(entry.path))
        if _checked_before(preset, self.rate):
            warnings = self.guard(preset, fatal=False)
            slot = self._make_slot(number, entry.name, preset, {})
        elif entry.origin == "factory" or self.opts.allow_unstable:
            # No analysis at start-up for the rest of the bank (it can take minutes);
            # factory presets are checked by the project's own tests.
            warnings = [f"not checked on this machine yet (`sheafsynth check {entry.name}` "
                        "checks it and lets its knobs move as fast as the proof allows)"]
            slot = self._make_slot(number, entry.name, preset, {}, ramps={})
        else:
            self._say(f"program {number + 1} ({entry.name}) left out: not checked yet; run "
                      f"`sheafsynth check {entry.name}` once (or pass --allow-unstable)")
            return None
        slot.warnings = warnings        # said when the program is chosen
        return slot

    def build(self, first: Preset) -> None:
        """Compile every usable program of the bank; ``first`` (with --set values) is the current one."""
        o = self.opts
        first_path = Path(first.source).resolve() if first.source.endswith(".json") else None
        start: ProgramSlot | None = None
        for number, e in enumerate(bank.entries()):
            if e.error:
                self.slots.append(None)
                continue
            if first_path is not None and e.path.resolve() == first_path:
                start = self._make_slot(number, e.name, first, o.sets)
                self.slots.append(start)
                continue
            try:
                self.slots.append(self._bank_slot(number, e))
            except Exception as exc:  # one bad bank preset must not stop the others
                self._say(f"program {number + 1} ({e.name}) left out: {exc}")
                self.slots.append(None)
        if start is None:
            start = self._make_slot(None, first.name, first, o.sets)
        self.current = start
        self.inst = start.instances[0]
        if o.learn is not None:
            refused = self.learn(start, o.learn)
            if refused:
                raise InputError(f"--learn {o.learn}: {refused}")

    def learn(self, slot: ProgramSlot, parameter: str) -> str | None:
        """Arm learn mode for ``parameter``; returns why it is refused, or None.

        A learned knob spans the parameter's range in the preset's controls,
        the box the stability analysis checked; a parameter no control maps
        was checked only at its value, so it is refused unless --allow-unstable.
        """
        box = analysis.mapped_box(slot.preset)
        if parameter in box:
            slot.translator.learn(parameter, *box[parameter])
            return None
        if self.opts.allow_unstable:
            slot.translator.learn(parameter)
            return None
        mapped = ", ".join(sorted(box)) or "none"
        return (f'no control of "{slot.name}" maps it, so its stability was checked only at its '
                f"value (mapped: {mapped}; --allow-unstable learns it anyway)")

    def current_as_preset(self) -> dict:
        """The current program's preset JSON with the instance's values now (clamped to their ranges;
        a non-finite one back to its default) and the live control map (session lock held)."""
        slot, inst = self.current, self.inst
        if slot is None or inst is None:
            raise PresetError("no program is playing", "save")
        values = {}
        for p in inst.program.params:
            v = inst.values[p.name]
            values[p.name] = min(p.hi, max(p.lo, v)) if math.isfinite(v) else p.value
        doc = copy.deepcopy(slot.preset.with_values(values).raw)
        doc["controls"] = controls_doc(slot.translator)
        return doc

    def all_slots(self) -> list[ProgramSlot]:
        """Every slot once (the start preset may be outside the bank)."""
        return list({id(s): s for s in self.slots + [self.current] if s is not None}.values())

    def out_of_range(self) -> tuple[int, list[int]]:
        """Note-ons every program's translator ignored as outside its playable range: (count, notes sorted)."""
        slots = self.all_slots()
        notes = set().union(*(s.translator.counters.out_of_range_notes for s in slots))
        return sum(s.translator.counters.out_of_range for s in slots), sorted(notes)

    # ---------------------------------------------------------------- program change (MIDI thread)
    def switch(self, number: int, rt: HostRuntime, *, pedal: int, bend_frac: float) -> None:
        """Make program ``number`` current (MIDI thread, inside translate, session lock held).

        ``pedal`` (sustain 0/1) and ``bend_frac`` (bend as a fraction of the
        bend range) carry over to the new program.
        """
        if not 0 <= number < len(self.slots) or self.slots[number] is None:
            self._say(f"program {number + 1}: no usable preset there "
                      f"(the bank has {len(self.slots)}; see `sheafsynth presets`)")
            return
        slot = self.slots[number]
        assert slot is not None
        if slot is self.current:
            return
        # Events already queued belong to the old kernel: let the audio thread take them first.
        deadline = time.monotonic() + DRAIN_WAIT_S
        while time.monotonic() < deadline:
            c = rt.counters()
            if c.events_delivered + c.events_unrouted >= c.events_pushed:
                break
            time.sleep(0.0005)
        k = self._free_instance(slot, rt)
        if k is None:
            self._say(f"program {number + 1} ({slot.name}): still fading out from before; try again")
            return
        inst = slot.instances[k]
        self._recall(slot, inst)
        h = inst.handle()
        slot.gens[k] = rt.set_kernel(h.render_fn, h.state, keep=inst)
        self.current, self.inst = slot, inst
        now = rt.now_ns()
        if pedal:
            rt.push_at(now, V.EV_SUSTAIN, 0, 1, 0.0)
        if bend_frac:
            rt.push_at(now, V.EV_BEND, 0, 0, bend_frac * slot.translator.bend_range)
        self.log.append({"program": number, "name": slot.name, "stamp_ns": now})
        for line in slot.warnings:
            self._say(f"warning: {slot.name}: {line}")

    @staticmethod
    def _free_instance(slot: ProgramSlot, rt: HostRuntime) -> int | None:
        """An instance of ``slot`` the audio thread no longer uses (waits up to RETIRE_WAIT_S)."""
        deadline = time.monotonic() + RETIRE_WAIT_S
        while True:
            retired = rt.counters().retired
            for k, gen in enumerate(slot.gens):
                if gen <= retired:
                    return k
            if time.monotonic() >= deadline:
                return None
            time.sleep(0.002)

    @staticmethod
    def _recall(slot: ProgramSlot, inst: Instrument) -> None:
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


def point_user_folder(bank_dir: str | None) -> None:
    """--bank-dir: make it the user presets folder of this process (InputError if it is a file)."""
    if bank_dir is None:
        return
    folder = Path(bank_dir).expanduser()
    if folder.exists() and not folder.is_dir():
        raise InputError(f"--bank-dir {bank_dir!r} is not a folder")
    os.environ["SHEAFSYNTH_USER_DIR"] = str(folder)

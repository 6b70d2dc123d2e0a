"""MIDI messages -> kernel events: controller map, curves, bend range, pedals.

One translator serves live play and offline render, so a MIDI file and a
keyboard drive an instrument identically.  Message meanings follow the MIDI
1.0 Detailed Specification (MMA): CC 64 sustain (>= 64 down), CC 120 all
sound off, CC 121 reset all controllers, CC 123 all notes off (124-127 also
end all notes), pitch bend 14-bit centred on 8192 with the range set by
RPN 0/0 (default +-2 semitones), channel pressure.

Curves are a table (name -> function of x in [0, 1]) so the schema, the docs
and the code cannot disagree.

Playable range: a note-on outside the preset's declared ``notes`` (lo, hi)
is dropped and counted (``TranslatorCounters.out_of_range`` and the notes in
``out_of_range_notes``); ``render`` and ``play`` report them.  Note-offs
always pass (a note-off for a note that never started does nothing).  What
the stability check covers of pitch today: frozen stability at the lowest,
middle and highest declared notes without bend
(``engine.analysis.report.check_notes``); a field's explicit-scheme limit
at the highest note plus the preset's declared bend range
(``engine.ir.fields.finish_fields``); delay rings sized for the lowest note
minus ``engine.ir.program.MAX_BEND_SEMITONES`` (the kernel clamps bend to
that).  The knob-motion certificate leaves bend out.  A bend range raised
by RPN 0/0 beyond the declared one is taken as sent (the kernel's clamp
still holds); nothing here enforces more.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.preset import ControlSpec, Preset

__all__ = ["CURVES", "curve_value", "Binding", "TranslatorCounters", "MidiTranslator", "DEFAULT_BEND_RANGE",
           "CC_SUSTAIN", "CC_ALL_SOUND_OFF", "CC_RESET", "CC_ALL_NOTES_OFF"]

CURVES: dict[str, Callable[[float, float, float], float]] = {
    "linear": lambda x, lo, hi: lo + (hi - lo) * x,
    "exp": lambda x, lo, hi: lo * (hi / lo) ** x,
}

CC_SUSTAIN, CC_ALL_SOUND_OFF, CC_RESET, CC_ALL_NOTES_OFF = 64, 120, 121, 123
CC_RPN_MSB, CC_RPN_LSB, CC_DATA_MSB, CC_DATA_LSB = 101, 100, 6, 38
DEFAULT_BEND_RANGE = 2.0


def curve_value(spec: ControlSpec, x: float) -> float:
    """Parameter value for a controller position ``x`` in [0, 1] (``spec`` with its range resolved)."""
    if spec.lo is None or spec.hi is None:
        raise PresetError(f"control of {spec.parameter!r} has no resolved range", "controls")
    x = min(1.0, max(0.0, x))
    return CURVES[spec.curve](x, spec.lo, spec.hi)


@dataclass
class Binding:
    """A live controller binding (a preset control, or one made by learn mode)."""

    spec: ControlSpec
    index: int                      # kernel parameter index


@dataclass
class TranslatorCounters:
    """What a translator has seen: messages received and ignored, the last control moved."""

    received: int = 0
    ignored: int = 0                # other channel, unknown or malformed
    out_of_range: int = 0           # note-ons dropped: outside the preset's playable range
    out_of_range_notes: set[int] = field(default_factory=set)   # which notes those were
    last_control: str = ""          # "tone = 0.31 tap weight"


@dataclass
class MidiTranslator:
    """Turns mido messages into kernel event tuples (offset, type, a, b, value).

    Note-ons outside ``preset.notes`` (the playable range, MIDI notes lo..hi)
    give no event and are counted in ``counters``.
    """

    preset: Preset
    param_index: dict[str, int]
    channel: int | None = None      # 0-15, None = omni
    bend_range: float = DEFAULT_BEND_RANGE
    on_program: Callable[[int], None] | None = None
    counters: TranslatorCounters = field(default_factory=TranslatorCounters)

    def __post_init__(self) -> None:
        self.cc_map: dict[int, Binding] = {}
        self.velocity: list[Binding] = []
        self.pressure: list[Binding] = []
        for i, c in enumerate(self.preset.controls):
            if c.source == "pitchbend":
                self.bend_range = c.range_semitones
                continue
            if c.parameter is None:
                raise PresetError("a controller binding needs a parameter", f"controls[{i}]")
            b = Binding(c, self.param_index[c.parameter])
            if c.source == "cc" and c.cc is not None:
                self.cc_map[c.cc] = b
            elif c.source == "velocity":
                self.velocity.append(b)
            elif c.source == "pressure":
                self.pressure.append(b)
        self.default_bend_range = self.bend_range
        self._rpn = (127, 127)
        self.learn_target: str | None = None
        self._learn_range: tuple[float | None, float | None] = (None, None)
        self.learned: list[tuple[int, str]] = []

    # -- learn mode ---------------------------------------------------------
    def learn(self, parameter: str, lo: float | None = None, hi: float | None = None) -> None:
        """Bind the next moved (unreserved) CC to ``parameter``, over lo..hi (default: its range)."""
        if parameter not in self.param_index:
            raise PresetError(f'unknown parameter "{parameter}"', "learn")
        self._learn_range = (lo, hi)
        self.learn_target = parameter

    def bind(self, cc: int, parameter: str, curve: str = "linear",
             lo: float | None = None, hi: float | None = None) -> None:
        """Bind controller ``cc`` to ``parameter`` over ``lo``..``hi`` (default: the parameter's range)."""
        spec = self.preset.parameters[parameter]
        lo = spec.lo if lo is None else lo
        hi = spec.hi if hi is None else hi
        self.cc_map[cc] = Binding(ControlSpec("cc", cc, parameter, curve, lo, hi),
                                  self.param_index[parameter])

    # -- translation --------------------------------------------------------
    def translate(self, msg, offset: int = 0) -> list[tuple]:
        """Kernel events for one mido message (empty when ignored)."""
        self.counters.received += 1
        t = getattr(msg, "type", None)
        ch = getattr(msg, "channel", None)
        if ch is not None and self.channel is not None and ch != self.channel:
            self.counters.ignored += 1
            return []
        if t == "note_on":
            lo, hi = self.preset.notes
            if msg.velocity > 0 and not lo <= msg.note <= hi:
                self.counters.out_of_range += 1
                self.counters.out_of_range_notes.add(msg.note)
                return []
            out = [self._param(b, msg.velocity / 127.0, offset) for b in self.velocity if msg.velocity > 0]
            out.append((offset, V.EV_NOTE_ON, msg.note, msg.velocity, 0.0))
            return out
        if t == "note_off":
            return [(offset, V.EV_NOTE_OFF, msg.note, 0, 0.0)]
        if t == "control_change":
            return self._cc(msg.control, msg.value, offset)
        if t == "pitchwheel":
            # 14-bit, centre 8192: full down is -range, full up +range (8191 steps above centre).
            x = msg.pitch / (8191.0 if msg.pitch > 0 else 8192.0)
            return [(offset, V.EV_BEND, 0, 0, x * self.bend_range)]
        if t == "aftertouch":
            return [self._param(b, msg.value / 127.0, offset) for b in self.pressure]
        if t == "program_change":
            if self.on_program is not None:
                self.on_program(msg.program)
            return []
        self.counters.ignored += 1
        return []

    def _param(self, b: Binding, x: float, offset: int) -> tuple:
        v = curve_value(b.spec, x)
        unit = self.preset.parameters[b.spec.parameter].unit if b.spec.parameter is not None else ""
        self.counters.last_control = f"{b.spec.parameter} = {v:.4g}{(' ' + unit) if unit else ''}"
        return (offset, V.EV_PARAM, b.index, 0, v)

    def _cc(self, cc: int, value: int, offset: int) -> list[tuple]:
        if cc == CC_SUSTAIN:
            return [(offset, V.EV_SUSTAIN, 0, 1 if value >= 64 else 0, 0.0)]
        if cc == CC_ALL_SOUND_OFF:
            return [(offset, V.EV_ALL_SOUND_OFF, 0, 0, 0.0)]
        if cc == CC_RESET:
            # Reset controllers: bend to centre, pedal up; the RPN bend range
            # is kept and the RPN selection goes to null (MIDI RP-015 recommended practice).
            self._rpn = (127, 127)
            return [(offset, V.EV_BEND, 0, 0, 0.0), (offset, V.EV_SUSTAIN, 0, 0, 0.0)]
        if cc == CC_ALL_NOTES_OFF or 124 <= cc <= 127:
            return [(offset, V.EV_ALL_NOTES_OFF, 0, 0, 0.0)]
        if cc == CC_RPN_MSB:
            self._rpn = (value, self._rpn[1])
            return []
        if cc == CC_RPN_LSB:
            self._rpn = (self._rpn[0], value)
            return []
        if cc in (CC_DATA_MSB, CC_DATA_LSB):
            if self._rpn == (0, 0):
                semis = math.floor(self.bend_range)
                cents = round((self.bend_range - semis) * 100)
                if cc == CC_DATA_MSB:
                    semis, cents = value, 0     # a new MSB clears the LSB (MIDI 1.0)
                else:
                    cents = min(value, 99)
                self.bend_range = semis + cents / 100.0
            return []
        if self.learn_target is not None:
            name = self.learn_target
            self.bind(cc, name, lo=self._learn_range[0], hi=self._learn_range[1])
            self.learned.append((cc, name))
            self.learn_target = None
        b = self.cc_map.get(cc)
        if b is None:
            self.counters.ignored += 1
            return []
        return [self._param(b, value / 127.0, offset)]

"""Voice-pool rules and fixed numbers shared by the kernel and the reference.

The C kernel (csrc/ss_kernel_pool.h) and the NumPy reference stepper
(engine.backends.reference.stepper) implement the same voice life cycle; this module holds
the numbers both read (through the step program and the generated C) so the
two cannot drift apart.

Life cycle: FREE -> HELD (note-on) -> SUSTAINED (note-off with the pedal
down) -> RELEASED (note-off, pedal up: the release damping starts) -> FREE
when silent.  A stolen voice goes FADING (a short linear fade), then starts
its pending note at the next block.
"""

from __future__ import annotations

__all__ = ["FREE", "HELD", "SUSTAINED", "RELEASED", "FADING", "STATUS_NAMES",
           "EV_NOTE_ON", "EV_NOTE_OFF", "EV_PARAM", "EV_BEND", "EV_SUSTAIN", "EV_ALL_NOTES_OFF",
           "EV_ALL_SOUND_OFF", "EV_RELEASE_ALL", "EVENT_CODES", "MASK32", "seed_voice", "xorshift32",
           "noise_value", "fade_samples"]

FREE, HELD, SUSTAINED, RELEASED, FADING = 0, 1, 2, 3, 4
STATUS_NAMES = {FREE: "free", HELD: "held", SUSTAINED: "sustained", RELEASED: "released", FADING: "fading"}

# Kernel event types: the IR owns the names and meanings; csrc/ss_abi.h
# (SS_EV_<name>) carries the same codes to C, and engine.backends.c.abi
# refuses to load if the two ever disagree.  Clients (instrument, host)
# import these names from here.
EV_NOTE_ON, EV_NOTE_OFF, EV_PARAM, EV_BEND, EV_SUSTAIN = 1, 2, 3, 4, 5
EV_ALL_NOTES_OFF, EV_ALL_SOUND_OFF, EV_RELEASE_ALL = 6, 7, 8
EVENT_CODES = {"NOTE_ON": EV_NOTE_ON, "NOTE_OFF": EV_NOTE_OFF, "PARAM": EV_PARAM, "BEND": EV_BEND,
               "SUSTAIN": EV_SUSTAIN, "ALL_NOTES_OFF": EV_ALL_NOTES_OFF, "ALL_SOUND_OFF": EV_ALL_SOUND_OFF,
               "RELEASE_ALL": EV_RELEASE_ALL}

MASK32 = 0xFFFFFFFF


def seed_voice(seed: int, started: int) -> int:
    """Per-note noise seed: a 32-bit mix of the render seed and note count."""
    h = (seed * 0x9E3779B1 + started * 0x85EBCA77) & MASK32
    h ^= h >> 16
    h = (h * 0x85EBCA6B) & MASK32
    h ^= h >> 13
    h = (h * 0xC2B2AE35) & MASK32
    h ^= h >> 16
    return h or 1


def xorshift32(x: int) -> int:
    """Marsaglia's xorshift32 step (Marsaglia 2003, "Xorshift RNGs")."""
    x ^= (x << 13) & MASK32
    x ^= x >> 17
    x ^= (x << 5) & MASK32
    return x & MASK32


def noise_value(x: int) -> float:
    """Map a 32-bit state to [-1, 1): the signed integer / 2^31."""
    return (x - (1 << 32) if x & 0x80000000 else x) * (1.0 / 2147483648.0)


def fade_samples(rate: float, fade_s: float) -> int:
    """Length of a fade of ``fade_s`` s at ``rate`` Hz, in samples (at least 1)."""
    return max(1, int(round(fade_s * rate)))

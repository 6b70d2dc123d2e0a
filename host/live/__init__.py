"""Live play: the C runtime (:mod:`.runtime`), audio output (:mod:`.audio`), MIDI input
(:mod:`.midi`), the status line (:mod:`.status`), the stall probe and idle hold, and the
session of ``sheafsynth play`` (:mod:`.options`, :mod:`.programs`, :mod:`.session`, :mod:`.report`).

The audio thread runs C only (csrc/host_rt.c); see each module for its thread rules.
"""

__all__: list[str] = []

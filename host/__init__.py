"""sheafsynth host: the command line and everything around the engine that a player touches.

Sub-packages: :mod:`.commands` (one module a command), :mod:`.live` (runtime,
audio, MIDI, status, the live session), :mod:`.offline` (render to WAV),
:mod:`.bench` (speed measurements).  Modules: :mod:`.cli` (command table,
error choke point), :mod:`.bank` (factory and user presets), :mod:`.controls`
(MIDI -> kernel events).  The host talks to kernels only through
``sheafsynth.engine.instrument``.
"""

__all__: list[str] = []

"""``sheafsynth bench``'s measurements, one module a job; :mod:`.run` runs them all.

:mod:`.context` (shared kernel and C driver), :mod:`.stats`, :mod:`.machine`,
:mod:`.strings`, :mod:`.yardsticks`, :mod:`.fields`, :mod:`.host_overhead`,
:mod:`.compile_load`, :mod:`.denormals`, :mod:`.report` (keys, goals, table).
"""

__all__: list[str] = []

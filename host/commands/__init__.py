"""One module a ``sheafsynth`` command, each exposing ``COMMAND`` (:class:`.shared.Command`).

host/cli.py lists them; :mod:`.shared` holds what several commands use.
"""

__all__: list[str] = []

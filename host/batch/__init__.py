"""Batch jobs spread over a dask.distributed cluster: ``bake`` (sample sets) and ``sweep`` (parameter maps).

Modules: :mod:`.cluster` (clusters, tasks, retries, progress), :mod:`.takes`
(one take rendered until silent, trimmed, measured), :mod:`.bakeset` (the
sample set on disk: WAV files, map.json, reruns), :mod:`.sweep` (the check
over a grid of parameter values), :mod:`.pictures` (contact sheet and heat
map, matplotlib optional).
"""

__all__: list[str] = []

"""The model layer: the network sheaf of a preset and the field sheaves on cell complexes.

Modules: :mod:`.sheaf` (cells, wires, restriction maps; ``sheaf_of``),
:mod:`.cells` (one module per cell kind), :mod:`.complexes`,
:mod:`.field_sheaf`, :mod:`.positions`, :mod:`.spectra`, :mod:`.dense`,
:mod:`.json_checks`.  Imports only the preset layer, errors and locations.
"""

__all__: list[str] = []

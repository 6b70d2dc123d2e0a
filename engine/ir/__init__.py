"""sheafsynth.engine.ir: the step program (program.py: types and rules), its lowering
(lower.py, fields.py for field blocks), pitch tuning (tuning.py) and the voice rules
(voicing.py).  Imports only engine.preset and engine.model."""

__all__: list[str] = []

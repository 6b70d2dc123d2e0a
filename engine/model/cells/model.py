"""The cell model every kind builds: ports, dimensions, affine matrices."""

from __future__ import annotations

from dataclasses import dataclass, field

from sheafsynth.engine.preset.affine import AffineMatrix

__all__ = ["DelaySpec", "CellModel"]


@dataclass(frozen=True)
class DelaySpec:
    """A delay line: fixed ``length`` samples, or tracking the played pitch.

    With ``pitch`` set, the length follows ``ratio`` times the played note's
    frequency (detuned by ``cents``); the compiler subtracts the phase delay
    of the rest of the loop so the loop rings at the note.
    """

    length: int | None = None     # fixed length in samples (>= 1)
    pitch: bool = False
    ratio: float = 1.0
    cents: float = 0.0


@dataclass(frozen=True)
class CellModel:
    """What the lowering needs to know about one cell.

    ``n_in`` / ``n_out`` are the stalk dimensions of its input and output
    ports.  Linear cells carry ``A, B, C, D`` (parameter-affine); a delay
    carries ``delay``.  ``tune`` marks an allpass whose coefficient is set
    from the played pitch (``"pitch-fraction"``).
    """

    name: str
    kind: str
    n_in: int
    n_out: int
    A: AffineMatrix | None = None
    B: AffineMatrix | None = None
    C: AffineMatrix | None = None
    D: AffineMatrix | None = None
    delay: DelaySpec | None = None
    tune: bool = False
    extra: dict = field(default_factory=dict)

    @property
    def n_state(self) -> int:
        if self.delay is not None:
            return -1  # a ring buffer; its length is decided at lowering
        return self.A.rows if self.A is not None else 0

    @property
    def feedthrough(self) -> bool:
        """True when the output depends on the same sample's input."""
        if self.delay is not None:
            return False
        return self.D is not None and not self.D.is_zero

    @property
    def stalk_dim(self) -> int:
        """Dimension of the cell's stalk: its augmented state [inputs ; state]."""
        k = self.n_state
        return self.n_in + (k if k >= 0 else 0)

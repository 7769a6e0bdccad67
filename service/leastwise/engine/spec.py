"""The numerical specification of one model: dimension, forgetting and ridge."""

from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import SpecError

#: Largest number of coefficients a model may have.
MAX_DIM = 512


@dataclass(frozen=True, slots=True)
class Spec:
    """What the engine needs to know about a model.

    Attributes:
        dim: number of coefficients ``d`` (intercept included when the caller adds one).
        forgetting: per-observation forgetting factor ``lambda`` in (0, 1].
        half_life: forgetting by time, in seconds; ``None`` for none. Excludes
            ``forgetting < 1``.
        ridge: ridge start ``delta >= 0``; 0 is the exact start.
    """

    dim: int
    forgetting: float = 1.0
    half_life: float | None = None
    ridge: float = 0.0

    def __post_init__(self) -> None:
        if isinstance(self.dim, bool) or not isinstance(self.dim, int) or not 1 <= self.dim <= MAX_DIM:
            raise SpecError(f"dim must be an integer in 1..{MAX_DIM}")
        lam = float(self.forgetting)
        if not (math.isfinite(lam) and 0.0 < lam <= 1.0):
            raise SpecError("forgetting must be in (0, 1]")
        if self.half_life is not None:
            h = float(self.half_life)
            if not (math.isfinite(h) and h > 0.0):
                raise SpecError("half_life must be a positive number of seconds")
            if lam < 1.0:
                raise SpecError("half_life excludes forgetting < 1")
        ridge = float(self.ridge)
        if not (math.isfinite(ridge) and ridge >= 0.0):
            raise SpecError("ridge must be >= 0")

    @property
    def forgets(self) -> bool:
        """True when old observations lose weight (``lambda < 1`` or a half-life)."""
        return self.forgetting < 1.0 or self.half_life is not None

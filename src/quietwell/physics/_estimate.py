"""A value with its standard error, the result type of every derived quantity."""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["Estimate"]


@dataclass(frozen=True)
class Estimate:
    """A derived quantity and its one-sigma standard error, in the same (SI) units.

    Attributes
    ----------
    value : float
    stderr : float
        Standard error (>= 0). ``nan`` when it could not be determined.
    """

    value: float
    stderr: float

    @property
    def relative(self) -> float:
        """``stderr/|value|`` (dimensionless); ``inf`` for a zero value."""
        return self.stderr / abs(self.value) if self.value != 0 else math.inf

    def __format__(self, spec: str) -> str:
        spec = spec or ".4g"
        return f"{self.value:{spec}} ± {self.stderr:{spec}}"

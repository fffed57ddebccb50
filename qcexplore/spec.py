"""Specification limits."""

from __future__ import annotations

import math
from dataclasses import dataclass

from qcexplore.errors import QCDataError


@dataclass(frozen=True)
class Spec:
    """A specification for the measured characteristic; either limit may be absent.

    A minimum-fill rule has only ``lsl``.

    Examples
    --------
    >>> Spec(lsl=500.0).sides
    ('lower',)
    """

    lsl: float | None = None
    usl: float | None = None
    target: float | None = None

    def __post_init__(self) -> None:
        for name in ("lsl", "usl", "target"):
            value = getattr(self, name)
            if value is None:
                continue
            try:
                number = float(value)
            except (TypeError, ValueError):
                raise QCDataError(
                    f"Spec {name}={value!r} is not a number; give a number or leave it out."
                ) from None
            if not math.isfinite(number):
                raise QCDataError(f"Spec {name}={value!r} must be finite.")
            object.__setattr__(self, name, number)
        if self.lsl is None and self.usl is None:
            raise QCDataError("Spec needs at least one limit: give lsl=, usl= or both.")
        if self.lsl is not None and self.usl is not None and self.lsl >= self.usl:
            raise QCDataError(
                f"Spec lsl={self.lsl} is not below usl={self.usl}; swap or correct the limits."
            )

    @property
    def sides(self) -> tuple[str, ...]:
        """Which sides of the specification are set: ``"lower"``, ``"upper"``."""
        return tuple(
            side for side, limit in (("lower", self.lsl), ("upper", self.usl)) if limit is not None
        )

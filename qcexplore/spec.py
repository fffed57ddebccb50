"""Specification limits."""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass, fields

from qcexplore.data.coding import real_number
from qcexplore.data.coding import shorten as shown
from qcexplore.errors import QCDataError


@dataclass(frozen=True)
class Spec:
    """A specification for the measured characteristic; either limit may be absent.

    A minimum-fill rule has only ``lsl``. The limits are finite numbers with
    ``lsl < usl``; a target lies between them (or on the allowed side of a single limit).

    Examples
    --------
    >>> Spec(lsl=500.0).sides
    ('lower',)
    >>> Spec(lsl=505, usl=495)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Spec lsl=505 is not below usl=495; swap or correct the limits.
    """

    lsl: float | None = None
    usl: float | None = None
    target: float | None = None

    def __post_init__(self) -> None:
        for name in ("lsl", "usl", "target"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, real_number(f"Spec {name}", value))
        lsl, usl, target = self.lsl, self.usl, self.target
        if lsl is None and usl is None:
            raise QCDataError("Spec needs at least one limit: give lsl=, usl= or both.")
        if lsl is not None and usl is not None and not lsl < usl:
            raise QCDataError(
                f"Spec lsl={lsl:g} is not below usl={usl:g}; swap or correct the limits."
            )
        if target is not None and (
            (lsl is not None and target < lsl) or (usl is not None and target > usl)
        ):
            raise QCDataError(
                f"Spec target={target:g} lies outside the limits (lsl={lsl}, usl={usl}); "
                "give a target between them or leave it out."
            )

    @classmethod
    def coerce(cls, spec: object, *, argument: str = "spec") -> Spec | None:
        """A Spec from a Spec, a dict of its arguments or None; anything else is refused.

        Examples
        --------
        >>> Spec.coerce({"lsl": 495, "usl": 505})
        Spec(lsl=495.0, usl=505.0, target=None)
        >>> Spec.coerce({"usll": 505})  # doctest: +ELLIPSIS
        Traceback (most recent call last):
        ...
        qcexplore.errors.QCDataError: spec has no entry 'usll' (did you mean 'usl'?); ...
        >>> Spec.coerce(500)  # doctest: +ELLIPSIS
        Traceback (most recent call last):
        ...
        qcexplore.errors.QCDataError: spec=500 is not a specification; ...
        """
        if spec is None or isinstance(spec, cls):
            return spec
        names = [f.name for f in fields(cls)]
        if isinstance(spec, Mapping):
            unknown = [key for key in spec if key not in names]
            if unknown:
                key = unknown[0]
                close = difflib.get_close_matches(key, names, n=1) if isinstance(key, str) else []
                guess = f" (did you mean {close[0]!r}?)" if close else ""
                raise QCDataError(
                    f"{argument} has no entry {shown(key)}{guess}; its entries are lsl, usl and "
                    "target, e.g. {'lsl': 495.0, 'usl': 505.0}."
                )
            return cls(**spec)
        raise QCDataError(
            f"{argument}={shown(spec)} is not a specification; give qx.Spec(lsl=..., usl=...) or "
            "a dict such as {'lsl': 495.0, 'usl': 505.0}."
        )

    @property
    def sides(self) -> tuple[str, ...]:
        """Which sides of the specification are set: ``"lower"``, ``"upper"``."""
        return tuple(
            side for side, limit in (("lower", self.lsl), ("upper", self.usl)) if limit is not None
        )

    def to_dict(self) -> dict[str, float | None]:
        """The limits and target as plain data (what ``Study.roles()`` and a log hold)."""
        return {"lsl": self.lsl, "usl": self.usl, "target": self.target}

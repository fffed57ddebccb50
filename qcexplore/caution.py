"""The one caution text, chosen by the data: the general caution always, the net-content
caution only where the value is a fill quantity."""

from __future__ import annotations

from typing import Any

GENERAL = (
    "Findings support an investigation; they do not decide product disposition or legal "
    "compliance. Check each one against the process and the way it was sampled before acting."
)
NET_CONTENT = (
    "Net-content compliance is judged by the local weights-and-measures rules and the site's "
    "quality system, not by this tool."
)
#: Units of mass and volume (lower case): a value in one of them is a fill quantity.
FILL_UNITS = frozenset(
    {"g", "kg", "mg", "t", "lb", "lbs", "oz", "ml", "l", "cl", "dl", "fl oz", "gal", "cm3", "m3"}
)


def is_fill_quantity(units: str | None, spec: Any = None) -> bool:
    """Whether a value looks like a fill quantity: mass or volume units, or a minimum-fill spec.

    A specification with a lower limit and no upper limit is the shape of a minimum-fill rule;
    ``spec`` is anything with ``lsl`` and ``usl`` (a ``Spec``, a capability result).

    Examples
    --------
    >>> is_fill_quantity("g"), is_fill_quantity("Nm"), is_fill_quantity(None)
    (True, False, False)
    """
    if units is not None and units.strip().lower() in FILL_UNITS:
        return True
    return getattr(spec, "lsl", None) is not None and getattr(spec, "usl", None) is None


def caution(units: str | None = None, spec: Any = None) -> str:
    """The caution for a study of a value in ``units`` against ``spec``.

    Examples
    --------
    >>> "weights-and-measures" in caution("g"), "weights-and-measures" in caution("mm")
    (True, False)
    """
    return f"{GENERAL} {NET_CONTENT}" if is_fill_quantity(units, spec) else GENERAL

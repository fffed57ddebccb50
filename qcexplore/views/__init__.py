"""The views: one description per analysis, shown by the explorer and printed by the report.

``VIEWS`` is the registry in the order people see the views; :func:`register` adds one (a new
panel is one view module plus its figure). Hosts read the registry and nothing else.
"""

from __future__ import annotations

from qcexplore.options import Options
from qcexplore.views.base import Card, Figure, Shown, View
from qcexplore.views.capability import CapabilityView
from qcexplore.views.chart import ChartView
from qcexplore.views.findings import FindingsView
from qcexplore.views.time import TimeView
from qcexplore.views.variation import VariationView

#: The story first: the findings board, then the views that show the evidence.
VIEWS: list[View] = [FindingsView(), ChartView(), VariationView(), TimeView(), CapabilityView()]


def register(view: View, *, before: str | None = None) -> View:
    """Add a view to the registry (at the end, or before the view named ``before``).

    Examples
    --------
    >>> [v.name for v in VIEWS][:2]
    ['findings', 'chart']
    """
    if any(v.name == view.name for v in VIEWS):
        raise ValueError(f"A view named {view.name!r} is registered already.")
    names = [v.name for v in VIEWS]
    VIEWS.insert(names.index(before) if before in names else len(VIEWS), view)
    return view


def unregister(name: str) -> None:
    """Take a view out of the registry (for tests and plug-ins)."""
    VIEWS[:] = [v for v in VIEWS if v.name != name]


def view_named(name: str) -> View:
    """The registered view of this name."""
    for view in VIEWS:
        if view.name == name:
            return view
    raise KeyError(name)


def option_types() -> dict[str, type[Options]]:
    """The options type of every registered view that has options, by view name."""
    return {v.name: v.options_type for v in VIEWS if v.options_type is not None}


__all__ = [
    "VIEWS",
    "Card",
    "Figure",
    "Shown",
    "View",
    "option_types",
    "register",
    "unregister",
    "view_named",
]

"""The chart kinds, declared once: what computes each, its words, its secondary chart, and which
options and designs it takes.

Everything that offers, checks, computes or draws a chart reads :data:`CHART_KINDS`: the options'
choices and labels, the argument checks, ``control_chart``'s dispatch, ``qx.arl`` and the
figure's titles. A new kind is one family function and one :func:`register_kind` call; the
built-in kinds are registered where their families are dispatched (``chart``).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from qcexplore.stats.charts.request import ChartRequest
    from qcexplore.stats.results import ChartResult

#: The pseudo-kind that picks xbar_r, xbar_s or imr by subgroup size.
AUTO = "auto"
AUTO_LABEL = "chosen by subgroup size"


@dataclass(frozen=True)
class ChartKind:
    """One kind of chart.

    ``family`` computes it from a ``ChartRequest`` (``None`` for a chart that is only drawn as
    part of another: the R, S and MR charts, the moving centre line); ``label`` is the choice's
    words, ``title`` and ``axis`` the figure's; ``secondary`` the kind of the chart drawn under
    it; ``attributes`` counts rather than measurements; ``smoothed`` successive points are
    correlated (never iterated); ``laney`` takes Laney's over-dispersion correction; ``arl``
    ``qx.arl`` computes its run lengths.
    """

    name: str
    label: str
    title: str
    axis: str
    family: Callable[[ChartRequest], ChartResult] | None = None
    secondary: str | None = None
    attributes: bool = False
    smoothed: bool = False
    laney: bool = False
    arl: bool = False


CHART_KINDS: dict[str, ChartKind] = {}


def register_kind(kind: ChartKind) -> ChartKind:
    """Add a kind of chart (refused when its name is taken)."""
    if kind.name in CHART_KINDS or kind.name == AUTO:
        raise ValueError(f"A chart kind named {kind.name!r} is registered already.")
    CHART_KINDS[kind.name] = kind
    return kind


def unregister_kind(name: str) -> None:
    """Take a kind out of the registry (for tests and plug-ins)."""
    CHART_KINDS.pop(name, None)


def chart_kinds(*, attributes: bool | None = None, arl: bool | None = None) -> tuple[str, ...]:
    """The names of the kinds that can be asked for, in registry order, optionally only those
    for counts (``attributes=True``) or measurements (``False``), or with run lengths."""
    return tuple(
        k.name
        for k in CHART_KINDS.values()
        if k.family is not None
        and (attributes is None or k.attributes == attributes)
        and (arl is None or k.arl == arl)
    )


class KindLabels(Mapping[str, str]):
    """The words of every kind that can be asked for, ``"auto"`` first: a live view of the
    registry, so a kind registered later is offered too."""

    def __getitem__(self, name: str) -> str:
        if name == AUTO:
            return AUTO_LABEL
        kind = CHART_KINDS[name]
        if kind.family is None:
            raise KeyError(name)
        return kind.label

    def __iter__(self) -> Iterator[str]:
        return iter((AUTO, *chart_kinds()))

    def __len__(self) -> int:
        return 1 + len(chart_kinds())


KIND_LABELS = KindLabels()

"""The evidence of change shapes that the findings cite: each level's shape over time, the
process's, and which level's change accounts for the process's.

A level of a factor that varies inside subgroups (a nozzle) is compared with the other levels
in the same subgroup; a level of a factor constant inside subgroups (a crew) within the day,
which holds several of its levels when crews rotate by shift (``stats.streams``). Each
comparison is fitted as an offset, a step or a drift (``stats.shape.change_shape``), the
subgroup means likewise, and a changed level is removed from the means to see whether the
process still changes (``stats.streams.explains``).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import pandas as pd

from qcexplore.errors import QCDataError
from qcexplore.stats.shape import ShapeFit, change_shape
from qcexplore.stats.streams import (
    Explanation,
    explains,
    level_share,
    stream_contrast,
    subgroup_means,
)

#: Factors with more levels than this are not fitted level by level (their levels are named
#: by the level tests only).
MAX_LEVELS = 12
#: The block within which a factor constant inside subgroups is compared: the derived day.
DAY = "day"


@dataclass(frozen=True, eq=False)
class ChangeShapes:
    """The shape of each level's difference (``streams``, by ``(factor, level)``), of the
    subgroup means (``process``, ``None`` when too short), and for each changed level whether
    it accounts for the process's change (``explanations``)."""

    streams: Mapping[tuple[str, str], ShapeFit] = field(default_factory=dict)
    process: ShapeFit | None = None
    explanations: Mapping[tuple[str, str], Explanation] = field(default_factory=dict)

    def of(self, factor: str | None, level: str | None) -> ShapeFit | None:
        """The shape of one level's difference, if it was fitted."""
        if factor is None or level is None:
            return None
        return self.streams.get((factor, level))

    def explaining(self) -> list[tuple[str, str]]:
        """The levels whose change accounts for the process's change."""
        return [key for key, e in self.explanations.items() if e.explained]


def change_shapes(
    data: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None,
    relations: Mapping[str, str],
    individuals: bool = False,
) -> ChangeShapes:
    """Fit the change shapes of every level of the factors in ``relations`` (factor ->
    ``"within_subgroup"`` or ``"between_subgroups"``, as ``VariationResult.relation`` says)
    and of the subgroup means.

    A between-subgroups factor is compared within the day (``DAY``, derived from timestamps),
    and is left out without one; a within-subgroup factor within its subgroups. Individual
    values have no subgroups to compare levels in: only the process is fitted then.

    Checked by simulation in tests/test_shape.py (shapes named and onsets dated) and on the
    demo in tests/test_findings.py (nozzle 4 a drift, crew B an offset, the process step
    explained by nozzle 4).
    """
    try:
        means = subgroup_means(data, value=value, subgroup=subgroup, time=time)
        process: ShapeFit | None = change_shape(
            means.values, means.times, means.weights, of="process"
        )
    except QCDataError:  # too few subgroups for a change to be placed
        process = None
    streams: dict[tuple[str, str], ShapeFit] = {}
    explanations: dict[tuple[str, str], Explanation] = {}
    for factor, relation in relations.items():
        block = _block(data, subgroup, relation, individuals)
        levels = data[factor].cat.categories
        if block is None or len(levels) > MAX_LEVELS:
            continue
        for level in levels:
            key = (factor, str(level))
            try:
                series = stream_contrast(
                    data, value=value, factor=factor, level=level, block=block, time=time
                )
                streams[key] = fit = change_shape(series.values, series.times, series.weights)
            except QCDataError:  # a level seen in too few blocks: no shape to fit
                continue
            if process is not None and fit.changed and relation == "within_subgroup":
                share = level_share(data, subgroup=subgroup, factor=factor, level=level, time=time)
                explanations[key] = explains(process, fit, share)
    return ChangeShapes(streams=streams, process=process, explanations=explanations)


def _block(data: pd.DataFrame, subgroup: str, relation: str, individuals: bool) -> str | None:
    if individuals:
        return None
    if relation == "within_subgroup":
        return subgroup
    return DAY if DAY in data.columns else None

"""What every chart family reads: the rows reduced to points, and the options of the chart."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.validate import finite_column
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.kinds import AUTO
from qcexplore.stats.charts.layout import (
    Points,
    exclude_mask,
    point_codes,
    previous,
    starts,
    typical_size,
)
from qcexplore.stats.charts.settings import ChartSettings
from qcexplore.stats.rules import resolve_rules

#: Subgroups of up to this typical size are charted with ranges, larger ones with sds.
RANGE_MAX_SIZE = 9


@dataclass(frozen=True, kw_only=True)
class ChartRequest(ChartSettings):
    """A chart asked for: its settings (``kind`` never ``"auto"``: resolved from the subgroup
    sizes; ``rules`` as rule ids), and its data as points."""

    rules: tuple[str, ...] = ()  # resolved: rule ids, never a rule set's name
    frame: pd.DataFrame
    values: np.ndarray  # per row
    value: str
    points: Points
    prev: np.ndarray  # per point: the previous point of its segment
    rows: np.ndarray  # per point: number of rows
    user_out: np.ndarray  # per point: left out of the estimate by request
    user_labels: tuple
    start: pd.Series | None  # per point: first time of its rows

    @property
    def rule_one(self) -> str:
        """The beyond-limits rule of the chosen rule set: all that EWMA, CUSUM, R, S and MR
        charts use."""
        ids = self.rules
        return "WE1" if "WE1" in ids or (ids and ids[0].startswith("WE")) else "N1"


def auto_kind(rows: np.ndarray) -> str:
    """imr when every point is one value; else by the typical size of the points with
    several values: 2 to ``RANGE_MAX_SIZE`` xbar_r, more xbar_s."""
    # Individuals only when every point is one value: a few lone values (missed samples)
    # must not turn a chart of subgroups into one that refuses them.
    several = rows[rows > 1]
    size = int(typical_size(several)) if several.size else 1
    return "imr" if size == 1 else "xbar_r" if size <= RANGE_MAX_SIZE else "xbar_s"


def chart_request(
    frame: pd.DataFrame, *, value: str, subgroup: str, time: str | None, settings: ChartSettings
) -> ChartRequest:
    """The points of ``frame`` with the settings; ``kind="auto"`` chosen by subgroup size."""
    if len(frame) == 0:
        raise QCDataError("frame: no rows to chart.")
    values = finite_column(frame, value, "value")
    points = point_codes(frame, subgroup, settings.by, settings.limits == "per_stratum")
    user_out, user_labels = exclude_mask(settings.exclude, points)
    rows = np.bincount(points.row_point, minlength=points.sub.size)
    chosen = {
        **settings.settings(),
        "kind": auto_kind(rows) if settings.kind == AUTO else settings.kind,
        "rules": resolve_rules(settings.rules),
    }
    return ChartRequest(
        **chosen, frame=frame, values=values, value=value, points=points,
        prev=previous(points.seg), rows=rows, user_out=user_out, user_labels=user_labels,
        start=starts(frame, time, points) if time is not None else None,
    )  # fmt: skip

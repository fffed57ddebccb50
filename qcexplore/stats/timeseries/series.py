"""The plotted series of a time-structure analysis, and the one sum its models are built from."""

from __future__ import annotations

import numpy as np
import pandas as pd

from qcexplore.data.validate import finite_column, require_columns, require_frame
from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import subgroup_table

#: The fewest points in a series whose time structure is analysed.
MIN_POINTS = 8


def dot(a: np.ndarray, b: np.ndarray) -> float:
    """Sum of a * b. Not BLAS: on a busy machine its threads cost more than the sum."""
    return float(np.einsum("i,i->", a, b))


def plotted_series(data: pd.DataFrame, value: str, subgroup: str, time: str | None) -> pd.DataFrame:
    """The plotted series: ``subgroup, start, mean, n``, one row per subgroup in time order."""
    require_frame(data)
    finite_column(data, value, "value")
    if time is not None:
        require_columns(data, [time], "time")
    series = subgroup_table(data, value=value, subgroup=subgroup, time=time)
    series = series[["subgroup", "start", "mean", "n"]]
    if len(series) < MIN_POINTS:
        raise QCDataError(
            f"time_structure: {len(series)} points in the series; at least {MIN_POINTS} "
            "subgroups (or individual values) in time order are needed."
        )
    if np.ptp(series["mean"].to_numpy()) == 0.0:
        raise QCDataError(
            f"time_structure: the subgroup means of {value!r} are constant; there is no "
            "variation to analyse."
        )
    return series

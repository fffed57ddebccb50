"""Control charts built from per-point sufficient statistics: :func:`control_chart`.

One module per job:

==============  ===============================================================
``chart``       :func:`control_chart`: checks the arguments, picks the family
``request``     the rows reduced to points, with the options (what families read)
``layout``      point and segment codes and per-segment reductions
``fit``         points with limits; the estimate that leaves out points beyond them
``variables``   X-bar/R, X-bar/S, I-MR (and the chart of the means EWMA and CUSUM use)
``ewma``        EWMA with exact time-varying limits
``cusum``       two-sided tabular CUSUM
``attributes``  p, np, c, u (and Laney p', u')
``result``      the plotted chart, its tables and words: a ``ChartResult``
``forecast``    for autocorrelated series: EWMA moving centre line, AR(1) innovations
==============  ===============================================================
"""

from __future__ import annotations

from qcexplore.stats.charts.chart import (
    ATTRIBUTE_KINDS,
    FAMILIES,
    KINDS,
    LIMIT_MODES,
    SIGMA_METHODS,
    VARIABLE_KINDS,
    check_chart_arguments,
    control_chart,
)
from qcexplore.stats.charts.fit import MAX_PASSES

__all__ = [
    "ATTRIBUTE_KINDS",
    "FAMILIES",
    "KINDS",
    "LIMIT_MODES",
    "MAX_PASSES",
    "SIGMA_METHODS",
    "VARIABLE_KINDS",
    "check_chart_arguments",
    "control_chart",
]

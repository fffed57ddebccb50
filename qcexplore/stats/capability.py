"""Process capability against a specification: indices, intervals, ppm and a normality check.

Within-subgroup indices (``cp``, ``cpk``, ``cpl``, ``cpu``) use the short-term sigma the
caller passes with its estimator and effective degrees of freedom (:func:`chart_capability`
takes all three from a control chart's limits); overall indices (``pp``, ``ppk``, ``ppl``,
``ppu``) use the sample standard deviation of all values. Every number here assumes a
normal, stable process; the result says so in ``warnings`` when the data disagree.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.coding import real_number
from qcexplore.data.validate import finite_column, require_frame
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.variables import ESTIMATORS
from qcexplore.stats.results import CapabilityResult, ChartResult

if TYPE_CHECKING:
    from qcexplore.spec import Spec

#: Fewer values than this make the indices too uncertain to quote without a warning.
_SMALL_SAMPLE = 30
#: Normality is doubted when the Anderson-Darling p value falls below this.
_NORMALITY_ALPHA = 0.05
_MIN_VALUES = 3


def anderson_darling_normal(values: np.ndarray) -> tuple[float, float]:
    """Anderson-Darling statistic for normality (mean and sd estimated) and its p value.

    The statistic is the usual A-squared with the normal fitted by the sample mean and
    the sample standard deviation (ddof=1). The p value uses the small-sample adjustment
    A* = A^2 (1 + 0.75/n + 2.25/n^2) and the piecewise exponential approximation of
    D'Agostino and Stephens (1986, Goodness-of-Fit Techniques, table 4.9).

    Checked against ``scipy.stats.anderson`` (statistic) and
    ``statsmodels.stats.diagnostic.normal_ad`` (statistic and p value) in
    tests/test_capability.py.

    Examples
    --------
    >>> a2, p = anderson_darling_normal(np.linspace(-1.5, 1.5, 20))
    >>> round(a2, 3) >= 0.0, 0.0 <= p <= 1.0
    (True, True)
    """
    x = np.sort(np.asarray(values, dtype=np.float64))
    n = x.size
    z = (x - x.mean()) / x.std(ddof=1)
    i = np.arange(1, n + 1)
    # logcdf/logsf keep the tails finite where cdf would round to 0 or 1.
    a2 = -n - np.sum((2 * i - 1) * (stats.norm.logcdf(z) + stats.norm.logsf(z[::-1]))) / n
    a = a2 * (1.0 + 0.75 / n + 2.25 / n**2)
    if a < 0.2:
        p = 1.0 - math.exp(-13.436 + 101.14 * a - 223.73 * a**2)
    elif a < 0.34:
        p = 1.0 - math.exp(-8.318 + 42.796 * a - 59.938 * a**2)
    elif a < 0.6:
        p = math.exp(0.9177 - 4.279 * a - 1.38 * a**2)
    elif a <= 13.0:
        p = math.exp(1.2937 - 5.709 * a + 0.0186 * a**2)
    else:
        p = 0.0
    return float(a2), float(min(max(p, 0.0), 1.0))


def index_interval(
    name: str, value: np.ndarray | float, n: float, df: np.ndarray | float, confidence: float
) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided ``confidence`` limits of a capability index from ``n`` values, its sigma
    on ``df`` degrees of freedom (arrays broadcast, for simulation).

    ``cp``/``pp``: the chi-square interval index * sqrt(chi2_{a/2, df} / df) to
    index * sqrt(chi2_{1 - a/2, df} / df); the others (Cpk, Ppk and the one-sided indices):
    Bissell's (1990) normal approximation index +- z sqrt(1 / (9 n) + index^2 / (2 df)).

    Examples
    --------
    >>> [round(float(x), 3) for x in index_interval("cp", 1.0, 125, 124, 0.95)]
    [0.876, 1.124]
    """
    a = 1.0 - confidence
    value = np.asarray(value, dtype=np.float64)
    df = np.asarray(df, dtype=np.float64)
    if name in ("cp", "pp"):
        low = np.sqrt(stats.chi2.ppf(a / 2.0, df) / df)
        high = np.sqrt(stats.chi2.ppf(1.0 - a / 2.0, df) / df)
        return value * low, value * high
    half = stats.norm.ppf(1.0 - a / 2.0) * np.sqrt(1.0 / (9.0 * n) + value**2 / (2.0 * df))
    return value - half, value + half


def _check_inputs(values: np.ndarray) -> None:
    if values.size < _MIN_VALUES:
        raise QCDataError(
            f"capability: {values.size} values given; at least {_MIN_VALUES} are needed "
            f"(30 or more for indices worth quoting)."
        )
    if np.ptp(values) == 0.0:
        raise QCDataError(
            "capability: all values are identical, so the spread is zero; check the "
            "measurement resolution or the value column."
        )


def _index_rows(
    prefix: str, sigma: float, mean: float, lsl: float | None, usl: float | None
) -> dict[str, float]:
    """Cp-type and Cpk-type indices for one sigma (prefix "c" or "p")."""
    out: dict[str, float] = {}
    if lsl is not None and usl is not None:
        out[f"{prefix}p"] = (usl - lsl) / (6.0 * sigma)
    if lsl is not None:
        out[f"{prefix}pl"] = (mean - lsl) / (3.0 * sigma)
    if usl is not None:
        out[f"{prefix}pu"] = (usl - mean) / (3.0 * sigma)
    out[f"{prefix}pk"] = min(v for k, v in out.items() if k != f"{prefix}p")
    return out


def _histogram(
    values: np.ndarray, mean: float, sd: float, lsl: float | None, usl: float | None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    edges = np.histogram_bin_edges(values, bins="auto")
    counts, edges = np.histogram(values, bins=edges)
    histogram = pd.DataFrame({"left": edges[:-1], "right": edges[1:], "count": counts})
    width = float(edges[1] - edges[0])
    reach = [mean - 4.0 * sd, mean + 4.0 * sd, edges[0], edges[-1]]
    reach += [v for v in (lsl, usl) if v is not None]
    x = np.linspace(min(reach), max(reach), 200)
    # Scaled to counts per bin so the curve sits on the bars of the histogram.
    density = stats.norm.pdf(x, loc=mean, scale=sd) * values.size * width
    return histogram, pd.DataFrame({"x": x, "density": density})


def capability(
    data: pd.DataFrame,
    *,
    value: str,
    spec: Spec,
    sigma_within: float | None = None,
    in_control: bool | None = None,
    confidence: float = 0.95,
    sigma_df: float | None = None,
    estimator: str | None = None,
) -> CapabilityResult:
    """Capability indices with confidence intervals, ppm outside the limits and normality.

    Parameters
    ----------
    data : one row per measurement
    value : the individual measurements (not subgroup means), finite numbers
    spec : the specification (``qcexplore.Spec``, checked when it was made): ``lsl`` and
        ``usl``, either of which may be absent, and the ``target``, kept in the result
        (it does not change the indices)
    sigma_within : short-term standard deviation (for instance R-bar/d2 from the control
        chart). Without it ``cp``/``cpk`` are omitted and a warning says so.
    in_control : whether the chart showed a stable process; ``False`` adds a warning
    confidence : two-sided confidence level of the intervals
    sigma_df, estimator : the effective degrees of freedom of ``sigma_within`` and the
        estimator that gave it (``"range"``, ``"sd"`` or ``"moving_range"``; a chart's
        limits carry both, ``stats.charts.variables.within_sigma_df``). Without ``sigma_df``
        the Cp-type intervals use N - 1, which is too narrow for R-bar/d2 and s-bar/c4 (they
        carry fewer), and ``interval_method`` says so.

    Returns
    -------
    CapabilityResult
        ``indices`` (``index, value, lower, upper``): ``cp``/``pp`` when both limits exist,
        ``cpl``/``cpu``/``ppl``/``ppu`` for each side present and ``cpk``/``ppk`` (the worse
        side). ``ppm`` (``side, observed, expected``) for ``lower``, ``upper`` (sides with a
        limit) and ``total``. ``normality`` (``test, statistic, p``). ``interval_method``
        states the intervals and the degrees of freedom they rest on.

    Notes
    -----
    * Cp = (USL - LSL) / (6 sigma), Cpk = min(mean - LSL, USL - mean) / (3 sigma); the P
      indices use the overall sample standard deviation (ddof=1). Common practice.
    * Intervals (:func:`index_interval`): for Cp and Pp the chi-square distribution of the
      variance, for Cpk, Ppk and the one-sided indices Bissell's (1990) normal
      approximation. The P indices use the N - 1 degrees of freedom of the overall
      standard deviation; the C indices those of the within sigma, ``sigma_df`` (for
      R-bar/d2 from d2 and d3, for s-bar/c4 from c4, common practice; see
      ``stats.charts.variables.within_sigma_df``).
    * Expected ppm comes from the normal with the sample mean and the overall standard
      deviation (what the process delivered over the whole period).
    * Normality: Anderson-Darling with the D'Agostino-Stephens p value
      (see :func:`anderson_darling_normal`).

    Checked against: a centred normal process with Cp = 1 (2700 ppm) and Cp = 1.33 (about
    63 ppm), common practice tables; ``scipy.stats.chi2`` by hand for the Cp interval;
    Bissell's formula by hand; ``statsmodels`` ``normal_ad`` (tests/test_capability.py);
    the coverage of the Cp and Cpk intervals by simulation for subgroups of 2 to 10 and 20
    to 100 subgroups (tests/test_honesty.py).

    Examples
    --------
    >>> from qcexplore.spec import Spec
    >>> rng = np.random.default_rng(1)
    >>> f = pd.DataFrame({"net_g": rng.normal(500.0, 2.0, 100)})
    >>> r = capability(f, value="net_g", spec=Spec(lsl=494.0), sigma_within=2.0)
    >>> r.indices["index"].tolist()
    ['cpl', 'cpk', 'ppl', 'ppk']
    """
    require_frame(data)
    x = finite_column(data, value, "value")
    _check_inputs(x)
    lsl, usl, target = spec.lsl, spec.usl, spec.target
    if sigma_within is not None:
        sigma_within = real_number("sigma_within", sigma_within, lower=0, inclusive=False)
    confidence = real_number("confidence", confidence, lower=0, upper=1, inclusive=False)
    n = x.size
    mean = float(x.mean())
    sd = float(x.std(ddof=1))

    warnings: list[str] = []
    point: dict[str, float] = {}
    if sigma_within is None:
        warnings.append(
            "No within-subgroup sigma was given, so Cp and Cpk are omitted; Pp and Ppk use "
            "the overall standard deviation."
        )
    else:
        point.update(_index_rows("c", sigma_within, mean, lsl, usl))
    point.update(_index_rows("p", sd, mean, lsl, usl))

    if sigma_df is not None:
        sigma_df = real_number("sigma_df", sigma_df, lower=0, inclusive=False)
    within_df = float(n - 1 if sigma_df is None else sigma_df)
    rows = []
    for name, estimate in point.items():
        df = within_df if name.startswith("c") else n - 1.0
        lower, upper = (float(x) for x in index_interval(name, estimate, n, df, confidence))
        rows.append((name, estimate, lower, upper))
    words = ESTIMATORS[estimator].formula if estimator in ESTIMATORS else "the within sigma"
    within_words = (
        f"C indices on the {within_df:.1f} effective degrees of freedom of {words}"
        if sigma_df is not None
        else "C indices on N - 1 degrees of freedom, because those of the within sigma were "
        "not given (too narrow for R-bar/d2 or s-bar/c4, which carry fewer)"
    )
    interval_method = (
        f"{confidence:.0%} intervals: chi-square for Cp and Pp, Bissell's normal "
        f"approximation for Cpk, Ppk and the one-sided indices; "
        + (f"{within_words}; " if sigma_within is not None else "")
        + f"P indices on N - 1 = {n - 1}"
    )
    indices = pd.DataFrame(rows, columns=["index", "value", "lower", "upper"])

    sides: list[tuple[str, float, float]] = []
    if lsl is not None:
        sides.append(("lower", float(np.mean(x < lsl)), float(stats.norm.cdf(lsl, mean, sd))))
    if usl is not None:
        sides.append(("upper", float(np.mean(x > usl)), float(stats.norm.sf(usl, mean, sd))))
    sides.append(("total", sum(s[1] for s in sides), sum(s[2] for s in sides)))
    ppm = pd.DataFrame(
        [(side, 1e6 * obs, 1e6 * exp) for side, obs, exp in sides],
        columns=["side", "observed", "expected"],
    )

    a2, p_normal = anderson_darling_normal(x)
    normality = pd.DataFrame({"test": ["anderson_darling"], "statistic": [a2], "p": [p_normal]})
    if p_normal < _NORMALITY_ALPHA:
        warnings.append(
            f"The values do not look normal (Anderson-Darling p = {p_normal:.3g}); the "
            "indices and the expected ppm assume a normal distribution and may mislead."
        )
    if in_control is False:
        warnings.append(
            "The process was not in statistical control, so the indices do not predict "
            "future performance; remove the special causes first."
        )
    if n < _SMALL_SAMPLE:
        warnings.append(
            f"Only {n} values: the indices are very uncertain (see the intervals); "
            f"{_SMALL_SAMPLE} or more are usual."
        )

    histogram, curve = _histogram(x, mean, sd, lsl, usl)
    return CapabilityResult(
        indices=indices,
        ppm=ppm,
        normality=normality,
        lsl=lsl,
        usl=usl,
        target=target,
        mean=mean,
        sigma_within=float("nan") if sigma_within is None else sigma_within,
        sigma_overall=sd,
        n=n,
        histogram=histogram,
        curve=curve,
        warnings=tuple(warnings),
        interval_method=interval_method,
    )


def chart_capability(
    data: pd.DataFrame, *, value: str, spec: Spec, chart: ChartResult, confidence: float = 0.95
) -> CapabilityResult:
    """:func:`capability` with the within sigma of a control chart of the same values.

    The sigma, its estimator and effective degrees of freedom are the columns ``sigma``,
    ``estimator`` and ``sigma_df`` of the chart's one row of limits (a pooled chart); the
    process counts as in control when no point lies beyond its limits.

    Examples
    --------
    >>> from qcexplore.spec import Spec
    >>> from qcexplore.stats.charts import control_chart
    >>> f = pd.DataFrame({"h": np.repeat(np.arange(25), 5), "w": np.tile(np.arange(5.0), 25)})
    >>> r = chart_capability(f, value="w", spec=Spec(lsl=-4.0, usl=8.0),
    ...                      chart=control_chart(f, value="w", subgroup="h"))
    >>> "90.6 effective degrees of freedom of R-bar/d2" in r.interval_method
    True
    """
    limits = chart.limits
    if len(limits) != 1:
        raise QCDataError(
            f"capability: the chart has {len(limits)} sets of limits; capability takes the "
            "sigma of one, so chart with limits='pooled'."
        )
    row = limits.iloc[0]
    sigma_df = float(row["sigma_df"])
    return capability(
        data,
        value=value,
        spec=spec,
        sigma_within=float(row["sigma"]),
        in_control=not bool(chart.points["beyond"].any()),
        confidence=confidence,
        sigma_df=None if math.isnan(sigma_df) else sigma_df,
        estimator=str(row["estimator"]),
    )

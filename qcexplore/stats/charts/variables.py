"""Variables charts: X-bar/R, X-bar/S and individuals with moving ranges (I-MR).

The chart of the means here is also what the EWMA and CUSUM charts smooth. Choices, with
their sources:

- Within-subgroup sigma with unequal subgroup sizes: the weighted mean of the per-subgroup
  unbiased estimates R_i/d2(n_i) (X-bar/R) or s_i/c4(n_i) (X-bar/S), weights n_i - 1. Each
  term is unbiased for sigma, so the mean is too, and with equal sizes it is exactly
  R-bar/d2(n) or s-bar/c4(n), the textbook estimates (Montgomery, Introduction to
  Statistical Quality Control, ch. 6; from memory). Individuals use MR-bar/d2(2) over
  moving ranges of two consecutive points.
- Limits of a plotted mean: centre +- sigma_level * sigma / sqrt(n_i) (common practice).
- R, S and MR charts: centre d2 sigma (c4 sigma), standard error d3 sigma
  (sqrt(1 - c4^2) sigma), lower limit cut at zero; with 3 sigma and equal sizes these are
  D3/D4 R-bar and B3/B4 s-bar.
- The effective degrees of freedom of the within sigma (:func:`within_sigma_df`) go into the
  limits table beside the estimator's name, for the intervals of capability indices.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from qcexplore.errors import QCDataError
from qcexplore.stats.charts.fit import Estimate, Fit, estimate, fit_limits
from qcexplore.stats.charts.layout import (
    Points,
    moving_range,
    pair_used,
    per_size,
    require,
    seg_mean,
    typical,
    typical_size,
)
from qcexplore.stats.charts.request import RANGE_MAX_SIZE, ChartRequest
from qcexplore.stats.charts.result import (
    Described,
    chart_result,
    excluded_labels,
    limits_table,
    plotted_by_rules,
    points_table,
    segment_methods,
    split_words,
)
from qcexplore.stats.constants import c4, d2, d3
from qcexplore.stats.results import ChartResult
from qcexplore.stats.subgroups import GroupMoments, group_moments


def moving_range_sigma(
    x: np.ndarray, used: np.ndarray, prev: np.ndarray, points: Points, shortfall: str
) -> np.ndarray:
    """MR-bar/d2(2) per segment, over the moving ranges of two consecutive used points."""
    ok = pair_used(used, prev) * 1.0
    require(np.bincount(points.seg, ok, points.n_seg) > 0, points, shortfall)
    return seg_mean(moving_range(x, prev) / d2(2), ok, points.seg, points.n_seg)


def _sd_of_sd(n: int) -> float:
    """Standard deviation of the sample sd of n standard normal values: sqrt(1 - c4^2)."""
    mean_sd = c4(n)
    return math.sqrt(1.0 - mean_sd * mean_sd)


#: Covariance of two consecutive moving ranges |x2 - x1|, |x3 - x2| of independent normal
#: values, in sigma^2: the differences have correlation -1/2, and for two normals of
#: variance 2 and correlation rho, E|UV| = (4/pi)(sqrt(1 - rho^2) + rho arcsin rho) (from
#: memory), so cov = (4/pi)(sqrt(3)/2 + pi/12 - 1).
_MR_LAG1_COV = 4.0 / math.pi * (math.sqrt(3.0) / 2.0 + math.pi / 12.0 - 1.0)


def within_sigma_df(estimator: str, sizes: np.ndarray) -> float:
    """Effective degrees of freedom of a within-subgroup sigma estimate.

    A sigma estimate with variance V sigma^2 carries about nu = 1 / (2 V) degrees of
    freedom, as a pooled standard deviation on nu df does (common practice). ``estimator``:

    * ``"range"``: the mean of R_i/d2(n_i) weighted by n_i - 1 over subgroups of ``sizes``
      (R-bar/d2 for equal sizes), V = sum(w_i^2 (d3_i/d2_i)^2) / (sum w_i)^2; for k
      subgroups of n, nu = k d2^2 / (2 d3^2) (25 subgroups of 5: about 91, not 124);
    * ``"sd"``: the same mean of s_i/c4(n_i), with (1 - c4^2)/c4^2 for (d3/d2)^2;
    * ``"moving_range"``: MR-bar/d2(2) over ``sizes`` = one number, the count of values m:
      M = m - 1 moving ranges of variance (2 - 4/pi) sigma^2 whose neighbours covary by
      ``_MR_LAG1_COV`` sigma^2, so nu is about 0.6 (m - 1).

    Checked by the coverage of the Cp and Cpk intervals built on it (simulation,
    tests/test_honesty.py) and for equal sizes against k d2^2 / (2 d3^2).

    Examples
    --------
    >>> round(within_sigma_df("range", np.full(25, 5)), 1)
    90.6
    """
    sizes = np.asarray(sizes, dtype=np.float64)
    if estimator == "moving_range":
        m = float(sizes.sum()) if sizes.size != 1 else float(sizes[0])
        count = m - 1.0
        if count < 1:
            return float("nan")
        var_mr = 2.0 - 4.0 / math.pi
        v = (count * var_mr + 2.0 * (count - 1.0) * _MR_LAG1_COV) / (count * d2(2)) ** 2
        return 1.0 / (2.0 * v)
    sizes = sizes[sizes >= 2]
    if sizes.size == 0:
        return float("nan")
    if estimator == "range":
        ratio = per_size(lambda n: d3(n) / d2(n), sizes) ** 2
    elif estimator == "sd":
        ratio = per_size(lambda n: (1.0 - c4(n) ** 2) / c4(n) ** 2, sizes)
    else:
        raise QCDataError(f"estimator={estimator!r}: use 'range', 'sd' or 'moving_range'.")
    w = sizes - 1.0
    return float(w.sum() ** 2 / (2.0 * np.sum(w * w * ratio)))


@dataclass(frozen=True)
class SigmaBase:
    """One estimator of the within-subgroup sigma, the spread chart it goes with, and the
    words that describe both."""

    name: str  # the estimator, as the limits table names it: "range", "sd", "moving_range"
    words: str  # "average range"
    formula: str  # "R-bar/d2"
    term: str  # the per-subgroup estimate averaged with unequal sizes
    factor_name: str  # the spread chart's centre in sigma
    mean_factor: Callable[[int], float]  # E[statistic] / sigma for n values
    sd_factor: Callable[[int], float]  # sd(statistic) / sigma for n values
    statistic: Callable[[GroupMoments, np.ndarray], np.ndarray]  # per point: R_i, s_i, MR_i
    chart: tuple[str, str, str]  # the spread chart: kind, statistic, words
    points: tuple[str, str]  # what the chart of the means plots: words, statistic
    moving: bool = False  # moving ranges of two consecutive points

    def sizes(self, n: np.ndarray) -> np.ndarray:
        """The number of values behind each statistic: n_i, or 2 for a moving range."""
        return np.full(np.shape(n), 2.0) if self.moving else n

    def factors(self, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """E[statistic] / sigma and sd(statistic) / sigma for the statistics of points of n."""
        if self.moving:  # every moving range is of two values: one call each
            return np.full(np.shape(n), self.mean_factor(2)), np.full(
                np.shape(n), self.sd_factor(2)
            )
        return per_size(self.mean_factor, n), per_size(self.sd_factor, n)

    def within(
        self, m: GroupMoments, used: np.ndarray, prev: np.ndarray, points: Points
    ) -> np.ndarray:
        """The within-subgroup sigma of single values per segment (see the module notes)."""
        if self.moving:
            return moving_range_sigma(
                m.mean, used, prev, points,
                "too few points for a moving range; need two in a row that are not left out.",
            )  # fmt: skip
        terms = self.statistic(m, prev) / per_size(self.mean_factor, m.n)
        weights = np.where(used & (m.n >= 2), m.n - 1.0, 0.0)
        require(
            np.bincount(points.seg, weights, points.n_seg) > 0, points,
            "no subgroup of two or more values to estimate the within-subgroup sigma; "
            "use kind='imr' for individual values.",
        )  # fmt: skip
        return seg_mean(terms, weights, points.seg, points.n_seg)

    def method_words(self, m: GroupMoments, mine: np.ndarray, sigma: float) -> str:
        """The formula and numbers of the within sigma of the points ``mine``."""
        sizes = np.array([2]) if self.moving else m.n[mine & (m.n >= 2)]
        if sizes.size and sizes.min() == sizes.max():
            size = int(sizes[0])
            factor = self.mean_factor(size)
            return (
                f"sigma = {self.formula}({size}) = {sigma * factor:.6g}/{factor:.4f} = {sigma:.6g}"
            )
        return f"sigma = mean of {self.term} weighted by n_i - 1 (unequal sizes) = {sigma:.6g}"

    def degrees_of_freedom(self, m: GroupMoments, used: np.ndarray, points: Points) -> np.ndarray:
        """Per segment, the effective degrees of freedom of the within sigma from its
        ``used`` points (:func:`within_sigma_df`)."""
        out = np.empty(points.n_seg)
        for s in range(points.n_seg):
            mine = used & (points.seg == s)
            sizes = np.array([float(mine.sum())]) if self.moving else m.n[mine]
            out[s] = within_sigma_df(self.name, sizes)
        return out


RANGE = SigmaBase(
    name="range", words="average range", formula="R-bar/d2", term="R_i/d2(n_i)",
    factor_name="d2", mean_factor=d2, sd_factor=d3, statistic=lambda m, prev: m.range,
    chart=("r", "range", "Subgroup ranges"), points=("subgroup means", "mean"),
)  # fmt: skip
SD = SigmaBase(
    name="sd", words="average standard deviation", formula="s-bar/c4", term="s_i/c4(n_i)",
    factor_name="c4", mean_factor=c4, sd_factor=_sd_of_sd, statistic=lambda m, prev: m.sd,
    chart=("s", "sd", "Subgroup standard deviations"), points=("subgroup means", "mean"),
)  # fmt: skip
MOVING_RANGE = SigmaBase(
    name="moving_range", words="average moving range", formula="MR-bar/d2", term="MR_i/d2(2)",
    factor_name="d2", mean_factor=d2, sd_factor=d3,
    statistic=lambda m, prev: moving_range(m.mean, prev),
    chart=("mr", "moving_range", "Moving ranges"), points=("individual values", "value"),
    moving=True,
)  # fmt: skip
#: The within-subgroup sigma estimators by name.
ESTIMATORS = {base.name: base for base in (RANGE, SD, MOVING_RANGE)}


def _overall_sigma(
    m: GroupMoments, used: np.ndarray, prev: np.ndarray, points: Points
) -> np.ndarray:
    spread = group_moments(m.mean[used], points.seg[used], points.n_seg)
    require(spread.n > 1, points, "too few points for a standard deviation; need two.")
    return spread.sd


@dataclass(frozen=True)
class PointSigma:
    """A sigma of the plotted points taken from the points themselves, and its words."""

    limits_words: str
    method_words: str  # formatted with the sigma
    estimate: Callable[[GroupMoments, np.ndarray, np.ndarray, Points], np.ndarray]


#: ``sigma_method`` other than "within": the sigma of a plotted point, not of single values.
POINT_SIGMAS = {
    "between_means": PointSigma(
        "the moving range of the plotted means (MR-bar/d2)",
        "sigma of a plotted mean = MR-bar/d2(2) of the means = {:.6g}",
        MOVING_RANGE.within,
    ),
    "overall": PointSigma(
        "the standard deviation of the plotted points (for comparison only)",
        "sigma of the plotted points = their standard deviation {:.6g}",
        _overall_sigma,
    ),
}


@dataclass(frozen=True)
class Means:
    """The points as subgroup moments, and the within-subgroup sigma they call for."""

    m: GroupMoments
    base: SigmaBase

    def of(self, value: str) -> str:
        """What is plotted, in words: "subgroup means of w"."""
        return f"{self.base.points[0]} of {value}"


def means_of(req: ChartRequest) -> Means:
    """The subgroup moments of the points; refuses sizes that the chart cannot take."""
    if req.size is not None:
        raise QCDataError(f"size= is for p, np and u charts, not kind={req.kind!r}.")
    points = req.points
    m = group_moments(req.values, points.row_point, points.sub.size, counts=req.rows)
    if req.kind == "imr" and np.any(m.n > 1):
        worst = np.flatnonzero(m.n > 1)[:5]
        raise QCDataError(
            f"kind='imr' needs one value per point, but subgroup(s) "
            f"{points.sub_labels[points.sub[worst]].tolist()!r} hold several; use "
            "kind='xbar_r' (or sigma_method='between_means' for a chart of the means)."
        )
    base = {"xbar_r": RANGE, "xbar_s": SD}.get(req.kind)
    if base is None:
        size = typical_size(m.n)
        base = MOVING_RANGE if size == 1 else RANGE if size <= RANGE_MAX_SIZE else SD
    if base.moving and np.any(m.n > 1):
        raise QCDataError(
            f"kind={req.kind!r}: most subgroups hold one value, but some hold several; chart "
            "individual values (one per subgroup) or use larger subgroups throughout."
        )
    return Means(m, base)


def _spread_fit(req: ChartRequest, means: Means, t_n: np.ndarray, within: np.ndarray) -> Fit:
    """The R, S or MR chart: centre and standard error of the statistic from the within sigma."""
    base, m, seg = means.base, means.m, req.points.seg
    t_sizes = base.sizes(t_n)
    (mid, spread), (t_mid, t_spread) = base.factors(m.n), base.factors(t_sizes)
    w = within[seg]
    return fit_limits(
        base.statistic(m, req.prev), mid * w, spread * w, within, t_sizes, t_mid * within,
        t_spread * within, req.sigma_level, low=0.0,
    )  # fmt: skip


def means_fit(
    req: ChartRequest, means: Means, used: np.ndarray, *, spread_chart: bool = False
) -> tuple[Fit, Fit | None]:
    """The chart of the means on the ``used`` points, and its R, S or MR chart if asked."""
    points, m = req.points, means.m
    seg, n_seg = points.seg, points.n_seg
    n = m.n.astype(float)
    require(np.bincount(seg, used, n_seg) > 0, points, "every point is left out of the estimate.")
    t_n = typical(n[used], seg[used], n_seg)
    if req.center is None:
        seg_center = seg_mean(m.mean, np.where(used, n, 0.0), seg, n_seg)
    else:
        seg_center = np.full(n_seg, float(req.center))
    given = req.sigma is not None
    within = (
        means.base.within(m, used, req.prev, points) if not given else np.full(n_seg, req.sigma)
    )
    if given or req.sigma_method == "within":
        plotted, se, t_se = within, within[seg] / np.sqrt(n), within / np.sqrt(t_n)
    else:
        plotted = POINT_SIGMAS[req.sigma_method].estimate(m, used, req.prev, points)
        se, t_se = plotted[seg], plotted
    require(
        plotted > 0, points,
        "the sigma estimate is zero (the values do not vary); check the measurement "
        "resolution, or give sigma=.",
    )  # fmt: skip
    primary = fit_limits(
        m.mean, seg_center[seg], se, plotted, t_n, seg_center, t_se, req.sigma_level
    )
    return primary, _spread_fit(req, means, t_n, within) if spread_chart else None


def estimate_means(req: ChartRequest, means: Means, *, spread_chart: bool = False) -> Estimate:
    return estimate(
        lambda used: means_fit(req, means, used, spread_chart=spread_chart),
        ~req.user_out,
        req.iterate,
    )


def means_limits_words(req: ChartRequest, means: Means) -> str:
    if req.sigma is not None:
        return "the given sigma"
    if req.sigma_method in POINT_SIGMAS:
        return POINT_SIGMAS[req.sigma_method].limits_words
    return f"the {means.base.words} ({means.base.formula})"


def means_methods(
    req: ChartRequest, means: Means, fit: Fit, used: np.ndarray, level_words: str
) -> list[str]:
    """For each segment, the formula and numbers behind the limits of a chart of the means."""

    def words(s: int, mine: np.ndarray) -> tuple[str, str]:
        if req.center is not None:
            what = f"centre given = {req.center:.6g}"
        else:
            what = f"centre = grand mean {fit.t_center[s]:.10g}"
        if req.sigma is not None:
            return what, f"sigma given = {req.sigma:.6g}"
        if req.sigma_method in POINT_SIGMAS:
            return what, POINT_SIGMAS[req.sigma_method].method_words.format(fit.sigma[s])
        return what, means.base.method_words(means.m, mine, fit.sigma[s])

    return segment_methods(req.points, used, level_words, words)


def _sigma_source(
    req: ChartRequest, means: Means, used: np.ndarray, sigma_method: str
) -> tuple[str, np.ndarray]:
    """What gave a chart's sigma (``sigma_method`` unless sigma was given), and per segment
    the effective degrees of freedom of a within-subgroup estimate from the ``used`` points
    (NaN for other sigmas)."""
    if req.sigma is not None:
        return "given", np.full(req.points.n_seg, np.nan)
    if sigma_method != "within":
        return sigma_method, np.full(req.points.n_seg, np.nan)
    return means.base.name, means.base.degrees_of_freedom(means.m, used, req.points)


def describe_means(
    req: ChartRequest, means: Means, fit: Fit, used: np.ndarray, level_words: str,
    stat_words: str, statistic: str,
) -> Described:  # fmt: skip
    estimator, sigma_df = _sigma_source(req, means, used, req.sigma_method)
    return Described(
        stat_words=stat_words,
        statistic=statistic,
        limits_words=means_limits_words(req, means),
        sigma_method="given" if req.sigma is not None else req.sigma_method,
        methods=means_methods(req, means, fit, used, level_words),
        estimator=estimator,
        sigma_df=sigma_df,
    )


def _spread_chart(req: ChartRequest, means: Means, est: Estimate) -> ChartResult:
    """The R, S or MR chart beside the chart of the means: beyond-limits rule only, its limits
    from the within-subgroup sigma whatever the chart of the means used."""
    base, fit, given = means.base, est.secondary, req.sigma is not None
    assert fit is not None
    r1 = req.rule_one
    plotted = plotted_by_rules(fit, (r1,), req.sigma_level, "", req.points.segments)
    source = "given" if given else base.formula
    source_words = "the given sigma" if given else f"the {base.words} ({source})"
    methods = [
        f"centre = {base.factor_name} x sigma, sigma = {s:.6g} ({source}); limits at "
        f"{req.sigma_level:g} sigma, lower limit at least 0"
        for s in fit.sigma
    ]
    kind, statistic, words = base.chart
    return ChartResult(
        kind=kind,
        points=points_table(req, plotted, means.m.n, est),
        limits=limits_table(
            req.points, fit, methods, *_sigma_source(req, means, est.used, "within")
        ),
        title=f"{words} of {req.value}, limits from {source_words}, {req.sigma_level:g} sigma, "
        f"beyond-limits rule only{split_words(req)}",
        statistic=statistic,
        sigma_level=float(req.sigma_level),
        sigma_method="given" if given else "within",
        by=req.by,
        limits_mode=req.limits,
        rules=(r1,),
        excluded=excluded_labels(req, est),
        notes=(
            "Limits are centre +- sigma_level standard errors of the range or sd, lower "
            "limit cut at zero; the statistic is skewed, so its false-alarm rate is not "
            "the normal one.",
        ),
    )


def variables_chart(req: ChartRequest) -> ChartResult:
    """X-bar/R, X-bar/S or I-MR: the chart of the means, read by all the rules asked for, with
    its R, S or MR chart as ``secondary``."""
    means = means_of(req)
    est = estimate_means(req, means, spread_chart=True)
    level_words = f"{req.sigma_level:g} sigma"
    plotted = plotted_by_rules(
        est.primary, req.rules, req.sigma_level, level_words, req.points.segments
    )
    described = describe_means(
        req, means, est.primary, est.used, plotted.method_level,
        f"{means.base.points[0].capitalize()} of {req.value}", means.base.points[1],
    )  # fmt: skip
    secondary = _spread_chart(req, means, est)
    return chart_result(req, est, plotted, means.m.n, described, secondary)

"""Attribute charts: p and np (defective items, binomial), c and u (defects, Poisson).

Limits per point from its own size; Laney's p' and u' multiply the standard error by
sigma_z = MR-bar(z)/d2(2) of the standardised points z_i (Laney, Quality Engineering 14,
2002; from memory).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from qcexplore.data.validate import finite_column, row_list
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.fit import Fit, estimate, fit_limits
from qcexplore.stats.charts.layout import require, seg_mean, typical
from qcexplore.stats.charts.request import ChartRequest
from qcexplore.stats.charts.result import (
    Described,
    chart_result,
    plotted_by_rules,
    segment_methods,
)
from qcexplore.stats.charts.variables import moving_range_sigma
from qcexplore.stats.results import ChartResult

_Limits = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray]]


def _p(r: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return r, np.sqrt(r * (1 - r) / s), np.ones_like(s)


def _np(r: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return s * r, np.sqrt(s * r * (1 - r)), s


def _u(r: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return r, np.sqrt(r / s), np.full_like(s, np.inf)


def _c(r: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return r, np.sqrt(r), np.full_like(s, np.inf)


@dataclass(frozen=True)
class AttributeModel:
    """One attribute chart: the centre, standard error and upper bound of a point of size s at
    rate r (``limits``), and the words for them."""

    limits: _Limits
    rate_name: str
    se_words: str
    stat_words: str  # formatted with the value column
    statistic: str
    defectives: bool  # binomial counts of defective items (at most the number inspected)
    sized: bool  # rows carry the number inspected; the rate is per unit inspected
    per_unit: bool  # the plotted statistic is count / number inspected

    @property
    def distribution(self) -> str:
        return "binomial" if self.defectives else "Poisson"


MODELS = {
    "p": AttributeModel(
        _p, "p-bar", "se_i = sqrt(p-bar (1 - p-bar) / n_i)", "Proportion {} per subgroup",
        "proportion", defectives=True, sized=True, per_unit=True,
    ),
    "np": AttributeModel(
        _np, "p-bar", "se_i = sqrt(n_i p-bar (1 - p-bar))", "Number {} per subgroup",
        "count", defectives=True, sized=True, per_unit=False,
    ),
    "c": AttributeModel(
        _c, "c-bar", "se = sqrt(c-bar)", "Count of {} per subgroup",
        "count", defectives=False, sized=False, per_unit=False,
    ),
    "u": AttributeModel(
        _u, "u-bar", "se_i = sqrt(u-bar / n_i)", "{} per unit inspected",
        "rate", defectives=False, sized=True, per_unit=True,
    ),
}  # fmt: skip


def _inspected(req: ChartRequest, model: AttributeModel) -> np.ndarray | None:
    """The number inspected per row (None for c charts); refuses counts that do not fit."""
    counts, value, kind = req.values, req.value, req.kind
    negative = counts < 0
    if negative.any():
        raise QCDataError(
            f"value={value!r}: negative counts in {row_list(np.flatnonzero(negative))}; "
            "counts are zero or more."
        )
    broken = counts != np.round(counts)
    if broken.any():
        raise QCDataError(
            f"value={value!r}: a {kind} chart needs whole-number counts; "
            f"{row_list(np.flatnonzero(broken))} are not."
        )
    if not model.sized:
        if req.size is not None:
            raise QCDataError(
                "size= is not used by c charts (a count per subgroup); use kind='u' for counts "
                "per unit with a size column."
            )
        return None
    if req.size is None:
        raise QCDataError(
            f"kind={kind!r} needs size= (the column with the number inspected per row); "
            "use kind='c' for plain counts per subgroup."
        )
    sizes = finite_column(req.frame, req.size, "size")
    empty = sizes <= 0
    if empty.any():
        raise QCDataError(
            f"size={req.size!r}: zero or negative numbers inspected in "
            f"{row_list(np.flatnonzero(empty))}; give the number of items inspected."
        )
    over = counts > sizes if model.defectives else np.zeros(counts.size, bool)
    if over.any():
        raise QCDataError(
            f"value={value!r}: more defectives than inspected (size={req.size!r}) in "
            f"{row_list(np.flatnonzero(over))}; a {kind} chart counts defective items among "
            "those inspected (use kind='u' for defects per unit)."
        )
    return sizes


def _rate(
    req: ChartRequest, model: AttributeModel, count: np.ndarray, size: np.ndarray,
    used: np.ndarray,
) -> np.ndarray:  # fmt: skip
    """Per segment: the given rate, or the counts of the used points per unit inspected (per
    subgroup for c charts)."""
    seg, n_seg = req.points.seg, req.points.n_seg
    if req.center is not None:
        return np.full(n_seg, float(req.center))
    if not model.sized:
        return seg_mean(count, used * 1.0, seg, n_seg)
    inspected = np.bincount(seg, np.where(used, size, 0.0), n_seg)
    return np.bincount(seg, np.where(used, count, 0.0), n_seg) / inspected


def _fit(
    req: ChartRequest, model: AttributeModel, count: np.ndarray, size: np.ndarray,
    used: np.ndarray,
) -> Fit:  # fmt: skip
    points = req.points
    seg, n_seg = points.seg, points.n_seg
    require(np.bincount(seg, used, n_seg) > 0, points, "every point is left out of the estimate.")
    rate = _rate(req, model, count, size, used)
    t_n = typical(size[used], seg[used], n_seg)
    center_pt, se, high = model.limits(rate[seg], size)
    t_center, t_se, t_high = model.limits(rate, t_n)
    stat = count / size if model.per_unit else count
    unit = model.limits(rate, np.ones(n_seg))[1]  # the sigma of one inspected unit
    if req.laney:
        with np.errstate(invalid="ignore", divide="ignore"):
            z = (stat - center_pt) / se
        sigma_z = moving_range_sigma(
            z, used, req.prev, points, "too few points for Laney's sigma_z."
        )
        se, t_se, unit = se * sigma_z[seg], t_se * sigma_z, unit * sigma_z
    return fit_limits(
        stat, center_pt, se, unit, t_n, t_center, t_se, req.sigma_level,
        low=0.0, high=high, t_high=t_high,
    )  # fmt: skip


def _methods(
    req: ChartRequest, model: AttributeModel, fit: Fit, rate: np.ndarray, used: np.ndarray,
    level_words: str,
) -> list[str]:  # fmt: skip
    """For each segment, the rate and formula behind its limits."""

    def words(s: int, mine: np.ndarray) -> tuple[str, str]:
        if req.center is not None:
            what = f"{model.rate_name} given = {req.center:.6g}"
        else:
            what = f"{model.rate_name} = {rate[s]:.6g}"
        sd = f"{model.se_words}; sigma of one unit = {fit.sigma[s]:.6g}"
        if req.laney:
            sd += " (binomial/Poisson sigma times Laney's MR-bar(z)/d2(2))"
        return what, sd

    return segment_methods(req.points, used, level_words, words)


def attribute_chart(req: ChartRequest) -> ChartResult:
    """p, np, c or u chart (Laney p' or u' with ``laney``), read by all the rules asked for."""
    if req.sigma is not None or req.sigma_method != "within":
        raise QCDataError(
            f"sigma= and sigma_method= are for variables charts; {req.kind} charts take their "
            "sigma from the binomial or Poisson model (laney=True for over-dispersion)."
        )
    model = MODELS[req.kind]
    sizes = _inspected(req, model)
    points, n_points = req.points, req.points.sub.size
    count = np.bincount(points.row_point, req.values, n_points)
    if sizes is None:
        point_n = req.rows.astype(float)
    else:
        point_n = np.bincount(points.row_point, sizes, n_points)
    est = estimate(
        lambda used: (_fit(req, model, count, point_n, used), None), ~req.user_out, req.iterate
    )
    plotted = plotted_by_rules(
        est.primary, req.rules, req.sigma_level, f"{req.sigma_level:g} sigma",
        points.segments, columns={"count": count},
    )  # fmt: skip
    rate = _rate(req, model, count, point_n, est.used)
    if req.laney:
        limits_words = f"Laney {req.kind}' ({model.distribution} sigma x MR-bar(z)/d2)"
    else:
        limits_words = f"the {model.distribution} model"
    sigma_method = "laney" if req.laney else model.distribution.lower()
    described = Described(
        stat_words=model.stat_words.format(req.value),
        statistic=model.statistic,
        limits_words=limits_words,
        sigma_method=sigma_method,
        methods=_methods(req, model, est.primary, rate, est.used, plotted.method_level),
        estimator=sigma_method,
        sigma_df=np.full(points.n_seg, np.nan),
        caveats=("Single-point false-alarm rate from the normal approximation.",),
    )
    return chart_result(req, est, plotted, point_n, described)

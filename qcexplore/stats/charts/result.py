"""The plotted chart and its signals, gathered into a ``ChartResult`` with its tables and words."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from qcexplore.stats.charts.fit import Estimate, Fit
from qcexplore.stats.charts.layout import Points, point_labels
from qcexplore.stats.charts.request import ChartRequest
from qcexplore.stats.results import ChartResult
from qcexplore.stats.rules import fired_rules

#: An extra column of the points table that a family adds (counts, CUSUM's lower sum).
PointColumn = np.ndarray | pd.Categorical


def two_sided_rate(level: float) -> float:
    """P(|Z| > level) for a standard normal Z: 2 * norm.sf(level), checked in the tests.

    math.erfc keeps scipy.stats (a second of import time) off the first chart's path.
    """
    return math.erfc(level / math.sqrt(2.0))


@dataclass(frozen=True)
class Plotted:
    """The primary chart as drawn: its points and limits, which points signal, and why."""

    fit: Fit
    signal: np.ndarray  # per point: a rule fired
    fired: np.ndarray  # per point: the tuple of rules that fired (object array)
    beyond: np.ndarray  # per point: outside its own limits
    rules: tuple[str, ...]
    level: float  # limits at this many standard errors (sigma_level, L or h)
    level_words: str
    false_alarm_rate: float
    columns: dict[str, PointColumn] = field(default_factory=dict)  # extra point columns
    notes: tuple[str, ...] = ()

    @property
    def method_level(self) -> str:
        """The level words with the single-point false-alarm rate, where there is one."""
        if math.isnan(self.false_alarm_rate):
            return self.level_words
        return f"{self.level_words} (single-point false-alarm rate {self.false_alarm_rate:.3%})"


def plotted_by_rules(
    fit: Fit, rules: tuple[str, ...], level: float, level_words: str,
    segments: np.ndarray | None, columns: dict[str, PointColumn] | None = None,
    notes: tuple[str, ...] = (),
) -> Plotted:  # fmt: skip
    """A chart whose limits are at ``level`` standard errors, its points read by ``rules``."""
    signal, fired = fired_rules(
        fit.stat, fit.center, fit.se, rules, sigma_level=level, segments=segments
    )
    return Plotted(
        fit, signal, fired, fit.beyond, rules, level, level_words, two_sided_rate(level),
        columns or {}, notes,
    )  # fmt: skip


def _stratum_column(points: Points, codes: np.ndarray | None, size: int) -> pd.Categorical:
    if points.strat_labels is None or codes is None:
        return pd.Categorical.from_codes(np.full(size, -1), categories=pd.Index([], dtype=object))
    return pd.Categorical.from_codes(codes, categories=points.strat_labels)


def points_table(req: ChartRequest, plotted: Plotted, n: np.ndarray, est: Estimate) -> pd.DataFrame:
    points, fit = req.points, plotted.fit
    table = pd.DataFrame(
        {
            "subgroup": pd.Categorical.from_codes(
                points.sub, categories=points.sub_labels, ordered=True
            ),
            "stratum": _stratum_column(points, points.strat, points.sub.size),
            "stat": fit.stat,
            "center": fit.center,
            "lcl": fit.lcl,
            "ucl": fit.ucl,
            "n": np.array(n),
            "signal": np.asarray(plotted.signal, dtype=bool),
            "rules": plotted.fired,
            "se": fit.se,
            "excluded": req.user_out | est.dropped,
            "beyond": np.asarray(plotted.beyond, dtype=bool),
        },
        # The columns are this table's own arrays (n is shared with the spread chart, hence
        # its copy): taken as they are, not consolidated into blocks, a copy of each.
        copy=False,
    )
    if req.start is not None:
        table["start"] = req.start
    for name, column in plotted.columns.items():
        table[name] = column
    return table


def limits_table(
    points: Points, fit: Fit, methods: list[str], estimator: str, sigma_df: np.ndarray
) -> pd.DataFrame:
    """One row per segment: its limits at the typical size, its sigma, the estimator that gave
    the sigma and that estimate's effective degrees of freedom."""
    codes = np.arange(points.n_seg) if points.n_seg > 1 else None
    return pd.DataFrame(
        {
            "stratum": _stratum_column(points, codes, points.n_seg),
            "center": fit.t_center,
            "lcl": fit.t_lcl,
            "ucl": fit.t_ucl,
            "sigma": fit.sigma,
            "method": methods,
            "n": fit.t_n,
            "se": fit.t_se,
            "estimator": estimator,
            "sigma_df": sigma_df,
        }
    )


def split_words(req: ChartRequest) -> str:
    """How the chart is split, for titles ("" without ``by``)."""
    if req.by is None:
        return ""
    if req.limits == "per_stratum":
        return f", limits per {req.by}"
    return f", points by {req.by}, pooled limits"


def excluded_labels(req: ChartRequest, est: Estimate) -> tuple:
    """The labels given in ``exclude``, then what iteration left out."""
    return req.user_labels + point_labels(est.dropped, req.points)


def _exclusion_notes(req: ChartRequest, est: Estimate) -> list[str]:
    notes = []
    left_out = point_labels(est.dropped, req.points)
    if req.user_labels:
        notes.append(
            f"Left out of the estimate by request: {', '.join(map(str, req.user_labels))}."
        )
    if left_out:
        more = " ..." if len(left_out) > 20 else "."
        notes.append(
            f"Iteration ({est.passes} passes) left {len(left_out)} point(s) beyond the limits "
            f"out of the estimate: {', '.join(map(str, left_out[:20]))}{more}"
        )
    return notes


def segment_methods(
    points: Points, used: np.ndarray, level_words: str,
    words: Callable[[int, np.ndarray], tuple[str, str]],
) -> list[str]:  # fmt: skip
    """For each segment: its centre and sigma in ``words(segment, its used points)``, then
    how many points the estimate used and the level of the limits."""
    texts = []
    for s in range(points.n_seg):
        mine = used & (points.seg == s)
        center, sigma = words(s, mine)
        texts.append(f"{center}; {sigma}; from {int(mine.sum())} points; limits at {level_words}")
    return texts


@dataclass(frozen=True)
class Described:
    """What a family says about its chart: the plotted statistic and where its limits come from."""

    stat_words: str  # "Subgroup means of w"
    statistic: str  # "mean"
    limits_words: str  # "the average range (R-bar/d2)"
    sigma_method: str  # as reported: the method asked for, "given", or the attribute model
    methods: list[str]  # per segment: the formula and numbers behind its limits
    # What gave the sigma: a within-subgroup estimator ("range", "sd", "moving_range"), else
    # the sigma_method; per segment, that estimate's effective degrees of freedom (NaN when
    # the sigma is not a within-subgroup estimate from the data).
    estimator: str
    sigma_df: np.ndarray
    caveats: tuple[str, ...] = ()  # the last notes


def chart_result(
    req: ChartRequest, est: Estimate, plotted: Plotted, n: np.ndarray, described: Described,
    secondary: ChartResult | None = None,
) -> ChartResult:  # fmt: skip
    """The ``ChartResult`` of a primary chart (and its secondary chart, if any)."""
    notes = [*est.notes, *plotted.notes, *_exclusion_notes(req, est), *described.caveats]
    return ChartResult(
        kind=req.kind,
        points=points_table(req, plotted, n, est),
        limits=limits_table(
            req.points, plotted.fit, described.methods, described.estimator, described.sigma_df
        ),
        secondary=secondary,
        title=f"{described.stat_words}, limits from {described.limits_words}, "
        f"{plotted.level_words}{split_words(req)}",
        statistic=described.statistic,
        sigma_level=float(plotted.level),
        sigma_method=described.sigma_method,
        false_alarm_rate=plotted.false_alarm_rate,
        by=req.by,
        limits_mode=req.limits,
        rules=plotted.rules,
        excluded=excluded_labels(req, est),
        notes=tuple(notes),
    )

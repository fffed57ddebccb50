"""Two-sided tabular CUSUM of the means (or individual values).

On standardised means z_i = (x_i - mu0)/se_i: C+_i = max(0, C+_{i-1} + z_i - k),
C-_i = max(0, C-_{i-1} - z_i - k), signal when either exceeds h (Page 1954; Montgomery
ch. 9). Shown in data units: ``stat`` = C+ x se, ``stat_lower`` = -C- x se, limits +-h x se,
where se is the standard error of a mean of the typical size. The change is estimated to have
begun just after the last point where the signalling side was zero (``change_start``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from qcexplore.stats.charts.ewma import LIMITS_ONLY
from qcexplore.stats.charts.fit import fit_limits
from qcexplore.stats.charts.layout import by_segment
from qcexplore.stats.charts.request import ChartRequest
from qcexplore.stats.charts.result import Plotted, chart_result
from qcexplore.stats.charts.variables import describe_means, estimate_means, means_of
from qcexplore.stats.results import ChartResult


def _cusum(z: np.ndarray, index: np.ndarray, k: float) -> tuple[np.ndarray, ...]:
    """Tabular CUSUM by the closed form C_i = S_i - min(0, min_{j<=i} S_j), S = cumsum(z - k).

    Also returns, per point and side, the point just after that side's last zero: where a
    change that the side signals is estimated to have begun.
    """
    here = np.arange(z.size)
    out: list[np.ndarray] = []
    for step in (z - k, -z - k):
        total = np.cumsum(step)
        c = np.maximum(total - np.minimum(np.minimum.accumulate(total), 0.0), 0.0)
        last_zero = np.maximum.accumulate(np.where(c == 0.0, here, -1))
        out += [c, index[np.minimum(last_zero + 1, z.size - 1)]]
    return tuple(out)


def cusum_chart(req: ChartRequest) -> ChartResult:
    """C+ and -C- of the plotted means against +-h standard errors; a point is beyond its
    limits when either sum is."""
    means = means_of(req)
    est = estimate_means(req, means)
    primary, points, k, h = est.primary, req.points, req.k, req.h
    seg = points.seg
    z = (primary.stat - primary.center) / primary.se
    upper, up_start, lower, down_start = by_segment(
        seg, points.n_seg, lambda x, i: _cusum(x, i, k), z, np.arange(z.size)
    )
    unit = primary.t_se[seg]
    zero = np.zeros(points.n_seg)
    fit = fit_limits(
        upper * unit, np.zeros(z.size), unit, primary.sigma, primary.t_n, zero,
        primary.t_se, h,
    )  # fmt: skip
    high, low = upper > h, lower > h
    signal = high | low
    choices = np.empty(2, dtype=object)
    choices[0], choices[1] = (), (req.rule_one,)
    start = np.where(high, up_start, down_start)
    change = pd.Categorical.from_codes(
        np.where(signal, points.sub[start], -1), categories=points.sub_labels, ordered=True
    )
    notes = [
        f"CUSUM (k = {k:g}, h = {h:g}): stat is C+ and stat_lower is -C-, in units of "
        "the standard error of a mean of the typical size; limits are +-h of those units."
    ]
    if signal.any():
        starts = pd.Series(change[signal]).drop_duplicates().tolist()
        notes.append(f"Estimated start of each signalled change: {starts[:20]}.")
    plotted = Plotted(
        fit, signal, choices[signal.astype(np.intp)].tolist(), signal, (req.rule_one,), h,
        f"h = {h:g} standard errors", float("nan"),
        {"stat_lower": 0.0 - lower * unit, "change_start": change}, (*notes, LIMITS_ONLY),
    )  # fmt: skip
    described = describe_means(
        req, means, fit, est.used, plotted.method_level,
        f"Tabular CUSUM (k {k:g}) of {means.of(req.value)}", "cusum",
    )  # fmt: skip
    return chart_result(req, est, plotted, means.m.n, described)

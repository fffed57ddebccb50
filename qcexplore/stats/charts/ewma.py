"""EWMA chart of the means (or individual values).

Exact time-varying limits from Var(z_i) = (1-lam)^2 Var(z_{i-1}) + lam^2 se_i^2, which is
sigma^2/n * lam/(2-lam) * (1 - (1-lam)^(2i)) for equal sizes (Lucas and Saccucci,
Technometrics 1990; from memory). The recursion runs as an array filter, one call per stratum.
"""

from __future__ import annotations

import numpy as np

from qcexplore.stats.charts.fit import fit_limits
from qcexplore.stats.charts.layout import by_segment
from qcexplore.stats.charts.request import ChartRequest
from qcexplore.stats.charts.result import chart_result, plotted_by_rules
from qcexplore.stats.charts.variables import describe_means, estimate_means, means_of
from qcexplore.stats.results import ChartResult

#: Why EWMA and CUSUM charts are read by their limits alone.
LIMITS_ONLY = "Only the limits are used here: successive points are correlated."


def _ewma(dev: np.ndarray, se: np.ndarray, lam: float) -> tuple[np.ndarray, np.ndarray]:
    """EWMA of deviations from the centre (starting at 0) and its exact standard deviation."""
    # Imported here: scipy.signal takes about a second to import, and only EWMA needs it.
    from scipy import signal as sps

    z = sps.lfilter([lam], [1.0, lam - 1.0], dev)
    var = sps.lfilter([lam * lam], [1.0, -((1.0 - lam) ** 2)], se * se)
    return z, np.sqrt(var)


def ewma_chart(req: ChartRequest) -> ChartResult:
    """The EWMA (weight ``lam``) of the plotted means, limits at ``L`` of its standard
    deviations; the beyond-limits rule only."""
    means = means_of(req)
    est = estimate_means(req, means)
    p, lam = est.primary, req.lam
    z, sd = by_segment(
        req.points.seg, req.points.n_seg, lambda d, s: _ewma(d, s, lam), p.stat - p.center, p.se
    )
    shrink = np.sqrt(lam / (2.0 - lam))
    fit = fit_limits(p.center + z, p.center, sd, p.sigma, p.t_n, p.t_center, p.t_se * shrink, req.L)
    plotted = plotted_by_rules(
        fit, (req.rule_one,), req.L, f"L = {req.L:g} (exact time-varying limits)",
        req.points.segments, notes=(LIMITS_ONLY,),
    )  # fmt: skip
    described = describe_means(
        req, means, fit, est.used, plotted.method_level,
        f"EWMA (lambda {lam:g}) of {means.of(req.value)}", "ewma",
    )  # fmt: skip
    return chart_result(req, est, plotted, means.m.n, described)

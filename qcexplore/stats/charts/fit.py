"""A chart's points with their limits, and the estimate that leaves out points beyond them."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

#: Most passes ``iterate=True`` makes before it stops and says so.
MAX_PASSES = 10


@dataclass(frozen=True)
class Fit:
    """One chart's points and limits, and per segment the limits at the typical size."""

    stat: np.ndarray  # per point
    center: np.ndarray
    se: np.ndarray  # standard error of the point: the zone width
    lcl: np.ndarray
    ucl: np.ndarray
    sigma: np.ndarray  # per segment: the sigma the method produced
    t_n: np.ndarray  # per segment: typical size, and the limits at that size
    t_center: np.ndarray
    t_se: np.ndarray
    t_lcl: np.ndarray
    t_ucl: np.ndarray

    @property
    def beyond(self) -> np.ndarray:
        """Points outside their own limits (a NaN point is never beyond)."""
        return (self.stat > self.ucl) | (self.stat < self.lcl)


def limits_from(
    center: np.ndarray, se: np.ndarray, level: float, low: float = -np.inf,
    high: np.ndarray | float = np.inf,
) -> tuple[np.ndarray, np.ndarray]:  # fmt: skip
    half = level * se
    lower, upper = center - half, center + half
    # An infinite bound cuts nothing (and keeps NaN as NaN): skip the pass over the points.
    if low != -np.inf:
        lower = np.maximum(lower, low)
    if np.ndim(high) or high != np.inf:
        upper = np.minimum(upper, high)
    return lower, upper


def fit_limits(
    stat: np.ndarray, center: np.ndarray, se: np.ndarray, sigma: np.ndarray, t_n: np.ndarray,
    t_center: np.ndarray, t_se: np.ndarray, level: float, *, low: float = -np.inf,
    high: np.ndarray | float = np.inf, t_high: np.ndarray | float = np.inf,
) -> Fit:  # fmt: skip
    """Limits at ``level`` standard errors, cut to [low, high]: per point and at typical size."""
    lcl, ucl = limits_from(center, se, level, low, high)
    t_lcl, t_ucl = limits_from(t_center, t_se, level, low, t_high)
    return Fit(stat, center, se, lcl, ucl, sigma, t_n, t_center, t_se, t_lcl, t_ucl)


@dataclass(frozen=True)
class Estimate:
    """The fitted chart (and its R, S or MR chart) and the points its estimate used."""

    primary: Fit
    secondary: Fit | None
    used: np.ndarray  # per point: in the estimate
    dropped: np.ndarray  # per point: left out by iteration
    passes: int
    notes: tuple[str, ...]


def estimate(
    fit: Callable[[np.ndarray], tuple[Fit, Fit | None]], used: np.ndarray, iterate: bool
) -> Estimate:
    """``fit`` on the ``used`` points; with ``iterate``, leave out the points beyond the limits
    (of either chart) and fit again until none are left, at most ``MAX_PASSES`` passes."""
    notes: list[str] = []
    passes, dropped = 1, np.zeros(used.size, bool)
    primary, secondary = fit(used)
    while iterate:
        beyond = used & primary.beyond
        if secondary is not None:
            beyond |= used & secondary.beyond
        if not beyond.any():
            break
        if passes == MAX_PASSES:
            notes.append(
                f"Iteration stopped after {MAX_PASSES} passes with {int(beyond.sum())} "
                "point(s) still beyond the limits."
            )
            break
        used = used & ~beyond
        dropped |= beyond
        passes += 1
        primary, secondary = fit(used)
    return Estimate(primary, secondary, used, dropped, passes, tuple(notes))

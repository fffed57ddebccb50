"""When did one stream start to differ? Step and ramp onsets of a within-subgroup contrast.

A nozzle (or head, cavity) that starts to drift is seen most clearly in the
difference between its values and the other streams' values *in the same
subgroup*: that contrast is free of everything the subgroup shares (the crew and
its scale, the product temperature, the hour). Two change models are fitted to
the contrast by least squares over every candidate onset:

* a step: ``a`` before the onset, ``a + d`` from it on;
* a ramp (segmented regression with one hinge): ``a + b * max(0, t - onset)``.

The model with the smaller residual sum of squares gives the onset. The search
is vectorised with cumulative sums (no loop over candidate onsets). Whether the
change model beats a constant difference at all is tested with the largest F over
every onset and both models, F = ((RSS0 - RSS) / 2) / (RSS / (n - 3)). Searching
makes that F large even without a change, and no published distribution covers the
step and the ramp searched together, so its null distribution is simulated: the same
search on ``NULL_DRAWS`` series of independent normal values (the statistic does not
depend on their mean or scale), seeded and cached per length and search range. The
p-value is the Monte-Carlo one, (1 + #{simulated F >= F}) / (draws + 1) (Davison and
Hinkley, Bootstrap Methods and their Application, 1997, ch. 4; from memory), which cannot
go below 1 / (draws + 1). Far out, the Bonferroni bound (F's tail on 2 and n - 3 degrees of
freedom times the onsets searched), an upper bound on the p-value at every F, is smaller and
is quoted instead, so that a strong change keeps a p-value that says how strong it is.
The simulated series are equally spaced: where subgroups are missing (nights,
weekends) the ramp sees other times, which moves the size by a few thousandths at most
(checked by simulation in tests/test_onset.py).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.coding import category_codes
from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.results import Onset
from qcexplore.stats.subgroups import group_moments

#: Fewest contrast points for the onset's test to be quoted.
_MIN_TESTED = 14
#: Simulated series behind each p-value: its Monte-Carlo standard error at p = 0.05 is
#: sqrt(0.05 * 0.95 / 2000) = 0.005.
NULL_DRAWS = 2000
#: Seed of the simulated series, so that the same data give the same p on every run.
_NULL_SEED = 2126
#: Values simulated at once: holds each working array of a long contrast to 8 MB.
_BLOCK_VALUES = 1 << 20


def _step_rss(y: np.ndarray) -> np.ndarray:
    """Residual sum of squares of a step at each position 1..n-1 (cumulative sums along the
    last axis, so that many series go at once)."""
    n = y.shape[-1]
    c1, c2 = np.cumsum(y, axis=-1), np.cumsum(y * y, axis=-1)
    m = np.arange(1, n)
    left = c2[..., :-1] - c1[..., :-1] ** 2 / m
    right = (c2[..., -1:] - c2[..., :-1]) - (c1[..., -1:] - c1[..., :-1]) ** 2 / (n - m)
    return left + right


def ramp_rss(t: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Residual sum of squares of y = a + b*max(0, t - t[k]) for each hinge k = 1..n-2.

    ``y`` may hold many series along its last axis, all at the times ``t``. With
    x = max(0, t - tau), the sums over the points after the hinge come from reversed
    cumulative sums. They are taken of u = t[-1] - t, the distance to the last point, and
    of y about its mean: a short tail then sums small numbers, where sums of t and t^2
    would cancel (at a million points, t^2 reaches 1e12). Checked against
    ``np.linalg.lstsq`` at every hinge (tests/test_onset.py).

    Examples
    --------
    >>> t = np.arange(6.0)
    >>> ramp_rss(t, np.maximum(0.0, t - 2.0)).round(6).tolist()
    [0.5, 0.0, 0.857143, 3.2]
    """
    n = y.shape[-1]
    tail = lambda v: np.cumsum(v[..., ::-1], axis=-1)[..., ::-1]  # noqa: E731  sums over i >= k
    u = t[-1] - t
    yc = y - y.mean(axis=-1, keepdims=True)
    # Hinges k = 1..n-2; the points strictly after the hinge, i >= k + 1, have
    # x_i = t_i - t_k = reach - u_i: their sums are the tail sums from k + 1 on.
    after_u, after_uu = tail(u)[2:], tail(u * u)[2:]
    after_y, after_uy = tail(yc)[..., 2:], tail(u * yc)[..., 2:]
    reach = u[1:-1]
    m = np.arange(n - 2, 0, -1)
    sum_x = m * reach - after_u
    sum_xx = m * reach * reach - 2.0 * reach * after_u + after_uu
    sxy = reach * after_y - after_uy  # y is centred, so this is already about the means
    syy = np.einsum("...i,...i->...", yc, yc)[..., np.newaxis]
    sxx = sum_xx - sum_x**2 / n
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(sxx > 0, syy - sxy**2 / sxx, np.inf)


def _searched(n: int, min_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Which step positions 1..n-1 and ramp hinges 1..n-2 keep ``min_points`` a side."""
    step_at, hinge_at = np.arange(1, n), np.arange(1, n - 1)
    return (
        (step_at >= min_points) & (step_at <= n - min_points),
        (hinge_at >= min_points) & (hinge_at <= n - min_points),
    )


def _change_rss(t: np.ndarray, y: np.ndarray, min_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Residual sums of squares of the step at positions 1..n-1 and of the ramp at hinges
    1..n-2 (along the last axis of ``y``), infinite where not searched."""
    step_ok, ramp_ok = _searched(y.shape[-1], min_points)
    return np.where(step_ok, _step_rss(y), np.inf), np.where(ramp_ok, ramp_rss(t, y), np.inf)


@lru_cache(maxsize=64)
def _null_ratios(n: int, min_points: int) -> np.ndarray:
    """The smallest RSS / RSS0 over both change models and every onset searched, for
    ``NULL_DRAWS`` series of n independent normal values at equal spacing, sorted.

    The smallest ratio is the largest F: F = ((1 - r) / 2) / (r / (n - 3)).
    """
    rng = np.random.default_rng((_NULL_SEED, n, min_points))
    t = np.arange(n, dtype=np.float64)
    block = max(1, _BLOCK_VALUES // n)
    parts = []
    for first in range(0, NULL_DRAWS, block):
        y = rng.standard_normal((min(block, NULL_DRAWS - first), n))
        step, ramp = _change_rss(t, y, min_points)
        rss0 = np.sum((y - y.mean(axis=-1, keepdims=True)) ** 2, axis=-1)
        parts.append(np.minimum(step.min(axis=-1), ramp.min(axis=-1)) / rss0)
    ratios = np.sort(np.concatenate(parts))
    ratios.flags.writeable = False
    return ratios


def change_p(ratio: float, n: int, min_points: int) -> float:
    """The p-value of the best change model's RSS / RSS0 (the largest F over the onsets
    searched) for a contrast of ``n`` points, ``min_points`` on each side: Monte-Carlo, or
    the Bonferroni bound where that is smaller (see the module notes).

    Examples
    --------
    >>> change_p(1.0, 60, 5), change_p(0.5, 60, 5) < 1 / (NULL_DRAWS + 1)
    (1.0, True)
    """
    null = _null_ratios(n, min_points)
    simulated = float((1 + np.searchsorted(null, ratio, side="right")) / (null.size + 1))
    searched = sum(int(ok.sum()) for ok in _searched(n, min_points))
    f = ((1.0 - ratio) / 2.0) / (ratio / (n - 3)) if ratio > 0 else np.inf
    return min(simulated, float(stats.f.sf(f, 2, n - 3)) * searched)


def stream_onset(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    factor: str,
    level: object,
    time: str | None = None,
    min_points: int = 5,
) -> Onset | None:
    """Onset of the difference between one level of a within-subgroup factor and the rest.

    Parameters
    ----------
    frame : the study frame (internal data contract of ``qcexplore.stats``)
    value, subgroup, factor : column names; ``factor`` must vary within subgroups
    level : the level whose contrast with the other levels is examined, matched by its
        label (``4`` and ``"4"`` name the same level)
    time : the time column, to report the onset as a time and a ramp per day
    min_points : fewest subgroups on each side of an onset

    Returns ``None`` when fewer than ``2 * min_points`` subgroups hold both the
    level and another level. ``p`` (see the module notes) is NaN below 14 points.

    Checked by simulation against planted steps and ramps (tests/test_onset.py):
    the step model's onset equals the least-squares position found by brute force; the
    statistic is the F built from statsmodels OLS residual sums of squares of the constant
    and of the fitted change model, and ``p`` agrees with a null simulated by a separate
    brute-force search; with no change, ``p < 0.05`` as often as 5 % allows, and a step of
    0.87 sd is found as often as the calibrated test finds it.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> sg = np.repeat(np.arange(60), 2)
    >>> lv = np.tile(["a", "b"], 60)
    >>> y = rng.normal(0, 0.1, 120) + np.where((lv == "a") & (sg >= 40), 1.0, 0.0)
    >>> f = pd.DataFrame({"sg": pd.Categorical(sg, ordered=True), "f": pd.Categorical(lv), "y": y})
    >>> stream_onset(f, value="y", subgroup="sg", factor="f", level="a").position
    40
    """
    needed = [c for c in (value, subgroup, factor, time) if c is not None]
    require_columns(frame, needed, "a stream_onset column")
    if not isinstance(frame[subgroup].dtype, pd.CategoricalDtype):
        raise QCDataError(
            f"stream_onset: the subgroup column {subgroup!r} must be an ordered categorical "
            "in time order (the Study's frame has one)."
        )
    if (
        isinstance(min_points, bool)
        or not isinstance(min_points, (int, np.integer))
        or min_points < 1
    ):
        raise QCDataError(f"stream_onset: min_points={min_points!r} must be at least 1.")
    values = finite_column(frame, value, "value")
    codes = frame[subgroup].cat.codes.to_numpy()
    k = len(frame[subgroup].cat.categories)
    # Compared as text: findings and tables pass levels as their labels, while the
    # column's categories may be numbers (nozzle 4 and "4" are the same level). The labels
    # are compared once each, not once per row.
    level_codes, labels = category_codes(frame[factor])
    is_level = np.isin(level_codes, np.flatnonzero(labels.astype(str) == str(level)))
    inside = group_moments(values[is_level], codes[is_level], k)
    outside = group_moments(values[~is_level], codes[~is_level], k)
    both = (inside.n > 0) & (outside.n > 0)
    if both.sum() < 2 * min_points:
        return None
    y = (inside.mean - outside.mean)[both]
    positions = np.flatnonzero(both)
    has_time = time is not None and pd.api.types.is_datetime64_any_dtype(frame[time].dtype)
    first: np.ndarray | pd.Index
    if has_time:
        starts = frame[time].groupby(codes).min()
        first = starts.reindex(positions).to_numpy()
        t = (pd.to_datetime(first) - pd.to_datetime(first[0])) / pd.Timedelta(days=1)
        t = np.asarray(t, dtype=np.float64)
    else:
        first = frame[subgroup].cat.categories[positions]
        t = positions.astype(np.float64)

    n = y.size
    step, ramp = _change_rss(t, y, min_points)
    best_step, best_ramp = int(np.argmin(step)), int(np.argmin(ramp))
    if step[best_step] <= ramp[best_ramp]:
        model, rss = "step", float(step[best_step])
        at = best_step + 1
        position, start = at, first[at]
        before, change = float(y[:at].mean()), float(y[at:].mean() - y[:at].mean())
    else:
        model, rss = "ramp", float(ramp[best_ramp])
        hinge = best_ramp + 1
        slope, intercept = np.polyfit(np.maximum(0.0, t - t[hinge]), y, 1)
        position, start = hinge + 1, first[hinge]
        before, change = float(intercept), float(slope)
    p = np.nan
    if n >= _MIN_TESTED and rss > 0:
        p = change_p(rss / float(np.sum((y - y.mean()) ** 2)), n, min_points)
    return Onset(
        factor=factor,
        level=str(level),
        model=model,
        position=position,
        start=start,
        before=before,
        change=change,
        scale="day" if has_time else "subgroup",
        rss=rss,
        p=p,
    )

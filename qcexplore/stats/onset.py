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
change model beats a constant difference at all is an F test on two extra
parameters (the onset and the change), F = ((RSS0 - RSS) / 2) / (RSS / (n - 3)),
its p-value multiplied by the number of onsets searched (Bonferroni).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.coding import category_codes
from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.results import Onset
from qcexplore.stats.subgroups import group_moments

#: Fewest contrast points for the onset's F test to be quoted.
_MIN_TESTED = 14


def _step_rss(y: np.ndarray) -> np.ndarray:
    """Residual sum of squares of a step at each position 1..n-1 (cumulative sums)."""
    n = y.size
    c1, c2 = np.cumsum(y), np.cumsum(y * y)
    m = np.arange(1, n)
    left = c2[:-1] - c1[:-1] ** 2 / m
    right = (c2[-1] - c2[:-1]) - (c1[-1] - c1[:-1]) ** 2 / (n - m)
    return left + right


def ramp_rss(t: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Residual sum of squares of y = a + b*max(0, t - t[k]) for each hinge k = 1..n-2.

    With x = max(0, t - tau), the sums over the points after the hinge come from
    reversed cumulative sums. They are taken of u = t[-1] - t, the distance to the last
    point, and of y about its mean: a short tail then sums small numbers, where sums of t
    and t^2 would cancel (at a million points, t^2 reaches 1e12). Checked against
    ``np.linalg.lstsq`` at every hinge (tests/test_onset.py).

    Examples
    --------
    >>> t = np.arange(6.0)
    >>> ramp_rss(t, np.maximum(0.0, t - 2.0)).round(6).tolist()
    [0.5, 0.0, 0.857143, 3.2]
    """
    n = y.size
    tail = lambda v: np.cumsum(v[::-1])[::-1]  # noqa: E731  sums over i >= k
    u = t[-1] - t
    yc = y - y.mean()
    # Hinges k = 1..n-2; the points strictly after the hinge, i >= k + 1, have
    # x_i = t_i - t_k = reach - u_i: their sums are the tail sums from k + 1 on.
    after_u, after_uu = tail(u)[2:], tail(u * u)[2:]
    after_y, after_uy = tail(yc)[2:], tail(u * yc)[2:]
    reach = u[1:-1]
    m = np.arange(n - 2, 0, -1)
    sum_x = m * reach - after_u
    sum_xx = m * reach * reach - 2.0 * reach * after_u + after_uu
    sxy = reach * after_y - after_uy  # y is centred, so this is already about the means
    syy = float(np.einsum("i,i->", yc, yc))
    sxx = sum_xx - sum_x**2 / n
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(sxx > 0, syy - sxy**2 / sxx, np.inf)


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
    the step model's onset equals the least-squares position found by brute force;
    ``p`` equals the F test built from statsmodels OLS residual sums of squares of the
    constant and of the fitted change model; with no change, ``p < 0.05`` no more
    often than 5 % allows.

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
    if has_time:
        starts = frame[time].groupby(codes).min()
        first = starts.reindex(positions).to_numpy()
        t = (pd.to_datetime(first) - pd.to_datetime(first[0])) / pd.Timedelta(days=1)
        t = np.asarray(t, dtype=np.float64)
    else:
        first = frame[subgroup].cat.categories[positions]
        t = positions.astype(np.float64)

    n = y.size
    valid_step, valid_ramp = np.arange(1, n), np.arange(1, n - 1)
    allowed_step = (valid_step >= min_points) & (valid_step <= n - min_points)
    allowed_ramp = (valid_ramp >= min_points) & (valid_ramp <= n - min_points)
    step = np.where(allowed_step, _step_rss(y), np.inf)
    ramp = np.where(allowed_ramp, ramp_rss(t, y), np.inf)
    best_step, best_ramp = int(np.argmin(step)), int(np.argmin(ramp))
    if step[best_step] <= ramp[best_ramp]:
        model, rss = "step", float(step[best_step])
        at = int(valid_step[best_step])
        position, start = at, first[at]
        before, change = float(y[:at].mean()), float(y[at:].mean() - y[:at].mean())
    else:
        model, rss = "ramp", float(ramp[best_ramp])
        hinge = int(valid_ramp[best_ramp])
        slope, intercept = np.polyfit(np.maximum(0.0, t - t[hinge]), y, 1)
        position, start = hinge + 1, first[hinge]
        before, change = float(intercept), float(slope)
    p = np.nan
    if n >= _MIN_TESTED and rss > 0:
        rss0 = float(np.sum((y - y.mean()) ** 2))
        f = ((rss0 - rss) / 2.0) / (rss / (n - 3))
        searched = int(allowed_step.sum() + allowed_ramp.sum())
        p = min(1.0, float(stats.f.sf(f, 2, n - 3)) * searched)
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

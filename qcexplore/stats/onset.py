"""When did one stream start to differ? Step and ramp onsets of a within-subgroup contrast.

A nozzle (or head, cavity) that starts to drift is seen most clearly in the
difference between its values and the other streams' values *in the same
subgroup*: that contrast is free of everything the subgroup shares (the crew and
its scale, the product temperature, the hour). Two change models are fitted to
the contrast by least squares over every candidate onset:

* a step: ``a`` before the onset, ``a + d`` from it on;
* a ramp (segmented regression with one hinge): ``a + b * max(0, t - onset)``.

The model with the smaller residual sum of squares gives the onset. The search
is vectorised with cumulative sums (no loop over candidate onsets).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import group_moments


@dataclass(frozen=True)
class Onset:
    """The fitted onset of a change in a stream's contrast with the other streams."""

    model: str  # "step" or "ramp"
    position: int  # index into the contrast series of the first point after the onset
    start: object  # the subgroup start (time) at the onset, or the subgroup label
    before: float  # mean contrast before the onset
    change: float  # step size (step) or slope per unit of `scale` (ramp)
    scale: str  # "day" when the subgroups have times, else "subgroup"
    rss: float


def _step_rss(y: np.ndarray) -> np.ndarray:
    """Residual sum of squares of a step at each position 1..n-1 (cumulative sums)."""
    n = y.size
    c1, c2 = np.cumsum(y), np.cumsum(y * y)
    m = np.arange(1, n)
    left = c2[:-1] - c1[:-1] ** 2 / m
    right = (c2[-1] - c2[:-1]) - (c1[-1] - c1[:-1]) ** 2 / (n - m)
    return left + right


def _ramp_rss(t: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Residual sum of squares of y = a + b*max(0, t - t[k]) for each hinge k = 1..n-2.

    With x = max(0, t - tau), the sums over the points after the hinge come from
    reversed cumulative sums of t, t^2, y and t*y.
    """
    n = y.size
    tail = lambda v: np.cumsum(v[::-1])[::-1]  # noqa: E731  sums over i >= k
    s1, s2, sy, sty = tail(t), tail(t * t), tail(y), tail(t * y)
    k = np.arange(1, n - 1)
    tau = t[k]
    # points strictly after the hinge: i >= k + 1
    m = n - (k + 1)
    st, stt, sy_after, sty_after = s1[k + 1], s2[k + 1], sy[k + 1], sty[k + 1]
    sum_x = st - m * tau
    sum_xx = stt - 2 * tau * st + m * tau * tau
    sum_xy = sty_after - tau * sy_after
    syy = np.sum((y - y.mean()) ** 2)
    sxx = sum_xx - sum_x**2 / n
    sxy = sum_xy - sum_x * y.sum() / n
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
    level and another level.

    Checked by simulation against planted steps and ramps (tests/test_onset.py):
    the step model's onset equals the least-squares position found by brute force.

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
    # column's categories may be numbers (nozzle 4 and "4" are the same level).
    is_level = (frame[factor].astype(str) == str(level)).to_numpy()
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
    step = _step_rss(y)
    ramp = _ramp_rss(t, y)
    valid_step = np.arange(1, n)
    valid_ramp = np.arange(1, n - 1)
    step = np.where((valid_step >= min_points) & (valid_step <= n - min_points), step, np.inf)
    ramp = np.where((valid_ramp >= min_points) & (valid_ramp <= n - min_points), ramp, np.inf)
    best_step, best_ramp = int(np.argmin(step)), int(np.argmin(ramp))
    if step[best_step] <= ramp[best_ramp]:
        at = int(valid_step[best_step])
        return Onset(
            model="step",
            position=at,
            start=first[at],
            before=float(y[:at].mean()),
            change=float(y[at:].mean() - y[:at].mean()),
            scale="day" if has_time else "subgroup",
            rss=float(step[best_step]),
        )
    hinge = int(valid_ramp[best_ramp])
    x = np.maximum(0.0, t - t[hinge])
    slope, intercept = np.polyfit(x, y, 1)
    return Onset(
        model="ramp",
        position=hinge + 1,
        start=first[hinge],
        before=float(intercept),
        change=float(slope),
        scale="day" if has_time else "subgroup",
        rss=float(ramp[best_ramp]),
    )

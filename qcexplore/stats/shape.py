"""Which shape does a change have: a constant offset, a step at a time, or a drift from a time?

Three mean models are fitted to one series by generalised least squares:

* ``offset``: ``y = a`` (a constant difference; for the process, no change: ``"none"``);
* ``step``: ``y = a`` before the onset ``k``, ``a + d`` from point ``k`` on;
* ``drift``: ``y = a + b * max(0, t - t_k)`` (flat, then a straight ramp from ``t_k``).

The noise may be autocorrelated: AR(1) in the order of the points, ``e_i = phi e_{i-1} +
u_i``, the variance of point ``i`` divided by its weight. Each model's Gaussian likelihood is
profiled over the onset and over ``phi`` on a grid (the Prais-Winsten transform: the exact
likelihood, first point included). Why: subgroup means wander (product temperature, raw
material), and a white-noise fit calls every wander a step or a drift. A stream's series
is its difference from the other levels *within the same subgroup* (or block of time,
:mod:`qcexplore.stats.streams`), which cancels everything the subgroup shares, the wandering
process level included; its noise is then near white and ``phi`` stays near 0.

The criterion (stated in ``ShapeFit.CRITERION``) is a Bayesian information criterion,
``-2 log L + penalty``: ``3 log n`` for the constant (level, ``phi``, noise variance), and two
more parameters for a step or a drift (the onset and the change), costing ``2 log n`` but at
least ``CHANGE_COST``. The floor is about the 97th percentile of the largest likelihood
ratio over onsets of a flat series with AR(1) noise (``phi`` 0 to 0.6, 20 to 700 points;
600 to 2000 simulated series each): such series are then called changed in 1-4 % of cases,
where plain BIC's ``2 log n`` (9.0 at 90 points) calls 6-15 % of them changed at 90 points
and up to 37 % at 20 (tests/test_shape.py repeats a few of these cells). Step and
drift cost the same, so between them the likelihood decides. ``margin`` is the second-best
criterion minus the best.

The search is vectorised over onsets and ``phi`` with tail sums (no loop over onsets):
after the transform a step's regressor is the transformed constant from the onset on, and
a ramp's is ``G_i - t_k C_i`` (``G`` the transformed time, ``C`` the transformed constant).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.validate import finite_array
from qcexplore.errors import QCDataError

#: The AR(1) coefficients over which each model's likelihood is profiled.
PHI_GRID = np.round(np.arange(-0.9, 0.951, 0.05), 2)
#: The least a step or a drift must gain in -2 log L over the constant (see the module notes).
CHANGE_COST = 13.0
#: Onsets whose -2 log L is within this of the best form the onset's 95 % range.
_RANGE_LR = float(stats.chi2.ppf(0.95, 1))
#: Fewest points that the noise, its ``phi`` and a change are fitted to.
_MIN_SERIES = 8
SHAPES = ("offset", "step", "drift")


def _tail(v: np.ndarray) -> np.ndarray:
    """Sums over positions ``j..n-1`` along the last axis, with a zero appended for ``j = n``."""
    sums = np.cumsum(v[..., ::-1], axis=-1)[..., ::-1]
    return np.concatenate([sums, np.zeros(v.shape[:-1] + (1,))], axis=-1)


def _transform(v: np.ndarray, phi: np.ndarray) -> np.ndarray:
    """Prais-Winsten transform of ``v`` (already scaled by root weights), one row per ``phi``."""
    out = np.empty((phi.size, v.size))
    out[:, 0] = np.sqrt(1.0 - phi**2) * v[0]
    out[:, 1:] = v[1:] - phi[:, None] * v[:-1]
    return out


def _rss(
    y: np.ndarray, t: np.ndarray, w: np.ndarray, phi: np.ndarray, min_points: int
) -> dict[str, np.ndarray]:
    """Residual sums of squares of the transformed regressions, shape ``(phi, onset)``.

    Column ``k`` is the onset: a step's first point at the new level, a drift's last flat
    point. Onsets leaving fewer than ``min_points`` points on either side are ``inf``.
    """
    n = y.size
    r = np.sqrt(w)
    y = y - np.average(y, weights=w)  # every model has a constant; centred, nothing cancels
    u = t - t[-1]  # the tail sums then add small numbers near the end of a long series
    big_y, big_c, big_g = (_transform(v, phi) for v in (r * y, r, r * u))
    cc, cy = _tail(big_c * big_c), _tail(big_c * big_y)
    rss0 = np.einsum("ij,ij->i", big_y, big_y) - cy[:, 0] ** 2 / cc[:, 0]

    def less(xx: np.ndarray, xc: np.ndarray, xy: np.ndarray) -> np.ndarray:
        # rss0 less what a second column x explains beyond the constant.
        num = xy - xc * (cy[:, :1] / cc[:, :1])
        den = xx - xc**2 / cc[:, :1]
        with np.errstate(invalid="ignore", divide="ignore"):
            return rss0[:, None] - np.where(den > 1e-12 * xx, num**2 / den, 0.0)

    k = np.arange(n)
    after = k + 1
    # A step at k: x_k = r_k (nothing before it to subtract), x_i = C_i after it.
    step = less(
        r**2 + cc[:, after],
        r * big_c + cc[:, after],
        r * big_y + cy[:, after],
    )
    gg, gc, gy = _tail(big_g * big_g), _tail(big_g * big_c), _tail(big_g * big_y)
    drift = less(
        gg[:, after] - 2.0 * u * gc[:, after] + u**2 * cc[:, after],
        gc[:, after] - u * cc[:, after],
        gy[:, after] - u * cy[:, after],
    )
    step[:, (k < min_points) | (k > n - min_points)] = np.inf
    drift[:, (k < min_points - 1) | (k > n - min_points - 1)] = np.inf
    return {"offset": np.broadcast_to(rss0[:, None], (phi.size, n)), "step": step, "drift": drift}


def _m2ll(
    y: np.ndarray, t: np.ndarray, w: np.ndarray, grid: np.ndarray, min_points: int
) -> dict[str, np.ndarray]:
    """-2 log L (less constants shared by the shapes) at each ``(phi, onset)``."""
    n = y.size
    floor = 1e-12 * float(np.sum(w * (y - y.mean()) ** 2)) + 1e-300  # an exact fit
    jacobian = -np.log(1.0 - grid**2)[:, None]
    return {
        model: n * np.log(np.maximum(rss, floor) / n) + jacobian
        for model, rss in _rss(y, t, w, grid, min_points).items()
    }


def _time_axis(times: object, origin: object) -> np.ndarray:
    """Times as floats from ``origin``: days for timestamps, else the times' own unit."""
    stamps = np.asarray(times).ravel()
    if stamps.dtype.kind == "M":  # the common case, without pandas' per-call cost
        days = (stamps - np.asarray(origin, dtype="datetime64[ns]")) / np.timedelta64(1, "D")
        return np.asarray(days, dtype=np.float64)
    if isinstance(origin, (pd.Timestamp, np.datetime64)):  # time-zone aware: elapsed days
        return np.asarray((pd.DatetimeIndex(stamps) - pd.Timestamp(origin)) / pd.Timedelta(days=1))
    return finite_array(stamps, "change_shape times") - float(origin)  # type: ignore[arg-type]


def _moment(stamps: np.ndarray, i: int) -> object:
    """The time of point ``i`` as people read it: a Timestamp, or the number given."""
    return pd.Timestamp(stamps[i]) if stamps.dtype.kind == "M" else stamps[i]


def _series(
    values: object, times: object, weights: object, min_points: object
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, str]:
    """The checked inputs: values, the times as given, the time axis, weights, slope unit."""
    if isinstance(min_points, bool) or not isinstance(min_points, (int, np.integer)):
        raise QCDataError(f"change_shape: min_points={min_points!r} must be a whole number.")
    y = finite_array(values, "change_shape values")
    n, least = y.size, max(_MIN_SERIES, 2 * max(int(min_points), 2) + 1)
    if min_points < 2 or n < least:
        raise QCDataError(
            f"change_shape: {n} points with min_points={min_points}; a change needs at least "
            f"2 points a side and {least} points in all."
        )
    stamps = np.arange(n) if times is None else np.asarray(times).ravel()
    if stamps.size != n:
        raise QCDataError(f"change_shape: {stamps.size} times for {n} values; give one each.")
    t = _time_axis(stamps, stamps[0])
    back = np.flatnonzero(np.diff(t) < 0)
    if back.size:
        raise QCDataError(
            f"change_shape: the times go back at point {back[0] + 2}; sort the series by time."
        )
    w = np.ones(n) if weights is None else finite_array(weights, "change_shape weights")
    if w.size != n or np.any(w <= 0):
        raise QCDataError(f"change_shape: give {n} positive weights, one per value.")
    if times is None:
        unit = "point"
    else:
        timed = stamps.dtype.kind == "M" or isinstance(stamps[0], pd.Timestamp)
        unit = "day" if timed else "time unit"
    return y, stamps, t, w, unit


def onset_likelihood(
    values: object,
    times: object = None,
    weights: object = None,
    *,
    phi: float | None = None,
    min_points: int = 5,
) -> Mapping[str, np.ndarray]:
    """-2 log L of each shape at each onset (up to a constant shared by the three shapes).

    ``phi=None`` profiles the AR(1) coefficient over ``PHI_GRID`` at each onset; a number
    fixes it. Entry ``k`` of ``"step"`` is a step whose first new point is ``k``, of
    ``"drift"`` a ramp from ``t_k``; ``inf`` where the onset leaves fewer than
    ``min_points`` points a side. ``"offset"`` repeats the constant's value at every ``k``.

    Checked against statsmodels OLS (``phi=0``) and GLS with the AR(1) covariance matrix
    (``-2 llf``) on the step and ramp designs at every onset (tests/test_shape.py).

    Examples
    --------
    >>> m2ll = onset_likelihood(np.r_[np.zeros(10), np.ones(10)] + np.arange(20) % 2 / 10)
    >>> int(np.argmin(m2ll["step"]))
    10
    """
    y, _, t, w, _ = _series(values, times, weights, min_points)
    grid = PHI_GRID if phi is None else np.array([float(phi)])
    if np.any(np.abs(grid) >= 1):
        raise QCDataError(f"onset_likelihood: phi={phi!r} must lie strictly between -1 and 1.")
    out = {}
    for model, m2ll in _m2ll(y, t, w, grid, int(min_points)).items():
        out[model] = m2ll.min(axis=0)
        out[model].setflags(write=False)
    return MappingProxyType(out)


@dataclass(frozen=True, eq=False)
class ShapeFit:
    """The shape of the change in one series, chosen among offset, step and drift.

    ``shape`` is ``"offset"`` (a stream: its difference from the other levels is constant;
    whether that constant differs from zero is the level comparison's question), ``"none"``
    (the process: its level is constant), ``"step"`` or ``"drift"``. ``onset`` is the
    index of the first point at the new level (step) or of the last flat point, where the
    ramp starts (drift), ``start`` that point's time and ``start_range`` the earliest and
    latest onsets whose likelihood ratio to the best is below the 95 % point of
    chi-square(1) (approximate: it held the planted onset in 88-100 % of simulated steps
    and drifts). ``level`` is the constant (offset, none) or the level before the onset;
    ``step`` the step size; ``slope`` the ramp's rise per ``slope_unit`` (``"day"`` for
    timestamps, ``"time unit"`` for numeric times, ``"point"`` without times). ``criteria``
    holds each shape's criterion (``CRITERION``), ``margin`` the second-best minus the
    best; ``phi`` and ``noise_sd`` describe the noise under the chosen shape (``noise_sd``
    for a point of weight 1). ``fitted`` is the fitted mean at each point; ``values``,
    ``times`` and ``weights`` the series as fitted.
    """

    of: str
    shape: str
    onset: int | None
    start: object
    start_range: tuple[object, object] | None
    level: float
    step: float | None
    slope: float | None
    slope_unit: str
    criteria: Mapping[str, float]
    margin: float
    phi: float
    noise_sd: float
    values: np.ndarray
    times: np.ndarray
    weights: np.ndarray
    fitted: np.ndarray
    min_points: int

    CRITERION = (
        "BIC: -2 log L + 3 log n, and for a step or a drift (onset and size) "
        f"max(2 log n, {CHANGE_COST:g}) more; AR(1) noise profiled"
    )

    @property
    def changed(self) -> bool:
        """True when a step or a drift beats the constant."""
        return self.shape in ("step", "drift")

    def value_at(self, times: object) -> np.ndarray:
        """The fitted mean at other times on the series' time axis (for another series).

        Examples
        --------
        >>> fit = change_shape(np.r_[np.zeros(20), np.arange(1.0, 21.0)])
        >>> fit.value_at([0.0, 30.0]).round(6).tolist()
        [0.0, 11.0]
        """
        t = _time_axis(times, self.times[0])
        if not self.changed:
            return np.full(t.size, self.level)
        at = _time_axis([self.start], self.times[0])[0]
        if self.shape == "step":
            return self.level + self.step * (t >= at)
        return self.level + self.slope * np.maximum(0.0, t - at)

    def to_frame(self) -> pd.DataFrame:
        """The series and its fitted mean, one row per point."""
        return pd.DataFrame(
            {
                "time": self.times,
                "value": self.values,
                "weight": self.weights,
                "fitted": self.fitted,
            }
        )


def change_shape(
    values: object,
    times: object = None,
    weights: object = None,
    *,
    of: str = "stream",
    min_points: int = 5,
) -> ShapeFit:
    """Fit a constant, a step and a drift to a series and name the shape the criterion picks.

    Parameters
    ----------
    values : the series in time order: a stream's difference from the other levels in
        each subgroup (:func:`qcexplore.stats.streams.stream_contrast`), or the subgroup
        means (``of="process"``, :func:`qcexplore.stats.streams.subgroup_means`)
    times : the points' times (timestamps: the slope is per day), or numbers; by default
        the positions ``0, 1, ...`` (the slope is per point)
    weights : relative precision of each point (a mean of ``n`` values: ``n``); default 1
    of : ``"stream"`` (the constant is named ``"offset"``) or ``"process"`` (``"none"``)
    min_points : fewest points on each side of an onset

    The AR(1) noise runs in the order of the points, whatever their spacing in time.
    Checked (tests/test_shape.py) against statsmodels OLS and GLS on the same designs, and
    by simulation: planted offsets, steps and drifts are named and dated, and flat AR(1)
    series are called unchanged, at the rates stated there.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> y = rng.normal(0.0, 1.0, 90) + np.where(np.arange(90) >= 40, 2.0, 0.0)
    >>> fit = change_shape(y, of="process")
    >>> fit.shape, fit.onset, round(fit.step, 2)
    ('step', 41, 2.33)
    """
    if of not in ("stream", "process"):
        raise QCDataError(f"change_shape: of={of!r} must be 'stream' or 'process'.")
    y, stamps, t, w, unit = _series(values, times, weights, min_points)
    n = y.size
    m2ll = _m2ll(y, t, w, PHI_GRID, int(min_points))
    cost = max(2.0 * np.log(n), CHANGE_COST)
    criteria = {
        model: float(np.min(m2ll[model]) + 3.0 * np.log(n) + (model != "offset") * cost)
        for model in SHAPES
    }
    ranked = sorted(SHAPES, key=criteria.__getitem__)
    model = ranked[0]
    i_phi, at = np.unravel_index(int(np.argmin(m2ll[model])), m2ll[model].shape)
    onset = int(at)
    phi = float(PHI_GRID[i_phi])
    design = np.ones((n, 1 if model == "offset" else 2))
    if model == "step":
        design[:, 1] = np.arange(n) >= onset
    elif model == "drift":
        design[:, 1] = np.maximum(0.0, t - t[onset])
    beta, rss = _least_squares(y, w, design, phi)
    start_range = None
    if model != "offset":
        profile = m2ll[model].min(axis=0)
        inside = np.flatnonzero(profile - profile[onset] <= _RANGE_LR)
        start_range = (_moment(stamps, inside[0]), _moment(stamps, inside[-1]))
    fitted = design @ beta
    for array in (y, stamps, w, fitted):
        array.setflags(write=False)
    name = "none" if model == "offset" and of == "process" else model
    return ShapeFit(
        of=of,
        shape=name,
        onset=None if model == "offset" else onset,
        start=None if model == "offset" else _moment(stamps, onset),
        start_range=start_range,
        level=float(beta[0]),
        step=float(beta[1]) if model == "step" else None,
        slope=float(beta[1]) if model == "drift" else None,
        slope_unit=unit,
        criteria=MappingProxyType(
            {("none" if m == "offset" and of == "process" else m): v for m, v in criteria.items()}
        ),
        margin=criteria[ranked[1]] - criteria[model],
        phi=phi,
        noise_sd=float(np.sqrt(rss / n / (1.0 - phi**2))),
        values=y,
        times=stamps,
        weights=w,
        fitted=fitted,
        min_points=int(min_points),
    )


def _least_squares(
    y: np.ndarray, w: np.ndarray, design: np.ndarray, phi: float
) -> tuple[np.ndarray, float]:
    """Coefficients and residual sum of squares of the transformed regression at one phi."""
    r, at = np.sqrt(w), np.array([phi])
    big_x = np.column_stack([_transform(r * column, at)[0] for column in design.T])
    big_y = _transform(r * y, at)[0]
    beta, *_ = np.linalg.lstsq(big_x, big_y, rcond=None)
    resid = big_y - big_x @ beta
    return beta, float(resid @ resid)

"""Charts of an autocorrelated series read against a forecast: the EWMA forecast as a moving
centre line, and the individuals chart of the AR(1) one-step errors (its innovations) about
the series' level."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import signal

from qcexplore.stats.charts.chart import control_chart
from qcexplore.stats.results import ChartResult
from qcexplore.stats.rules import evaluate_rules

_EWMA_LAMBDAS = np.round(np.arange(0.05, 1.0001, 0.01), 2)
_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0
_EWMA_L = 3.0


def _ewma_errors(x: np.ndarray, lam: float) -> np.ndarray:
    """One-step errors of the EWMA forecast z_t-1 (z_t = lam x_t + (1 - lam) z_t-1, z_0 the
    mean)."""
    start = x.mean()
    z, _ = signal.lfilter([lam], [1.0, lam - 1.0], x, zi=[(1.0 - lam) * start])
    return x - np.r_[start, z[:-1]]


def _ewma_lambda(x: np.ndarray) -> float:
    """The lambda of ``_EWMA_LAMBDAS`` with the least sum of squared one-step errors.

    A golden-section search over the grid, which finds the grid's least sum when the sum
    has one minimum over lambda (as it has for the series it is meant for;
    tests/test_timeseries.py checks it against the whole grid): about 12 passes over the
    series instead of 96.
    """
    sse: dict[int, float] = {}

    def cost(i: int) -> tuple[float, int]:
        if i not in sse:
            sse[i] = float(np.sum(_ewma_errors(x, float(_EWMA_LAMBDAS[i])) ** 2))
        return sse[i], i

    low, high = 0, _EWMA_LAMBDAS.size - 1
    while high - low > 2:
        step = round((high - low) * _GOLDEN)
        left, right = high - step, low + step
        if left == right:
            right += 1
        if cost(left) <= cost(right):
            high = right
        else:
            low = left
    return float(_EWMA_LAMBDAS[min(range(low, high + 1), key=cost)])


def _no_stratum(size: int) -> pd.Categorical[float]:
    """``pd.Categorical([None] * size)``, without a list of ``size`` Nones."""
    return pd.Categorical.from_codes(
        np.full(size, -1, dtype=np.int8), pd.Index([], dtype=np.float64)
    )


def moving_center_chart(series: pd.DataFrame, x: np.ndarray, has_time: bool) -> ChartResult:
    """EWMA moving centre line for an autocorrelated series (kind ``"ewma_center"``).

    The centre line for point t is the EWMA forecast made at t - 1,
    z_t = lam x_t + (1 - lam) z_{t-1}, started at the series mean, with lam chosen from
    0.05..1.00 to minimise the sum of squared one-step forecast errors. Limits are the
    forecast +- 3 sigma_e, sigma_e the root mean square one-step error. This is the
    moving-centre-line EWMA of Montgomery and Mastrangelo (1991) (from memory); the
    "beyond the limits" rule N1 is read against these moving limits.
    """
    lam = _ewma_lambda(x)
    errors = _ewma_errors(x, lam)
    forecast = x - errors
    sigma_e = float(np.sqrt(np.mean(errors**2)))
    flag, fired = evaluate_rules(x, forecast, np.full(x.size, sigma_e), ("N1",))
    points = pd.DataFrame(
        {
            "subgroup": series["subgroup"].array,
            "stratum": _no_stratum(x.size),
            "stat": x,
            "center": forecast,
            "lcl": forecast - _EWMA_L * sigma_e,
            "ucl": forecast + _EWMA_L * sigma_e,
            "n": series["n"].to_numpy(),
            "signal": flag,
            "rules": fired,
            "se": sigma_e,
            "excluded": False,
        }
    )
    if has_time:
        points["start"] = series["start"].to_numpy()
    limits = pd.DataFrame(
        {
            "stratum": pd.Categorical([None]),
            "center": [np.nan],
            "lcl": [np.nan],
            "ucl": [np.nan],
            "sigma": [sigma_e],
            "method": [f"ewma_forecast_errors (lambda={lam:.2f})"],
            "n": [float(series["n"].mean())],
            "se": [sigma_e],
            "estimator": ["forecast_errors"],
            "sigma_df": [np.nan],
        }
    )
    return ChartResult(
        kind="ewma_center",
        points=points,
        limits=limits,
        title=(
            f"Subgroup means with a moving centre line (EWMA forecast, lambda = {lam:.2f}; "
            "limits +- 3 sd of the one-step forecast errors)"
        ),
        sigma_level=_EWMA_L,
        sigma_method="forecast_errors",
        rules=("N1",),
        notes=(
            "Centre line and limits move with the EWMA forecast: they are per point in "
            "points (center, lcl, ucl); limits holds only their sigma.",
        ),
    )


def residual_chart(series: pd.DataFrame, residuals: np.ndarray, has_time: bool) -> ChartResult:
    """Individuals chart (I-MR) of the AR(1) innovations about the series' level: points
    that are independent when the AR(1) holds, so the usual limits and rules apply."""
    frame = pd.DataFrame({"subgroup": series["subgroup"].array, "residual": residuals})
    if has_time:
        frame["start"] = series["start"].to_numpy()
    return control_chart(
        frame,
        value="residual",
        subgroup="subgroup",
        time="start" if has_time else None,
        kind="imr",
    )

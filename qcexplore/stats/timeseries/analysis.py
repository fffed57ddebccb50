"""The time structure of a study's series, the entry point: :func:`time_structure`."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.coding import real_number
from qcexplore.errors import QCDataError
from qcexplore.stats.charts import forecast
from qcexplore.stats.results import TimeResult
from qcexplore.stats.timeseries.ar1 import ar1_residuals
from qcexplore.stats.timeseries.autocorrelation import autocorrelation, ljung_box
from qcexplore.stats.timeseries.level import drift_table, level_models
from qcexplore.stats.timeseries.series import plotted_series
from qcexplore.stats.timeseries.steps import SIMULATED_UP_TO, change_points

_LEVEL_WORDS = {
    "mean": "its mean",
    "steps": "the fitted steps",
    "drift": "the fitted drift",
}


def time_structure(
    data: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    max_lag: int | None = None,
    alpha: float = 0.05,
) -> TimeResult:
    """Autocorrelation, step changes, a drift and an AR(1) fit of the subgroup means.

    Parameters
    ----------
    data : one row per measurement, in time order
    value : the measured values; the series is their mean per subgroup (the single values
        when every subgroup holds one)
    subgroup : the rational subgroup of each row, ordered in time (a Categorical's category
        order, or else the order of first appearance)
    time : time column; each point's ``start`` is the first time of its rows
    max_lag : largest lag of the ACF/PACF and Ljung-Box tables; default
        ``min(10 log10 N, N/2 - 1)`` (common practice).
    alpha : level of the bands, of the autocorrelation decision and of the step tests.

    Returns
    -------
    TimeResult
        ``acf`` (``lag, acf, pacf, lower, upper`` of the series; lags from 1; the band is
        the white-noise band +- z_{1-alpha/2} / sqrt(N), +-1.96/sqrt(N) at alpha = 0.05,
        common practice, the same for ACF and PACF), ``ljung_box`` (``lag, q, p`` at every
        lag, of the series),
        ``shifts`` (``subgroup, position, time, before, after, p``: ``subgroup``/
        ``position`` (0-based) are the first point after the change, ``before``/``after``
        the means of the adjacent segments, ``p`` the multiplicity-adjusted p value),
        ``drift`` (``subgroup, position, time, slope, before, after``: one row when a
        ramp explains the change better than the steps; ``position`` the first point
        that moves, ``slope`` per point, ``before`` the level before the onset and
        ``after`` at the last point),
        ``level_models`` (``model, changes, position, parameters, phi, se, p, loglik,
        bic, chosen``: the mean, the steps found (or, with none, the best single step),
        the best ramp, each with the AR(1) fit of the residuals about it; the evidence
        for the explanation),
        ``explanation`` (words of ``EXPLANATIONS``: ``"steps"`` or ``"drift"`` for a
        confirmed change, ``"autocorrelation"`` when the residuals about the chosen
        level are correlated, ``"change_or_autocorrelation"`` when the series is
        correlated about its mean but a single step or a ramp leaves uncorrelated
        residuals, so the data cannot tell the two apart; empty when there is none),
        ``ar1`` (``phi, se, sigma2, loglik``: exact Gaussian likelihood of the residuals
        about the chosen level, their mean estimated; ``p`` its likelihood-ratio test of
        phi = 0),
        ``autocorrelation_p`` (the p value the autocorrelation explanation rests on:
        ``ar1.p``, or with no confirmed change the largest p about the mean, the best
        single step and the best ramp),
        ``series`` (``subgroup, start, mean, n``, ``segment_mean``, the fitted step
        function, and ``level``, the chosen level), ``effective_n`` =
        N (1 - phi) / (1 + phi), the number of independent points carrying the same
        information about the mean as N points of an AR(1) series (larger than N when
        phi < 0). When the explanation includes autocorrelation, ``residual_chart``
        (individuals chart of the AR(1) innovations about the level) and
        ``moving_center_chart`` (EWMA moving centre line, kind ``"ewma_center"``).

    Checked against statsmodels ``acf``, ``pacf`` and ``acorr_ljungbox`` (1e-10), R's
    ``arima(lh, order = c(1, 0, 0))`` documentation example and statsmodels ``ARIMA``, and
    by simulation for the step test and the explanation (tests/test_timeseries.py).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> s = pd.DataFrame({"hour": np.repeat(np.arange(60), 2),
    ...                   "w": np.r_[rng.normal(0, 1, 60), rng.normal(3, 1, 60)]})
    >>> r = time_structure(s, value="w", subgroup="hour")
    >>> r.shifts["position"].tolist(), r.explanation
    ([30], ('steps',))
    """
    series = plotted_series(data, value, subgroup, time)
    x = series["mean"].to_numpy()
    n = x.size
    alpha = real_number("alpha", alpha, lower=0, upper=1, inclusive=False)
    top = max(1, n // 2 - 1)
    if max_lag is None:
        max_lag = max(1, min(int(10 * math.log10(n)), top))
    elif (
        isinstance(max_lag, bool)
        or not isinstance(max_lag, (int, np.integer))
        or not 1 <= max_lag <= top
    ):
        raise QCDataError(
            f"time_structure: max_lag={max_lag!r} must be a whole number between 1 and {top} "
            f"(half the {n} points minus one)."
        )
    max_lag = int(max_lag)

    r, partial = autocorrelation(x, max_lag)
    band = stats.norm.ppf(1.0 - alpha / 2.0) / math.sqrt(n)
    lags = np.arange(1, max_lag + 1)
    acf = pd.DataFrame({"lag": lags, "acf": r, "pacf": partial, "lower": -band, "upper": band})
    q, q_p = ljung_box(r, n)
    lb = pd.DataFrame({"lag": lags, "q": q, "p": q_p})

    found, long_run_sd = change_points(x, alpha=alpha)
    cuts = np.array([0, *[pos for pos, _ in found], n])
    seg_means = np.add.reduceat(x, cuts[:-1]) / np.diff(cuts)
    models, explanation, chosen, fits, p_auto = level_models(x, cuts, alpha)
    level, fit = fits[chosen]
    phi = fit.phi
    effective_n = n * (1.0 - phi) / (1.0 + phi)

    labels = series["subgroup"].array
    starts = series["start"]
    shifts = pd.DataFrame(
        {
            "subgroup": pd.Categorical(
                [labels[pos] for pos, _ in found], categories=labels.categories, ordered=True
            ),
            "position": np.array([pos for pos, _ in found], dtype=np.int64),
            "time": starts.iloc[[pos for pos, _ in found]].reset_index(drop=True),
            "before": seg_means[:-1],
            "after": seg_means[1:],
            "p": np.array([p for _, p in found], dtype=np.float64),
        }
    )
    onset = int(models.loc[models["model"] == "drift", "position"].iloc[0]) - 1
    drift = drift_table(series, level if chosen == "drift" else None, onset)
    out_series = series.assign(segment_mean=np.repeat(seg_means, np.diff(cuts)), level=level)

    has_time = bool(starts.notna().any())
    raw = fits["mean"][1]
    notes = [
        f"ACF/PACF band: +-{stats.norm.ppf(1 - alpha / 2):.2f}/sqrt(N) (white-noise band); "
        "the ACF and Ljung-Box tables are of the series itself.",
        f"Step test: CUSUM with long-run sd {long_run_sd:.4g}, Bonferroni within each round "
        f"of binary segmentation, alpha = {alpha}; the null of segments up to "
        f"{SIMULATED_UP_TO} points simulated from the fitted AR(1).",
        f"AR(1) about {_LEVEL_WORDS[chosen]}: phi = {phi:.3f} (se {fit.se:.3f}); effective "
        f"number of independent points N(1-phi)/(1+phi) = {effective_n:.1f} of {n}"
        + ("." if chosen == "mean" else f"; about its mean, phi = {raw.phi:.3f}."),
    ]
    if chosen == "drift":
        notes.append(
            "The change fits a drift (a ramp from an onset) better than steps (BIC of the "
            "AR(1) likelihood of the residuals)."
        )
    if "change_or_autocorrelation" in explanation:
        notes.append(
            f"The series is correlated about its mean (phi = {raw.phi:.3f}, p = {raw.p:.3g}), "
            "but a single step or a ramp leaves residuals that are not (largest p = "
            f"{p_auto:.3g}); the step test does not confirm a change: a change in level or "
            "autocorrelation, which these data cannot tell apart."
        )
    residual_chart = moving_center_chart = None
    if "autocorrelation" in explanation:
        notes.append(
            "The series is autocorrelated"
            + (f" about {_LEVEL_WORDS[chosen]}" if chosen != "mean" else "")
            + ": limits that assume independent points mislead; read the residual chart "
            "and the moving-centre chart as well."
        )
        residual_chart = forecast.residual_chart(
            series, ar1_residuals(x - level, phi, fit.mean), has_time
        )
        moving_center_chart = forecast.moving_center_chart(series, x, has_time)
    return TimeResult(
        acf=acf,
        ljung_box=lb,
        ar1=fit,
        shifts=shifts,
        series=out_series,
        effective_n=float(effective_n),
        residual_chart=residual_chart,
        moving_center_chart=moving_center_chart,
        notes=tuple(notes),
        explanation=explanation,
        level_models=models,
        drift=drift,
        autocorrelation_p=float(p_auto),
    )

"""Time structure of a plotted series: autocorrelation, an AR(1) fit and step changes.

The series is one value per subgroup in time order (subgroup means, or single values
for individuals). Everything here is computed from that one column of numbers.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import optimize, signal, stats

from qcexplore.data.coding import real_number
from qcexplore.data.validate import finite_column, require_columns, require_frame
from qcexplore.errors import QCDataError
from qcexplore.stats.charts import control_chart
from qcexplore.stats.results import AR1Fit, ChartResult, TimeResult
from qcexplore.stats.rules import evaluate_rules
from qcexplore.stats.subgroups import subgroup_table

_MIN_POINTS = 8
#: Segments shorter than this are not tested for a further change point.
_MIN_SEGMENT = 8
#: Each side of a change point keeps at least this many points.
_MIN_SIDE = 2
#: Largest lag-1 autocorrelation allowed in the long-run variance of the change test.
_PHI_CAP = 0.95
_EWMA_LAMBDAS = np.round(np.arange(0.05, 1.0001, 0.01), 2)
_EWMA_L = 3.0


def _series(data: pd.DataFrame, value: str, subgroup: str, time: str | None) -> pd.DataFrame:
    """The plotted series: ``subgroup, start, mean, n``, one row per subgroup in time order."""
    require_frame(data)
    finite_column(data, value, "value")
    if time is not None:
        require_columns(data, [time], "time")
    series = subgroup_table(data, value=value, subgroup=subgroup, time=time)
    series = series[["subgroup", "start", "mean", "n"]]
    if len(series) < _MIN_POINTS:
        raise QCDataError(
            f"time_structure: {len(series)} points in the series; at least {_MIN_POINTS} "
            "subgroups (or individual values) in time order are needed."
        )
    if np.ptp(series["mean"].to_numpy()) == 0.0:
        raise QCDataError(
            f"time_structure: the subgroup means of {value!r} are constant; there is no "
            "variation to analyse."
        )
    return series


def autocorrelation(x: np.ndarray, max_lag: int) -> tuple[np.ndarray, np.ndarray]:
    """Sample ACF (denominator N, mean removed) and PACF at lags 1..max_lag.

    The PACF is the Durbin-Levinson recursion on the sample ACF (the Yule-Walker
    solution with the biased autocovariances). Checked against statsmodels
    ``acf(x, nlags, fft=False)`` and ``pacf(x, nlags, method="ldb")`` to 1e-10
    (tests/test_timeseries.py).

    Examples
    --------
    >>> r, p = autocorrelation(np.array([1.0, 3.0, 2.0, 5.0, 4.0, 6.0]), 2)
    >>> bool(abs(r[0] - p[0]) < 1e-12)
    True
    """
    d = x - x.mean()
    n = d.size
    full = np.correlate(d, d, mode="full")[n - 1 : n + max_lag]
    r = full / full[0]
    pacf = np.empty(max_lag)
    phi = np.zeros(0)
    for k in range(1, max_lag + 1):
        # Durbin-Levinson: the order-k coefficients from those of order k - 1.
        num = r[k] - phi @ r[k - 1 : 0 : -1] if k > 1 else r[1]
        den = 1.0 - phi @ r[1:k] if k > 1 else 1.0
        last = num / den
        phi = np.r_[phi - last * phi[::-1], last]
        pacf[k - 1] = last
    return r[1:], pacf


def ljung_box(acf: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Ljung-Box Q and its chi-square p value at every lag 1..len(acf).

    Q(h) = N (N + 2) sum_{k<=h} r_k^2 / (N - k), df = h (no fitted parameters removed).
    Checked against statsmodels ``acorr_ljungbox`` (tests/test_timeseries.py).

    Examples
    --------
    >>> q, p = ljung_box(np.array([0.5]), 20)
    >>> round(float(q[0]), 4)
    5.7895
    """
    lags = np.arange(1, acf.size + 1)
    q = n * (n + 2) * np.cumsum(acf**2 / (n - lags))
    return q, stats.chi2.sf(q, lags)


def _ar1_profile(x: np.ndarray, phi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, innovation variance and log-likelihood, maximised over the mean, per phi."""
    phi = np.asarray(phi, dtype=np.float64)[:, None]
    n = x.size
    w1 = 1.0 - phi[:, 0] ** 2
    y = x[1:] - phi * x[:-1]
    mu = (w1 * x[0] + (1.0 - phi[:, 0]) * y.sum(axis=1)) / (w1 + (n - 1) * (1.0 - phi[:, 0]) ** 2)
    resid = y - (1.0 - phi) * mu[:, None]
    ss = w1 * (x[0] - mu) ** 2 + np.sum(resid**2, axis=1)
    sigma2 = ss / n
    loglik = -0.5 * n * (np.log(2.0 * np.pi * sigma2) + 1.0) + 0.5 * np.log(w1)
    return mu, sigma2, loglik


def ar1_fit(x: np.ndarray) -> AR1Fit:
    """Lag-1 autoregressive model with a mean, by exact Gaussian maximum likelihood.

    The mean and the innovation variance are profiled out in closed form, the profile
    log-likelihood is maximised over phi in (-1, 1) (grid, then bounded Brent). The
    standard error of phi is the inverse square root of the curvature of the profile
    log-likelihood, which equals the observed-information (Hessian) standard error.
    ``p`` is the Wald test of phi = 0, 2 P(Z > |phi| / se).

    Checked against R's ``arima(lh, order = c(1, 0, 0))`` documentation example
    (phi 0.5739, s.e. 0.1161, sigma^2 0.1975, log-likelihood -29.38) and statsmodels
    ``ARIMA(order=(1, 0, 0))`` (tests/test_timeseries.py).

    Examples
    --------
    >>> fit = ar1_fit(np.array([2.0, 2.5, 2.2, 2.9, 3.1, 2.7, 2.4, 2.8, 3.3, 3.0]))
    >>> -1.0 < fit.phi < 1.0, 0.0 <= fit.p <= 1.0
    (True, True)
    """
    # Centred so the likelihood keeps its precision for data far from zero.
    shift = float(x.mean())
    x = x - shift
    grid = np.linspace(-0.999, 0.999, 1999)
    best = grid[np.argmax(_ar1_profile(x, grid)[2])]
    lo, hi = max(best - 0.002, -0.9999), min(best + 0.002, 0.9999)
    res = optimize.minimize_scalar(
        lambda p: -_ar1_profile(x, np.array([p]))[2][0],
        bounds=(lo, hi),
        method="bounded",
        options={"xatol": 1e-10},
    )
    phi = float(res.x)
    mu, sigma2, loglik = (float(v[0]) for v in _ar1_profile(x, np.array([phi])))
    h = 1e-4 * max(1.0 - abs(phi), 1e-3)
    around = _ar1_profile(x, np.array([phi - h, phi, phi + h]))[2]
    curvature = -(around[0] - 2.0 * around[1] + around[2]) / h**2
    se = 1.0 / math.sqrt(curvature) if curvature > 0 else float("nan")
    p = float(2.0 * stats.norm.sf(abs(phi) / se)) if se > 0 else float("nan")
    return AR1Fit(phi=phi, se=se, sigma2=sigma2, loglik=loglik, mean=mu + shift, p=p)


def ar1_residuals(x: np.ndarray, phi: float, mean: float) -> np.ndarray:
    """One-step innovations of the AR(1) fit; the first is scaled by sqrt(1 - phi^2).

    Examples
    --------
    >>> ar1_residuals(np.array([1.0, 2.0, 3.0]), 0.5, 2.0).round(3).tolist()
    [-0.866, 0.5, 1.0]
    """
    d = x - mean
    return np.r_[math.sqrt(1.0 - phi**2) * d[0], d[1:] - phi * d[:-1]]


def _long_run_sd(x: np.ndarray, cuts: np.ndarray) -> tuple[float, float]:
    """Long-run standard deviation of x about its segment means, read as an AR(1).

    ``cuts`` are the segment boundaries (first 0, last N). The residuals e about each
    segment's mean give g0 = sum e^2 / (N - segments). The long-run variance of an AR(1),
    the variance that the partial sums grow with, is g0 (1 + phi) / (1 - phi). phi is the
    larger of two estimates, kept in [0, 0.95] (a negative estimate counts as none):

    * the lag-1 autocorrelation of e within segments, corrected for the bias that removing
      each segment's mean causes, about -(1 + 3 phi) / length (Marriott and Pope 1954,
      from memory);
    * 1 + 2 r_d, with r_d the lag-1 autocorrelation of the first differences, which is
      -(1 - phi) / 2 for an AR(1) and is hardly touched by a step that was missed or
      misplaced (a step moves only one difference).

    Taking the larger keeps the test from reading autocorrelation as steps when the
    candidate split has soaked up part of a slow wander (the first estimate is then too
    low), while a real step does not inflate phi (the second estimate ignores it).
    """
    seg = np.repeat(np.arange(cuts.size - 1), np.diff(cuts))
    means = np.add.reduceat(x, cuts[:-1]) / np.diff(cuts)
    e = x - means[seg]
    ss = float(np.sum(e * e))
    same = seg[1:] == seg[:-1]
    d = np.diff(x)
    if not np.any(d[same]):  # every segment flat (exactly): no noise, no long-run variance
        return 0.0, 0.0
    n, segments = x.size, cuts.size - 1
    r1 = float(np.sum((e[1:] * e[:-1])[same]) / ss)
    # Removing each segment's mean biases r1 by about -(1 + 3 phi) / length
    # (Marriott and Pope 1954, from memory); solved for phi over all segments.
    phi_levels = (n * r1 + segments) / (n - 3.0 * segments)
    pairs = same[1:] & same[:-1]
    r_d = float(np.sum((d[1:] * d[:-1])[pairs]) / np.sum(d[same] ** 2))
    phi_diff = 1.0 + 2.0 * r_d
    phi = min(max(phi_levels, phi_diff, 0.0), _PHI_CAP)
    g0 = ss / (n - segments)
    return math.sqrt(g0 * (1.0 + phi) / (1.0 - phi)), phi


def _cusum_test(x: np.ndarray, cuts: list[int], a: int, b: int) -> tuple[float, int]:
    """p value of the maximal CUSUM of segment x[a:b] and the best split position in it.

    ``cuts`` are the change points already accepted; the long-run sd comes from the
    residuals about the segment means with this segment split at its best position.
    """
    m = b - a
    k = np.arange(1, m)
    part = x[a:b]
    # Centred first: partial sums of values far from zero would cancel catastrophically.
    s = np.cumsum(part - part.mean())
    bridge = s[:-1]
    # The step's position is the likelihood-ratio (weighted CUSUM) maximiser.
    lr = bridge**2 / (k * (m - k))
    allowed = (k >= _MIN_SIDE) & (m - k >= _MIN_SIDE)
    split = int(k[allowed][np.argmax(lr[allowed])])
    sd, _ = _long_run_sd(x, np.array(sorted({0, x.size, a + split, *cuts})))
    if sd == 0.0:
        # Noise-free: the split leaves flat segments, so a segment that is not flat is an
        # exact step and a flat one has none.
        return (0.0 if np.ptp(part) > 0 else 1.0), split
    # Max |bridge| / (sd sqrt(m)) tends to sup|Brownian bridge| (Kolmogorov distribution).
    p = float(stats.kstwobign.sf(np.max(np.abs(bridge)) / (sd * math.sqrt(m))))
    return p, split


def change_points(x: np.ndarray, *, alpha: float = 0.05) -> tuple[list[tuple[int, float]], float]:
    """Step changes in the level of a series by binary segmentation with a CUSUM test.

    Each segment (at least 8 points) is tested with the maximal standardised CUSUM
    max_k |S_k - (k/m) S_m| / (sigma_LR sqrt(m)), whose null distribution for large m is
    the supremum of a Brownian bridge (Kolmogorov distribution, ``scipy.stats.kstwobign``);
    this accounts for the search over positions. sigma_LR is the long-run standard
    deviation (see ``_long_run_sd``), so lag-1 autocorrelation widens the null
    distribution instead of producing false steps (Brownian-bridge limit for weakly
    dependent series, the usual long-run-variance scaling). A significant segment is split
    at the maximiser of the likelihood-ratio statistic and both halves are tested in the
    next round. Multiplicity: the p values of the segments tested in one round are
    Bonferroni-multiplied by the number tested in that round; a round is entered only
    through a significant split, so on a series without steps a false step needs the first
    test (the whole series) to reject, so the chance of any false step is that test's
    level. The Kolmogorov limit is conservative for short series, the estimated long-run
    variance slightly liberal under strong autocorrelation; simulated share of in-control
    series with any reported step at alpha = 0.05 (1000 series each, seed 1):

    ====  =======  =========  =========
    N     phi = 0  phi = 0.3  phi = 0.6
    ====  =======  =========  =========
    30    0.018    0.067      0.105
    50    0.034    0.058      0.078
    100   0.029    0.046      0.052
    ====  =======  =========  =========

    A 2-sigma step at a third of the series is placed within +-1 point in about 73 %
    (N = 30), 86 % (N = 50) and 87 % (N = 100) of white-noise series, 53-73 % with
    phi = 0.3. Subgroup means are treated as equally precise (unequal n is not weighted).

    Returns the list of (position of the first point after the change, adjusted p) and the
    long-run sd used. Checked by simulation: false-step rate on in-control white noise and
    AR(1) phi = 0.3 series, and recovery of a planted 2-sigma step (tests/test_timeseries.py).

    Examples
    --------
    >>> x = np.r_[np.zeros(30), np.full(30, 3.0)] + np.tile([0.5, -0.5], 30)
    >>> [pos for pos, p in change_points(x)[0]]
    [30]
    """
    found: list[tuple[int, float]] = []
    segments = [(0, x.size)]
    while segments:
        tested = [(a, b) for a, b in segments if b - a >= _MIN_SEGMENT]
        cuts = [pos for pos, _ in found]
        segments = []
        for a, b in tested:
            p, k = _cusum_test(x, cuts, a, b)
            p = min(1.0, p * len(tested))
            if p < alpha:
                found.append((a + k, p))
                segments += [(a, a + k), (a + k, b)]
    found.sort()
    sd, _ = _long_run_sd(x, np.array([0, *[pos for pos, _ in found], x.size]))
    return found, sd


def _moving_center_chart(series: pd.DataFrame, x: np.ndarray, has_time: bool) -> ChartResult:
    """EWMA moving centre line for an autocorrelated series (kind ``"ewma_center"``).

    The centre line for point t is the EWMA forecast made at t - 1,
    z_t = lam x_t + (1 - lam) z_{t-1}, started at the series mean, with lam chosen from
    0.05..1.00 to minimise the sum of squared one-step forecast errors. Limits are the
    forecast +- 3 sigma_e, sigma_e the root mean square one-step error. This is the
    moving-centre-line EWMA of Montgomery and Mastrangelo (1991) (from memory); the
    "beyond the limits" rule N1 is read against these moving limits.
    """
    start = x.mean()
    errors = np.empty((_EWMA_LAMBDAS.size, x.size))
    for i, lam in enumerate(_EWMA_LAMBDAS):
        z, _ = signal.lfilter([lam], [1.0, lam - 1.0], x, zi=[(1.0 - lam) * start])
        errors[i] = x - np.r_[start, z[:-1]]
    best = int(np.argmin(np.sum(errors**2, axis=1)))
    lam = float(_EWMA_LAMBDAS[best])
    forecast = x - errors[best]
    sigma_e = float(np.sqrt(np.mean(errors[best] ** 2)))
    flag, fired = evaluate_rules(x, forecast, np.full(x.size, sigma_e), ("N1",))
    points = pd.DataFrame(
        {
            "subgroup": series["subgroup"].array,
            "stratum": pd.Categorical([None] * x.size),
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


def _residual_chart(series: pd.DataFrame, residuals: np.ndarray, has_time: bool) -> ChartResult:
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


def time_structure(
    data: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    max_lag: int | None = None,
    alpha: float = 0.05,
) -> TimeResult:
    """Autocorrelation, a lag-1 autoregressive fit and step changes of the subgroup means.

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
        ``acf`` (``lag, acf, pacf, lower, upper``; lags from 1; the band is the white-noise
        band +- z_{1-alpha/2} / sqrt(N), +-1.96/sqrt(N) at alpha = 0.05, common practice,
        the same for ACF and PACF), ``ljung_box`` (``lag, q, p`` at every lag),
        ``ar1`` (``phi, se, sigma2, loglik``: exact Gaussian likelihood, mean estimated;
        ``p`` its Wald test of phi = 0),
        ``shifts`` (``subgroup, position, time, before, after, p``: ``subgroup``/
        ``position`` (0-based) are the first point after the change, ``before``/``after``
        the means of the adjacent segments, ``p`` the multiplicity-adjusted p value),
        ``series`` (``subgroup, start, mean, n`` and ``segment_mean``, the fitted step
        function), ``effective_n`` = N (1 - phi) / (1 + phi), the number of independent
        points carrying the same information about the mean as N points of an AR(1) series
        (larger than N when phi < 0). When the AR(1) phi differs from 0 (Wald test at
        ``alpha``), ``residual_chart`` (individuals chart of the AR(1) innovations) and
        ``moving_center_chart`` (EWMA moving centre line, kind ``"ewma_center"``).

    Checked against statsmodels ``acf``, ``pacf`` and ``acorr_ljungbox`` (1e-10), R's
    ``arima(lh, order = c(1, 0, 0))`` documentation example and statsmodels ``ARIMA``, and
    by simulation for the step test (tests/test_timeseries.py).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> s = pd.DataFrame({"hour": np.repeat(np.arange(60), 2),
    ...                   "w": np.r_[rng.normal(0, 1, 60), rng.normal(3, 1, 60)]})
    >>> time_structure(s, value="w", subgroup="hour").shifts["position"].tolist()
    [30]
    """
    series = _series(data, value, subgroup, time)
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

    fit = ar1_fit(x)
    phi = fit.phi
    effective_n = n * (1.0 - phi) / (1.0 + phi)
    # A likelihood without curvature at its maximum (NaN p) has phi at the edge of (-1, 1).
    autocorrelated = not fit.p >= alpha

    found, long_run_sd = change_points(x, alpha=alpha)
    cuts = np.array([0, *[pos for pos, _ in found], n])
    seg_means = np.add.reduceat(x, cuts[:-1]) / np.diff(cuts)
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
    out_series = series.assign(segment_mean=np.repeat(seg_means, np.diff(cuts)))

    has_time = bool(starts.notna().any())
    notes = [
        f"ACF/PACF band: +-{stats.norm.ppf(1 - alpha / 2):.2f}/sqrt(N) (white-noise band).",
        f"AR(1): phi = {phi:.3f} (se {fit.se:.3f}); effective number of independent "
        f"points N(1-phi)/(1+phi) = {effective_n:.1f} of {n}.",
        f"Step test: CUSUM with long-run sd {long_run_sd:.4g}, Bonferroni within each round "
        f"of binary segmentation, alpha = {alpha}.",
    ]
    residual_chart = moving_center_chart = None
    if autocorrelated:
        notes.append(
            "The series is autocorrelated"
            + (" (the step changes found add to this)" if found else "")
            + ": limits that assume independent points mislead; read the residual chart "
            "and the moving-centre chart as well."
        )
        residual_chart = _residual_chart(series, ar1_residuals(x, phi, fit.mean), has_time)
        moving_center_chart = _moving_center_chart(series, x, has_time)
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
    )

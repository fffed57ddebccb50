"""Time structure of a plotted series: autocorrelation, an AR(1) fit, steps and a drift.

The series is one value per subgroup in time order (subgroup means, or single values
for individuals). Everything here is computed from that one column of numbers, in time
and memory linear in its length: the autocovariances by FFT, the AR(1) likelihood from
six sums of the series, the step test and the drift from cumulative sums.

Which explanation the data support
----------------------------------
A step, a drift and autocorrelation all make neighbouring points alike, so each is judged
with the others allowed for (``time_structure``):

1. steps: binary segmentation with a CUSUM test whose null distribution allows for
   autocorrelation (``change_points``);
2. a drift: when a change is confirmed, the fitted steps are compared with a ramp (a
   constant level, then a straight-line rise or fall from an onset) by the BIC of the
   AR(1) likelihood of the residuals about each; the ramp is the drift when it fits
   better;
3. autocorrelation: the AR(1) fit of the residuals about the level chosen in 1-2 (the
   mean when no change is confirmed). When no change is confirmed, autocorrelation is
   claimed only if the residuals about the best single step and about the best ramp are
   correlated as well: a step the test could not confirm is not read as autocorrelation.

Simulated share of series whose explanation includes autocorrelation (2000 series each,
benchmarks/bench_time.py --calibration): a pure step of 2 or 3 sd at a third of a
white-noise series, 0.032 to 0.054 for N = 30 to 200; a pure ramp, 0.039 to 0.056; an
AR(1) series with phi = 0.5 and no change, 0.42 at N = 30, 0.79 at 50, 0.995 at 100 and
1.000 at 200.
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pandas as pd
from scipy import fft, optimize, signal, stats

from qcexplore.data.coding import real_number
from qcexplore.data.validate import finite_column, require_columns, require_frame
from qcexplore.errors import QCDataError
from qcexplore.stats.charts import control_chart
from qcexplore.stats.onset import ramp_rss
from qcexplore.stats.results import AR1Fit, ChartResult, TimeResult
from qcexplore.stats.rules import evaluate_rules
from qcexplore.stats.subgroups import subgroup_table

_MIN_POINTS = 8
#: Segments shorter than this are not tested for a further change point.
_MIN_SEGMENT = 8
#: Each side of a change point (and of a ramp's onset) keeps at least this many points.
_MIN_SIDE = 2
#: Largest lag-1 autocorrelation allowed in the long-run variance of the change test.
_PHI_CAP = 0.95
#: Segments up to this length have the step test's null distribution simulated from the
#: fitted AR(1); beyond it the Kolmogorov limit holds (see ``change_points``).
_SIMULATED_UP_TO = 250
_REPLICATES = 2000
#: A fixed seed: the same series always gets the same p value.
_SEED = 20_260_902
#: Null quantiles matched to the Kolmogorov distribution's (the largest ratio is kept).
_CALIBRATION_LEVELS = (0.90, 0.95, 0.99)
#: Standard errors added to the fitted phi before the null is simulated.
_PHI_MARGIN = 1.5
#: The explanations ``time_structure`` can give, in the order they are listed.
EXPLANATIONS = ("steps", "drift", "autocorrelation", "change_or_autocorrelation")
_EWMA_LAMBDAS = np.round(np.arange(0.05, 1.0001, 0.01), 2)
_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0
_EWMA_L = 3.0


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Sum of a * b. Not BLAS: on a busy machine its threads cost more than the sum."""
    return float(np.einsum("i,i->", a, b))


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

    The autocovariances come from one FFT of the series padded with at least ``max_lag``
    zeros (so no lag wraps around), in time N log N and memory linear in N. The PACF is
    the Durbin-Levinson recursion on the sample ACF (the Yule-Walker solution with the
    biased autocovariances). Checked against statsmodels ``acf(x, nlags, fft=False)``
    and ``pacf(x, nlags, method="ldb")`` to 1e-10 (tests/test_timeseries.py).

    Examples
    --------
    >>> r, p = autocorrelation(np.array([1.0, 3.0, 2.0, 5.0, 4.0, 6.0]), 2)
    >>> bool(abs(r[0] - p[0]) < 1e-12)
    True
    """
    d = x - x.mean()
    size = fft.next_fast_len(d.size + max_lag, real=True)
    spectrum = fft.rfft(d, size)
    power = spectrum.real**2 + spectrum.imag**2
    autocovariance = fft.irfft(power, size)[: max_lag + 1]
    r = autocovariance / autocovariance[0]
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


def _ar1_sums(x: np.ndarray) -> tuple[float, ...]:
    """What the AR(1) likelihood needs of a series: N, x_1, x_N, sum x, sum x^2, sum x_t x_t-1."""
    return (
        float(x.size),
        float(x[0]),
        float(x[-1]),
        float(x.sum()),
        _dot(x, x),
        _dot(x[1:], x[:-1]),
    )


def _ar1_profile(
    sums: tuple[float, ...], phi: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, innovation variance and log-likelihood, maximised over the mean, per phi.

    With y_t = x_t - phi x_{t-1} (t >= 2), the exact Gaussian likelihood needs only
    sum y, sum y^2 and x_1, which follow from the six sums of ``_ar1_sums``: each phi
    costs a few operations, whatever the length of the series.
    """
    n, first, last, total, squares, lagged = sums
    phi = np.asarray(phi, dtype=np.float64)
    w1 = 1.0 - phi**2
    drop = 1.0 - phi
    sum_y = (total - first) - phi * (total - last)
    sum_yy = (squares - first**2) - 2.0 * phi * lagged + phi**2 * (squares - last**2)
    mu = (w1 * first + drop * sum_y) / (w1 + (n - 1.0) * drop**2)
    c = drop * mu
    ss = w1 * (first - mu) ** 2 + sum_yy - 2.0 * c * sum_y + (n - 1.0) * c**2
    # The sums round to about eps * sum x^2: a fit cannot be closer than that.
    ss = np.maximum(ss, 4.0 * np.finfo(np.float64).eps * squares)
    sigma2 = ss / n
    loglik = -0.5 * n * (np.log(2.0 * np.pi * sigma2) + 1.0) + 0.5 * np.log(w1)
    return mu, sigma2, loglik


def ar1_fit(x: np.ndarray, *, fitted: int = 1, linear: int | None = None) -> AR1Fit:
    """Lag-1 autoregressive model with a mean, by exact Gaussian maximum likelihood.

    The mean and the innovation variance are profiled out in closed form, the profile
    log-likelihood is maximised over phi in (-1, 1) (grid, then bounded Brent), each
    evaluation from six sums of the series (``_ar1_profile``), so the fit costs one pass
    over the data. The standard error of phi is the inverse square root of the curvature
    of the profile log-likelihood, which equals the observed-information (Hessian)
    standard error.

    ``x`` may be the residuals about a level fitted before: ``fitted`` is the number of
    that level's parameters (change positions included; 1 for the mean), ``linear`` the
    number of them fitted by least squares (the means and slopes; default ``fitted``).

    ``p`` tests independence by the likelihood ratio (chi-square, 1 df) against the phi
    that independent residuals show about a fitted level, -linear / N (-1/N about the
    mean, Marriott and Pope 1954, from memory), the statistic scaled by the residual
    degrees of freedom (N - fitted) / N. Unlike the Wald test phi / se, it keeps its
    level on short series: simulated share of p < 0.05 on white noise about the mean,
    0.044 at N = 20, 0.046 at N = 30 and 50 (the Wald test 0.073, 0.064, 0.064; 2000
    series each, benchmarks/bench_time.py --calibration; tests/test_timeseries.py).

    Checked against R's ``arima(lh, order = c(1, 0, 0))`` documentation example
    (phi 0.5739, s.e. 0.1161, sigma^2 0.1975, log-likelihood -29.38) and statsmodels
    ``ARIMA(order=(1, 0, 0))`` (tests/test_timeseries.py).

    Examples
    --------
    >>> fit = ar1_fit(np.array([2.0, 2.5, 2.2, 2.9, 3.1, 2.7, 2.4, 2.8, 3.3, 3.0]))
    >>> -1.0 < fit.phi < 1.0, 0.0 <= fit.p <= 1.0
    (True, True)
    """
    # Centred so the sums keep their precision for data far from zero.
    shift = float(x.mean())
    sums = _ar1_sums(x - shift)
    grid = np.linspace(-0.999, 0.999, 1999)
    best = grid[np.argmax(_ar1_profile(sums, grid)[2])]
    lo, hi = max(best - 0.002, -0.9999), min(best + 0.002, 0.9999)
    res = optimize.minimize_scalar(
        lambda p: -float(_ar1_profile(sums, np.array(p))[2]),
        bounds=(lo, hi),
        method="bounded",
        options={"xatol": 1e-10},
    )
    phi = float(res.x)
    mu, sigma2, loglik = (float(v) for v in _ar1_profile(sums, np.array(phi)))
    h = 1e-4 * max(1.0 - abs(phi), 1e-3)
    around = _ar1_profile(sums, np.array([phi - h, phi, phi + h]))[2]
    curvature = -(around[0] - 2.0 * around[1] + around[2]) / h**2
    se = 1.0 / math.sqrt(curvature) if curvature > 0 else float("nan")
    n = x.size
    null_phi = -(fitted if linear is None else linear) / n
    independent = float(_ar1_profile(sums, np.array(null_phi))[2])
    ratio = max(2.0 * (loglik - independent), 0.0) * (n - fitted) / n
    p = float(stats.chi2.sf(ratio, 1))
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


# --------------------------------------------------------------------------- steps


def _segment_sums(part: np.ndarray) -> np.ndarray:
    """What the long-run variance needs of one segment: the residuals e about its mean give
    sum e^2 and sum e_t e_t-1, its first differences d give sum d^2 and sum d_t d_t-1."""
    e = part - part.mean()
    d = np.diff(part)
    return np.array([_dot(e, e), _dot(e[1:], e[:-1]), _dot(d, d), _dot(d[1:], d[:-1])])


def _long_run_sd(
    sums: np.ndarray, n: np.ndarray | int, segments: np.ndarray | int
) -> tuple[np.ndarray, np.ndarray]:
    """Long-run standard deviation about the segment means, read as an AR(1), and its phi.

    ``sums`` (last axis: the four sums of ``_segment_sums``, added over the segments) of
    ``n`` points in ``segments`` segments give g0 = sum e^2 / (n - segments). The long-run
    variance of an AR(1), the variance that the partial sums grow with, is
    g0 (1 + phi) / (1 - phi). phi is the larger of two estimates, kept in [0, 0.95] (a
    negative estimate counts as none):

    * the lag-1 autocorrelation of e within segments, corrected for the bias that removing
      each segment's mean causes, about -(1 + 3 phi) / length (Marriott and Pope 1954,
      from memory), solved for phi over all segments;
    * 1 + 2 r_d, with r_d the lag-1 autocorrelation of the first differences, which is
      -(1 - phi) / 2 for an AR(1) and is hardly touched by a step that was missed or
      misplaced (a step moves only one difference).

    Taking the larger keeps the test from reading autocorrelation as steps when the
    candidate split has soaked up part of a slow wander (the first estimate is then too
    low), while a real step does not inflate phi (the second estimate ignores it). Every
    segment flat (exactly): no noise, sd 0.
    """
    ss, cross, d2, dd = np.moveaxis(np.asarray(sums, dtype=np.float64), -1, 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r1 = cross / ss
        phi_levels = np.where(n > 3 * segments, (n * r1 + segments) / (n - 3 * segments), r1)
        phi_diff = 1.0 + 2.0 * dd / d2
        phi = np.clip(np.fmax(phi_levels, phi_diff), 0.0, _PHI_CAP)
        sd = np.sqrt(ss / (n - segments) * (1.0 + phi) / (1.0 - phi))
    noisy = d2 > 0
    return np.where(noisy, sd, 0.0), np.where(noisy, phi, 0.0)


def _best_splits(bridge: np.ndarray) -> np.ndarray:
    """The step position of each row of CUSUM bridges S_1..S_{m-1} (the likelihood-ratio,
    or weighted CUSUM, maximiser), each side keeping at least ``_MIN_SIDE`` points."""
    m = bridge.shape[-1] + 1
    k = np.arange(1, m)
    lr = bridge * bridge / (k * (m - k))
    lr[..., (k < _MIN_SIDE) | (m - k < _MIN_SIDE)] = -np.inf
    return k[np.argmax(lr, axis=-1)]


def _cusum_statistics(
    rows: np.ndarray, others: np.ndarray, n_others: int, segments_others: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The CUSUM statistic of each row (a segment, or a simulated one) and what it rests on.

    Returns ``t`` = max_k |S_k| / (sd sqrt(m)), the long-run ``sd`` and its ``phi``
    (about the row's two means either side of its best split, pooled with the sums
    ``others`` of ``n_others`` points in ``segments_others`` other segments) and the
    ``split``. One pass over the rows, as whole arrays: the simulated null costs the same
    per point as the series.
    """
    reps, m = rows.shape
    # Centred first: partial sums of values far from zero would cancel catastrophically.
    centred = rows - rows.mean(axis=1, keepdims=True)
    cumulative = np.cumsum(centred, axis=1)
    bridge = cumulative[:, :-1]
    split = _best_splits(bridge)
    top = np.max(np.abs(bridge), axis=1)
    left_sum = cumulative[np.arange(reps), split - 1]
    j = np.arange(m)
    left = j < split[:, None]
    e = centred - np.where(left, (left_sum / split)[:, None], (-left_sum / (m - split))[:, None])
    same_side = j[1:] != split[:, None]
    # The difference across the split is zeroed: it and the pairs it is in drop out.
    d = np.diff(rows, axis=1) * same_side
    sums = np.stack(
        [
            np.einsum("ij,ij->i", e, e),
            np.einsum("ij,ij->i", e[:, 1:] * same_side, e[:, :-1]),
            np.einsum("ij,ij->i", d, d),
            np.einsum("ij,ij->i", d[:, 1:], d[:, :-1]),
        ],
        axis=-1,
    )
    sd, phi = _long_run_sd(sums + others, m + n_others, 2 + segments_others)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = top / (sd * math.sqrt(m))
    return t, sd, phi, split


@functools.lru_cache(maxsize=4096)
def _null_scale(m: int, phi: float) -> float:
    """How much wider the null distribution of the CUSUM statistic is than Kolmogorov's,
    for ``m`` points of an AR(1) with this phi: simulated (``_REPLICATES`` series, fixed
    seed), the largest ratio of its quantiles to Kolmogorov's at ``_CALIBRATION_LEVELS``,
    and at least 1.

    A function of its two arguments only (the seed is fixed), so its values are kept.
    """
    innovations = np.random.default_rng(_SEED).standard_normal((_REPLICATES, m))
    scale = math.sqrt(1.0 - phi * phi)
    # Stationary from the first point: x_1 = e_1, x_t = phi x_t-1 + sqrt(1 - phi^2) e_t.
    simulated = signal.lfilter(
        [scale], [1.0, -phi], innovations, axis=1, zi=(1.0 - scale) * innovations[:, :1]
    )[0]
    t = _cusum_statistics(simulated, np.zeros(4), 0, 0)[0]
    # Never below 1: where the Kolmogorov limit is already conservative (long segments,
    # little autocorrelation) the simulated quantiles' own noise must not make it liberal.
    return max(
        1.0,
        *(
            float(np.quantile(t, level) / stats.kstwobign.isf(1.0 - level))
            for level in _CALIBRATION_LEVELS
        ),
    )


def _null_phi(part: np.ndarray, phi: float, n: int) -> float:
    """The phi at which the null of one segment is simulated, rounded up to 0.01.

    The smallest of three estimates, each of which is too high in its own case:

    * the bias-corrected lag-1 autocorrelation about the segment's mean (the estimate
      under the null of no step; Marriott and Pope 1954, from memory), which a real step
      inflates;
    * the test's own phi (``_long_run_sd``, pooled over ``n`` points) plus
      ``_PHI_MARGIN`` standard errors sqrt((1 - phi^2) / n), which a second, missed step
      inflates;
    * 1 + 2 r_d of the segment's first differences (hardly touched by steps) plus two of
      its standard errors, sqrt(2 / m) for white noise (Bartlett's formula for the
      differences, an MA(1) with lag-1 correlation -1/2; from memory).

    The margins keep the simulated null wide enough where the estimates are low by chance
    (short, strongly autocorrelated series), which would let false steps through.
    """
    m = part.size
    e = part - part.mean()
    d = np.diff(part)
    ss, d2 = _dot(e, e), _dot(d, d)
    # A flat segment in a noisy series: no correlation to estimate.
    r1 = _dot(e[1:], e[:-1]) / ss if ss > 0 else 0.0
    r_d = _dot(d[1:], d[:-1]) / d2 if d2 > 0 else -0.5
    estimates = (
        (m * r1 + 1.0) / (m - 3.0),
        phi + _PHI_MARGIN * math.sqrt(max(1.0 - phi * phi, 0.0) / n),
        1.0 + 2.0 * r_d + 2.0 * math.sqrt(2.0 / m),
    )
    chosen = min(max(min(estimates), 0.0), _PHI_CAP)
    return math.ceil(round(chosen * 100.0, 9)) / 100.0


def _segment_test(
    x: np.ndarray,
    a: int,
    b: int,
    others: np.ndarray,
    n_others: int,
    segments_others: int,
) -> tuple[float, int]:
    """p value of the CUSUM test of segment x[a:b] and the best split position in it."""
    part = x[a:b]
    m = b - a
    statistics = _cusum_statistics(part[None, :], others, n_others, segments_others)
    t, sd, phi, split = (float(v[0]) for v in statistics)
    if sd == 0.0:
        # Noise-free: the split leaves flat segments, so a segment that is not flat is an
        # exact step and a flat one has none.
        return (0.0 if np.ptp(part) > 0 else 1.0), int(split)
    scale = 1.0
    if m <= _SIMULATED_UP_TO:
        scale = _null_scale(m, _null_phi(part, phi, m + n_others))
    # Max |bridge| / (sd sqrt(m)) tends to sup|Brownian bridge| (Kolmogorov distribution).
    return float(stats.kstwobign.sf(t / scale)), int(split)


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
    level.

    Short series: with an estimated sigma_LR the Kolmogorov limit lets too many false steps
    through on short, strongly autocorrelated series (0.10 at N = 30 and phi = 0.6). For
    segments of at most 250 points the statistic is therefore divided by a scale
    simulated from the fitted AR(1) (``_null_scale``: 2000 series with the segment's
    length, its statistic computed the same way; the largest ratio of the simulated
    90, 95 and 99 % quantiles to Kolmogorov's, at least 1), the phi simulated being the
    smallest of three estimates with their margins (``_null_phi``). Simulated share of
    in-control AR(1) series with any reported step at alpha = 0.05 (2000 series each,
    benchmarks/bench_time.py --calibration; the Kolmogorov limit alone in brackets, as
    the test was before):

    ====  =============  =============  =============  =============
    N     phi = 0        phi = 0.3      phi = 0.6      phi = 0.8
    ====  =============  =============  =============  =============
    20    0.017 (0.031)  0.026 (0.073)  0.038 (0.130)  0.048 (0.178)
    30    0.028 (0.031)  0.035 (0.062)  0.035 (0.088)  0.044 (0.149)
    50    0.024 (0.025)  0.033 (0.054)  0.034 (0.075)  0.034 (0.122)
    100   0.028 (0.028)  0.044 (0.049)  0.033 (0.049)  0.029 (0.076)
    200   0.030 (0.030)  0.049 (0.050)  0.035 (0.037)  0.030 (0.045)
    ====  =============  =============  =============  =============

    The price is power on the shortest series: a 2-sigma step at a third of a white-noise
    series is detected in 40 % of series of 20 points (68 % before), 77 % of 30 (91 %),
    98 % of 50 (99 %) and all of 100; with phi = 0.3, where the test was liberal before,
    21 % (47 %), 42 % (69 %), 72 % (88 %) and 99.6 % (99.8 %). A detected 2-sigma step
    is placed within +-1 point in about 75-90 % of white-noise series. Subgroup means are
    treated as equally precise (unequal n is not weighted).

    Cost: each round of the segmentation is one pass over the series (the long-run
    variance is pooled from per-segment sums), and the simulated nulls are kept by
    length and phi.

    Returns the list of (position of the first point after the change, adjusted p) and the
    long-run sd used. Checked by simulation: false-step rate on in-control white noise and
    AR(1) series up to phi = 0.8, and recovery of a planted 2-sigma step
    (tests/test_timeseries.py).

    Examples
    --------
    >>> x = np.r_[np.zeros(30), np.full(30, 3.0)] + np.tile([0.5, -0.5], 30)
    >>> [pos for pos, p in change_points(x)[0]]
    [30]
    """
    n = x.size
    found: list[tuple[int, float]] = []
    fresh = [(0, n)]
    while fresh:
        cuts = sorted({0, n, *(pos for pos, _ in found)})
        sums = {(a, b): _segment_sums(x[a:b]) for a, b in zip(cuts[:-1], cuts[1:], strict=True)}
        total = np.sum(list(sums.values()), axis=0)
        tested = [(a, b) for a, b in fresh if b - a >= _MIN_SEGMENT]
        fresh = []
        for a, b in tested:
            others = total - sums[(a, b)]
            p, k = _segment_test(x, a, b, others, n - (b - a), len(sums) - 1)
            p = min(1.0, p * len(tested))
            if p < alpha:
                found.append((a + k, p))
                fresh += [(a, a + k), (a + k, b)]
    found.sort()
    cuts = [0, *(pos for pos, _ in found), n]
    sums = np.sum([_segment_sums(x[a:b]) for a, b in zip(cuts[:-1], cuts[1:], strict=True)], axis=0)
    sd, _ = _long_run_sd(sums, n, len(cuts) - 1)
    return found, float(sd)


# --------------------------------------------------------------------------- the level


def _ramp(x: np.ndarray) -> tuple[np.ndarray, int, float]:
    """The least-squares ramp a + b max(0, t - onset) over every onset: level, onset, slope.

    Each side of the onset keeps at least ``_MIN_SIDE`` points; t is the point's position.
    """
    n = x.size
    t = np.arange(n, dtype=np.float64)
    hinges = np.arange(1, n - 1)
    rss = np.where((hinges >= _MIN_SIDE) & (n - 1 - hinges >= _MIN_SIDE), ramp_rss(t, x), np.inf)
    onset = int(hinges[np.argmin(rss)])
    rise = np.maximum(0.0, t - onset)
    centred = rise - rise.mean()
    slope = _dot(centred, x - x.mean()) / _dot(centred, centred)
    return x.mean() + slope * centred, onset, slope


def _level_models(
    x: np.ndarray, cuts: np.ndarray, alpha: float
) -> tuple[pd.DataFrame, tuple[str, ...], str, dict[str, tuple[np.ndarray, AR1Fit]], float]:
    """The level models, the explanation, the chosen model, each level and fit, and the p
    value of the autocorrelation that the explanation rests on (see the module notes)."""
    n = x.size
    confirmed = cuts.size > 2
    means = np.add.reduceat(x, cuts[:-1]) / np.diff(cuts)
    models: dict[str, tuple[np.ndarray, int, int]] = {"mean": (np.full(n, x.mean()), 0, -1)}
    if confirmed:
        models["steps"] = (np.repeat(means, np.diff(cuts)), cuts.size - 2, int(cuts[1]))
    else:
        split = int(_best_splits(np.cumsum(x - x.mean())[:-1]))
        level = np.r_[np.full(split, x[:split].mean()), np.full(n - split, x[split:].mean())]
        models["single_step"] = (level, 1, split)
    ramp, onset, _ = _ramp(x)
    models["drift"] = (ramp, 1, onset + 1)
    fits: dict[str, tuple[np.ndarray, AR1Fit]] = {}
    rows = []
    for name, (level, changes, position) in models.items():
        # Level parameters (a mean per segment and a position per change; a ramp's
        # intercept, onset and slope), plus phi and the innovation variance.
        fitted = 1 + 2 * changes
        linear = 1 + changes if name != "drift" else 2
        fit = ar1_fit(x - level, fitted=fitted, linear=linear)
        fits[name] = (level, fit)
        parameters = fitted + 2
        rows.append(
            {
                "model": name,
                "changes": changes,
                "position": position,
                "parameters": parameters,
                "phi": fit.phi,
                "se": fit.se,
                "p": fit.p,
                "loglik": fit.loglik,
                "bic": -2.0 * fit.loglik + parameters * math.log(n),
            }
        )
    table = pd.DataFrame(rows)
    bic = dict(zip(table["model"], table["bic"], strict=True))
    if confirmed:
        chosen = "drift" if bic["drift"] < bic["steps"] else "steps"
        p_auto = fits[chosen][1].p
    else:
        chosen = "mean"
        p_auto = float(np.fmax.reduce(table["p"].to_numpy()))
    words = [chosen] if confirmed else []
    if not p_auto >= alpha:  # NaN: phi at the edge of (-1, 1), as correlated as can be
        words.append("autocorrelation")
    elif not confirmed and not fits["mean"][1].p >= alpha:
        words.append("change_or_autocorrelation")
    table = table.assign(chosen=table["model"] == chosen)
    return table, tuple(words), chosen, fits, p_auto


def _drift_table(series: pd.DataFrame, level: np.ndarray | None, onset: int) -> pd.DataFrame:
    """``subgroup, position, time, slope, before, after`` of the drift (no row without one)."""
    labels = series["subgroup"].array
    at = [] if level is None else [onset + 1]
    return pd.DataFrame(
        {
            "subgroup": pd.Categorical(
                [labels[i] for i in at], categories=labels.categories, ordered=True
            ),
            "position": np.array(at, dtype=np.int64),
            "time": series["start"].iloc[at].reset_index(drop=True),
            "slope": [float(level[-1] - level[-2]) for _ in at],
            "before": [float(level[onset]) for _ in at],
            "after": [float(level[-1]) for _ in at],
        }
    )


# --------------------------------------------------------------------------- charts


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


def _no_stratum(size: int) -> pd.Categorical:
    """``pd.Categorical([None] * size)``, without a list of ``size`` Nones."""
    return pd.Categorical.from_codes(
        np.full(size, -1, dtype=np.int8), pd.Index([], dtype=np.float64)
    )


def _moving_center_chart(series: pd.DataFrame, x: np.ndarray, has_time: bool) -> ChartResult:
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

    found, long_run_sd = change_points(x, alpha=alpha)
    cuts = np.array([0, *[pos for pos, _ in found], n])
    seg_means = np.add.reduceat(x, cuts[:-1]) / np.diff(cuts)
    models, explanation, chosen, fits, p_auto = _level_models(x, cuts, alpha)
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
    drift = _drift_table(series, level if chosen == "drift" else None, onset)
    out_series = series.assign(segment_mean=np.repeat(seg_means, np.diff(cuts)), level=level)

    has_time = bool(starts.notna().any())
    raw = fits["mean"][1]
    notes = [
        f"ACF/PACF band: +-{stats.norm.ppf(1 - alpha / 2):.2f}/sqrt(N) (white-noise band); "
        "the ACF and Ljung-Box tables are of the series itself.",
        f"Step test: CUSUM with long-run sd {long_run_sd:.4g}, Bonferroni within each round "
        f"of binary segmentation, alpha = {alpha}; the null of segments up to "
        f"{_SIMULATED_UP_TO} points simulated from the fitted AR(1).",
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
        residual_chart = _residual_chart(series, ar1_residuals(x - level, phi, fit.mean), has_time)
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
        explanation=explanation,
        level_models=models,
        drift=drift,
        autocorrelation_p=float(p_auto),
    )

"""The distributions of the level comparisons, computed by quadrature and cached as splines.

* Analysis of means: the exact distribution of max_i |mean_i - grand mean| / se for k
  independent normal means of equal size, studentised by an s on ``df`` degrees of freedom
  (:func:`anom_cdf`, :func:`anom_critical`).
* Tukey's test: the upper tail of the studentized range (:func:`studentized_range_sf`,
  :func:`tukey_critical`), checked against scipy.stats.studentized_range.

Each normal-theory distribution is held as a spline in its argument and studentised by
Gauss-Legendre quadrature over the distribution of s / sigma, so a whole table of p-values is
one vectorised evaluation.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import integrate, interpolate, optimize, special, stats


@lru_cache(maxsize=64)
def _anom_max_cdf(k: int) -> interpolate.CubicSpline:
    """G(c) = P(max_i |Z_i - Zbar| <= c) for k independent standard normals, as a spline.

    Given sum(Z) = 0 the Z_i are the deviations, so with the Fourier form of the delta
    function G(c) = sqrt(2k / pi) * int_0^inf g(t)^k dt, where
    g(t) = int_{-c}^{c} phi(x) cos(t x) dx
         = -Re(exp(-c^2/2) (exp(ict) w((t + ic)/sqrt 2) - exp(-ict) w((t - ic)/sqrt 2))) / 2
    with w the Faddeeva function (no overflow). Simpson's rule in t; the oscillating tail
    of g decays as 1/t, so three and four levels integrate further. Two levels: exact.
    """
    c = np.linspace(0.0, 7.0, 141)
    if k == 2:
        return interpolate.CubicSpline(c, 2.0 * stats.norm.cdf(np.sqrt(2.0) * c) - 1.0)
    t = np.linspace(0.0, 40.0 if k <= 4 else 20.0, 1601 if k <= 4 else 801)
    cc, tt = c[:, None], t[None, :]
    ict = 1j * cc * tt
    faddeeva = np.exp(ict) * special.wofz((tt + 1j * cc) / np.sqrt(2.0)) - np.exp(
        -ict
    ) * special.wofz((tt - 1j * cc) / np.sqrt(2.0))
    g = -0.5 * np.exp(-0.5 * cc**2) * faddeeva.real
    values = np.sqrt(2.0 * k / np.pi) * integrate.simpson(g**k, x=t, axis=-1)
    return interpolate.CubicSpline(c, np.clip(values, 0.0, 1.0))


@lru_cache(maxsize=64)
def _chi_nodes(df: float) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights for the distribution of s / sigma on ``df``."""
    low, high = np.sqrt(stats.chi2.ppf([1e-12, 1.0 - 1e-12], df) / df)
    x, w = np.polynomial.legendre.leggauss(96)
    u = low + (high - low) * (x + 1.0) / 2.0
    return u, w * (high - low) / 2.0 * stats.chi2.pdf(df * u * u, df) * 2.0 * df * u


def _studentized(spline: interpolate.CubicSpline, c: np.ndarray, df: float) -> np.ndarray:
    """E[G(c * s / sigma)] with s on ``df`` degrees of freedom, for a distribution function
    G of a normal-theory statistic held as a spline on [0, x_max] (1 beyond)."""
    top = float(spline.x[-1])
    if np.isinf(df):
        return np.clip(spline(np.minimum(c, top)), 0.0, 1.0)
    u, w = _chi_nodes(df)
    return np.clip(spline(np.minimum(np.multiply.outer(c, u), top)), 0.0, 1.0) @ w


def anom_cdf(h: np.ndarray, k: int, df: float) -> np.ndarray:
    """P(max_i |Ybar_i - Ybar| / (s sqrt((k - 1) / (k n))) <= h) for k equal groups of
    normal values, s on ``df`` degrees of freedom."""
    c = np.asarray(h, dtype=float) * np.sqrt((k - 1) / k)
    return _studentized(_anom_max_cdf(k), c, df)


@lru_cache(maxsize=64)
def _range_cdf(k: int) -> interpolate.CubicSpline:
    """P(range of k standard normals <= w) = k int phi(z) (Phi(z) - Phi(z - w))^(k-1) dz,
    by Gauss-Legendre quadrature on [-9, 9], as a spline in w on [0, 20]."""
    z, weight = np.polynomial.legendre.leggauss(200)
    z, weight = 9.0 * z, 9.0 * weight * stats.norm.pdf(9.0 * z)
    w = np.linspace(0.0, 20.0, 801)
    inside = stats.norm.cdf(z)[None, :] - stats.norm.cdf(z[None, :] - w[:, None])
    return interpolate.CubicSpline(w, k * (np.clip(inside, 0.0, 1.0) ** (k - 1)) @ weight)


def studentized_range_sf(q: np.ndarray, k: int, df: float) -> np.ndarray:
    """Upper tail of the studentized range (the Tukey test): a vectorised quadrature.

    Checked against scipy.stats.studentized_range through scipy.stats.tukey_hsd
    (tests/test_variation.py).
    """
    return 1.0 - _studentized(_range_cdf(k), np.asarray(q, dtype=float), df)


def sidak_critical(alpha: float, k: int, df: float) -> float:
    """The t quantile that holds k two-sided comparisons to a familywise ``alpha`` by Sidak's
    inequality, t(1 - (1 - (1 - alpha)^(1/k)) / 2, df): a slightly conservative bound."""
    return stats.t.ppf(1 - (1 - (1 - alpha) ** (1 / k)) / 2, df)


@lru_cache(maxsize=256)
def anom_critical(alpha: float, k: int, df: float) -> float:
    """Exact ANOM critical value h(alpha; k, df) for equal group sizes.

    The root of :func:`anom_cdf`, bracketed by the single-comparison t quantile (below)
    and the Sidak value (above, by Sidak's inequality). Checked against brute-force
    simulation, the t quantile for k = 2 and Nelson's table value h(0.05; 3, inf) = 2.34
    (tests/test_variation.py).
    """
    low = stats.t.ppf(1 - alpha / 2, df)
    high = sidak_critical(alpha, k, df)
    return float(
        optimize.brentq(
            lambda h: float(anom_cdf(h, k, df)) - (1 - alpha), 0.99 * low, 1.01 * high, xtol=1e-7
        )
    )


@lru_cache(maxsize=256)
def tukey_critical(alpha: float, k: int, df: float) -> float:
    return float(optimize.brentq(lambda q: float(studentized_range_sf(q, k, df)) - alpha, 0.1, 1e3))

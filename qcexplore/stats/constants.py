"""Control chart constants computed from the normal distribution, never typed in as a table.

``d2`` and ``d3`` are the mean and standard deviation of the range of ``n`` independent
standard normal values, found by numerical integration; ``c4`` is the mean of the sample
standard deviation of ``n`` standard normal values, from the gamma function. The limit
factors follow from these three by their usual definitions.
"""

from __future__ import annotations

import math
from functools import cache

import numpy as np
from scipy import integrate, special

from qcexplore.errors import QCDataError

# The normal density beyond +-12 is below 1e-32, so integrating the range's tail
# probabilities over [-12, 12] loses nothing at double precision for any practical n.
_BOUND = 12.0
_TOL = 1e-12


def _check_size(n: int, name: str = "n") -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or int(n) < 2:
        raise QCDataError(
            f"{name}={n!r}: the subgroup size must be a whole number of at least 2; "
            "individual values (n = 1) use the moving range of two (n = 2)."
        )
    return int(n)


def _range_exceeds(x: float | np.ndarray, n: int) -> float | np.ndarray:
    """P(min < x < max) for n standard normal values: the probability that x lies in the range."""
    return 1.0 - special.ndtr(x) ** n - special.ndtr(-x) ** n


@cache
def d2(n: int) -> float:
    """Mean of the range of ``n`` standard normal values (the ``d2`` constant).

    E[R] is the integral over x of P(min < x < max) = 1 - Phi(x)^n - (1 - Phi(x))^n.

    Parameters
    ----------
    n : int
        Subgroup size, at least 2.

    Notes
    -----
    Checked against the printed tables of Montgomery (Introduction to Statistical Quality
    Control, Appendix VI) and ASTM E2587 for n = 2 to 25, and against a Monte Carlo estimate.

    Examples
    --------
    >>> round(d2(5), 3)
    2.326
    """
    n = _check_size(n)
    value, _ = integrate.quad(
        _range_exceeds, -_BOUND, _BOUND, args=(n,), epsabs=_TOL, epsrel=_TOL, limit=200
    )
    return float(value)


@cache
def d3(n: int) -> float:
    """Standard deviation of the range of ``n`` standard normal values (the ``d3`` constant).

    The range is the length of the set {t : min < t < max}, so its variance is the double
    integral over (s, t) of the covariance of the two indicators. For s < t that covariance is
    P(min < s, max > t) - p(s) p(t), with P(min < s, max > t) = 1 - (1 - Phi(s))^n - Phi(t)^n
    + (Phi(t) - Phi(s))^n and p(x) = P(min < x < max). Integrating the covariance (rather than
    E[R^2] and subtracting d2^2) avoids cancellation and keeps the result accurate to 1e-9.

    Parameters
    ----------
    n : int
        Subgroup size, at least 2.

    Notes
    -----
    Checked against the printed tables of Montgomery (Appendix VI) and ASTM E2587 for
    n = 2 to 25, against the exact value for n = 2 (sqrt(2 - 4/pi)), and a Monte Carlo estimate.

    Examples
    --------
    >>> round(d3(5), 3)
    0.864
    """
    n = _check_size(n)

    def inner(s: float) -> float:
        fs = special.ndtr(s)
        ps = 1.0 - fs**n - (1.0 - fs) ** n

        def cov(t: float) -> float:
            ft = special.ndtr(t)
            both = 1.0 - (1.0 - fs) ** n - ft**n + max(ft - fs, 0.0) ** n
            return both - ps * (1.0 - ft**n - (1.0 - ft) ** n)

        value, _ = integrate.quad(cov, s, _BOUND, epsabs=_TOL, epsrel=1e-10, limit=200)
        return value

    half, _ = integrate.quad(inner, -_BOUND, _BOUND, epsabs=1e-11, epsrel=1e-10, limit=200)
    return float(math.sqrt(2.0 * half))


@cache
def c4(n: float) -> float:
    """Mean of the sample standard deviation of ``n`` standard normal values (``c4``).

    c4(n) = sqrt(2 / (n - 1)) * Gamma(n / 2) / Gamma((n - 1) / 2); a non-integer ``n > 1`` is
    allowed (it arises with effective degrees of freedom).

    Parameters
    ----------
    n : float
        Subgroup size, greater than 1.

    Notes
    -----
    Checked against the printed tables of Montgomery (Appendix VI) and ASTM E2587 for
    n = 2 to 25 and against the exact value sqrt(2/pi) for n = 2.

    Examples
    --------
    >>> round(c4(5), 4)
    0.94
    """
    if isinstance(n, bool) or not isinstance(n, (int, float, np.integer, np.floating)):
        raise QCDataError(f"n={n!r}: the subgroup size must be a number greater than 1.")
    n = float(n)
    if not n > 1.0 or not math.isfinite(n):
        raise QCDataError(f"n={n!r}: the subgroup size must be a finite number greater than 1.")
    log_ratio = special.gammaln(n / 2.0) - special.gammaln((n - 1.0) / 2.0)
    return float(math.sqrt(2.0 / (n - 1.0)) * math.exp(log_ratio))


@cache
def _constants(n: int) -> tuple[tuple[str, float], ...]:
    mean_range, sd_range, mean_sd = d2(n), d3(n), c4(n)
    root = math.sqrt(n)
    s_spread = 3.0 * math.sqrt(1.0 - mean_sd**2) / mean_sd
    r_spread = 3.0 * sd_range / mean_range
    return (
        ("d2", mean_range),
        ("d3", sd_range),
        ("c4", mean_sd),
        ("A2", 3.0 / (mean_range * root)),
        ("A3", 3.0 / (mean_sd * root)),
        ("B3", max(0.0, 1.0 - s_spread)),
        ("B4", 1.0 + s_spread),
        ("D3", max(0.0, 1.0 - r_spread)),
        ("D4", 1.0 + r_spread),
        ("E2", 3.0 / mean_range),
    )


def constants(n: int) -> dict[str, float]:
    """The control chart constants for subgroup size ``n``, computed, not looked up.

    Keys ``d2, d3, c4`` (see those functions) and the three-sigma limit factors
    ``A2 = 3/(d2 sqrt(n))``, ``A3 = 3/(c4 sqrt(n))``, ``B3, B4 = max(0, 1 -+ 3 sqrt(1 - c4^2)/c4)``,
    ``D3, D4 = max(0, 1 -+ 3 d3/d2)`` and ``E2 = 3/d2`` (E2 is used with moving ranges of two,
    that is with ``d2(2)``; here it is given for the size ``n`` asked for).

    Parameters
    ----------
    n : int
        Subgroup size, at least 2.

    Returns
    -------
    dict[str, float]
        A new dict on every call (the computation behind it is cached).

    Notes
    -----
    Checked against the printed tables of Montgomery (Appendix VI) and ASTM E2587 for
    n = 2 to 25.

    Examples
    --------
    >>> c = constants(5)
    >>> round(c["A2"], 3), round(c["D4"], 3)
    (0.577, 2.114)
    """
    return dict(_constants(_check_size(n)))

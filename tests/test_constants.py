"""Control chart constants against printed tables, exact values and simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import special

from qcexplore.errors import QCDataError
from qcexplore.stats.constants import c4, constants, d2, d3

N = list(range(2, 26))


def _table(text: str) -> dict[int, float]:
    # "-" marks an entry not remembered with confidence; it is left out of the check.
    return {n: float(v) for n, v in zip(N, text.split(), strict=True) if v != "-"}


# Montgomery, Introduction to Statistical Quality Control, Appendix VI, and ASTM E2587,
# n = 2 to 25 (from memory).
PRINTED = {
    "d2": _table(
        "1.128 1.693 2.059 2.326 2.534 2.704 2.847 2.970 3.078 3.173 3.258 3.336"
        " 3.407 3.472 3.532 3.588 3.640 3.689 3.735 3.778 3.819 3.858 3.895 3.931"
    ),
    "d3": _table(
        "0.853 0.888 0.880 0.864 0.848 0.833 0.820 0.808 0.797 0.787 0.778 0.770"
        " 0.763 0.756 0.750 0.744 0.739 - 0.729 0.724 0.720 0.716 0.712 0.708"
    ),
    "c4": _table(
        "0.7979 0.8862 0.9213 0.9400 0.9515 0.9594 0.9650 0.9693 0.9727 0.9754 0.9776 0.9794"
        " 0.9810 0.9823 0.9835 0.9845 0.9854 0.9862 0.9869 0.9876 0.9882 0.9887 0.9892 0.9896"
    ),
    "A2": _table(
        "1.880 1.023 0.729 0.577 0.483 0.419 0.373 0.337 0.308 0.285 0.266 0.249"
        " 0.235 0.223 0.212 0.203 0.194 0.187 0.180 0.173 0.167 0.162 0.157 0.153"
    ),
    "A3": _table(
        "2.659 1.954 1.628 1.427 1.287 1.182 1.099 1.032 0.975 0.927 0.886 0.850"
        " 0.817 0.789 0.763 0.739 0.718 0.698 0.680 0.663 0.647 0.633 0.619 0.606"
    ),
    "B3": _table(
        "0 0 0 0 0.030 0.118 0.185 0.239 0.284 0.321 0.354 0.382"
        " 0.406 0.428 0.448 0.466 0.482 0.497 0.510 0.523 0.534 0.545 0.555 0.565"
    ),
    "B4": _table(
        "3.267 2.568 2.266 2.089 1.970 1.882 1.815 1.761 1.716 1.679 1.646 1.618"
        " 1.594 1.572 1.552 1.534 1.518 1.503 1.490 1.477 1.466 1.455 1.445 1.435"
    ),
    "D3": _table(
        "0 0 0 0 0 0.076 0.136 0.184 0.223 0.256 0.283 0.307"
        " 0.328 0.347 0.363 0.378 0.391 - 0.415 0.425 - 0.443 - 0.459"
    ),
    "D4": _table(
        "3.267 2.574 2.282 2.114 2.004 1.924 1.864 1.816 1.777 1.744 1.717 1.693"
        " 1.672 1.653 1.637 1.622 - - 1.585 1.575 - 1.557 1.548 1.541"
    ),
}


def _from_printed(key: str, n: int) -> float:
    """A limit factor worked out, as the printed tables did, from the rounded d2, d3 and c4."""
    m, s, c = PRINTED["d2"][n], PRINTED["d3"].get(n, math.nan), PRINTED["c4"][n]
    spread_s, spread_r = 3 * math.sqrt(1 - c * c) / c, 3 * s / m
    return {
        "A2": 3 / (m * math.sqrt(n)),
        "A3": 3 / (c * math.sqrt(n)),
        "B3": max(0.0, 1 - spread_s),
        "B4": 1 + spread_s,
        "D3": max(0.0, 1 - spread_r),
        "D4": 1 + spread_r,
        "E2": 3 / m,
    }[key]


@pytest.mark.parametrize(("key", "n"), [(k, n) for k in sorted(PRINTED) for n in PRINTED[k]])
def test_matches_printed_table(key: str, n: int) -> None:
    # Montgomery Appendix VI / ASTM E2587 (from memory), to half a unit in the last digit.
    printed = PRINTED[key][n]
    half_unit = 0.5 * 10.0 ** (-4 if key == "c4" else -3) + 1e-12
    computed = constants(n)[key]
    if key in ("d2", "d3", "c4"):
        assert computed == pytest.approx(printed, abs=half_unit)
    else:
        # Some printed factors were worked out from the rounded d2, d3 (e.g. D4 for n = 3:
        # 1 + 3*0.888/1.693 = 2.5735 -> 2.574, exact 2.5746); accept either derivation, and
        # never more than one unit in the last digit away from the exact value.
        assert abs(computed - printed) <= 2 * half_unit
        assert min(abs(computed - printed), abs(_from_printed(key, n) - printed)) <= half_unit


@pytest.mark.parametrize("n", [2, 5, 10])
def test_e2_is_three_over_d2(n: int) -> None:
    # E2 = 3/d2 (common practice); the printed E2 for n = 2 is 2.660 (Montgomery Appendix VI,
    # from memory), worked out from the rounded d2 = 1.128 (exact 3/d2 = 2.6587).
    assert constants(n)["E2"] == pytest.approx(3.0 / d2(n), rel=1e-15)
    if n == 2:
        assert round(3.0 / round(d2(2), 3), 3) == 2.660


def test_exact_small_n() -> None:
    # Exact results for normal samples (common practice): E|X1 - X2| = 2/sqrt(pi),
    # Var|X1 - X2| = 2 - 4/pi, E[range of 3] = 3/sqrt(pi), c4(2) = sqrt(2/pi).
    assert d2(2) == pytest.approx(2.0 / math.sqrt(math.pi), abs=1e-12)
    assert d3(2) == pytest.approx(math.sqrt(2.0 - 4.0 / math.pi), abs=1e-9)
    assert d2(3) == pytest.approx(3.0 / math.sqrt(math.pi), abs=1e-12)
    assert c4(2) == pytest.approx(math.sqrt(2.0 / math.pi), abs=1e-15)


def test_against_simulation() -> None:
    # Monte Carlo with 200,000 normal subgroups of 5 and 12 (simulation check).
    rng = np.random.default_rng(20261201)
    for n in (5, 12):
        x = rng.standard_normal((200_000, n))
        r = x.max(axis=1) - x.min(axis=1)
        s = x.std(axis=1, ddof=1)
        se = r.std() / math.sqrt(r.size)
        assert abs(r.mean() - d2(n)) < 4 * se
        assert abs(r.std() - d3(n)) < 0.01
        assert abs(s.mean() - c4(n)) < 4 * s.std() / math.sqrt(s.size)


@pytest.mark.parametrize("n", [3, 7, 19, 25])
def test_against_range_density(n: int) -> None:
    # Independent route to 1e-9: the density of the range of n normals,
    # f(w) = n(n-1) int phi(x) phi(x+w) (Phi(x+w) - Phi(x))^(n-2) dx (common practice),
    # integrated on a 400 x 400 Gauss-Legendre grid (scipy.special.roots_legendre).
    nodes, weights = special.roots_legendre(400)
    w, ww = 7.0 * nodes + 7.0, 7.0 * weights
    x, wx = 10.0 * nodes, 10.0 * weights
    xx, rr = np.meshgrid(x, w)
    joint = np.exp(-(xx**2) / 2 - (xx + rr) ** 2 / 2) / (2 * np.pi)
    density = n * (n - 1) * (joint * (special.ndtr(xx + rr) - special.ndtr(xx)) ** (n - 2)) @ wx
    mean = (w * density) @ ww
    var = (w**2 * density) @ ww - mean**2
    assert d2(n) == pytest.approx(mean, abs=1e-9)
    assert d3(n) == pytest.approx(math.sqrt(var), abs=1e-9)


def test_c4_accepts_non_integer_and_large() -> None:
    # c4 tends to 1 - 1/(4n) for large n (common practice).
    assert c4(2.5) == pytest.approx(
        math.sqrt(2 / 1.5) * math.gamma(1.25) / math.gamma(0.75), rel=1e-13
    )
    assert c4(10_000) == pytest.approx(1 - 1 / 40_000, abs=1e-8)


def test_constants_returns_fresh_dict() -> None:
    c = constants(4)
    c["d2"] = 0.0
    assert constants(4)["d2"] == pytest.approx(2.059, abs=5e-4)
    assert set(c) == {"d2", "d3", "c4", "A2", "A3", "B3", "B4", "D3", "D4", "E2"}


@given(st.one_of(st.integers(max_value=1), st.floats(), st.text(max_size=3), st.booleans()))
def test_bad_size_raises(bad: object) -> None:
    with pytest.raises(QCDataError, match="n="):
        constants(bad)  # type: ignore[arg-type]


@given(st.one_of(st.floats(max_value=1.0), st.just(math.inf), st.just(math.nan)))
def test_bad_c4_raises(bad: float) -> None:
    with pytest.raises(QCDataError, match="n="):
        c4(bad)

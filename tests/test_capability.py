"""Tests for qcexplore.stats.capability: each reference value names its source."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.diagnostic import normal_ad

from qcexplore.errors import QCDataError
from qcexplore.spec import Spec
from qcexplore.stats.capability import anderson_darling_normal, capability, chart_capability
from qcexplore.stats.charts import control_chart


def exact_sample(mean: float, sd: float, n: int = 200, seed: int = 3) -> np.ndarray:
    """Normal-looking values rescaled so the sample mean and sd are exactly as given."""
    z = np.random.default_rng(seed).standard_normal(n)
    return mean + sd * (z - z.mean()) / z.std(ddof=1)


def cap(values, *, lsl=None, usl=None, target=None, **kwargs):
    """cap() of the values as a one-column table against Spec(lsl, usl, target)."""
    frame = pd.DataFrame({"net_g": values})
    return capability(frame, value="net_g", spec=Spec(lsl=lsl, usl=usl, target=target), **kwargs)


def row(result, name):
    frame = result.indices.set_index("index")
    return frame.loc[name]


def test_indices_from_known_mean_and_sigma():
    # Data built with mean 500 and sd 2; Cp = 12/12 = 1, Cpk = min(8, 4)/6 (definitions,
    # common practice).
    x = exact_sample(500.0, 2.0)
    r = cap(x, lsl=492.0, usl=504.0, sigma_within=1.0)
    assert row(r, "pp")["value"] == pytest.approx(1.0, rel=1e-12)
    assert row(r, "ppk")["value"] == pytest.approx(4.0 / 6.0, rel=1e-12)
    assert row(r, "ppl")["value"] == pytest.approx(8.0 / 6.0, rel=1e-12)
    assert row(r, "cp")["value"] == pytest.approx(2.0, rel=1e-12)
    assert row(r, "cpk")["value"] == pytest.approx(4.0 / 3.0, rel=1e-12)
    assert list(r.indices.columns) == ["index", "value", "lower", "upper"]
    assert r.mean == pytest.approx(500.0) and r.sigma_overall == pytest.approx(2.0)


@pytest.mark.parametrize(
    ("half_width", "expected_ppm", "tol"),
    [
        # Centred normal process, Cp = 1: 2,700 ppm outside (common practice tables).
        (3.0, 2700.0, 1.0),
        # Cp = 1.33 (limits at +-4 sigma): about 63 ppm (common practice tables).
        (4.0, 63.0, 0.5),
    ],
)
def test_expected_ppm_of_centred_process(half_width, expected_ppm, tol):
    x = exact_sample(10.0, 0.5)
    r = cap(x, lsl=10.0 - half_width * 0.5, usl=10.0 + half_width * 0.5)
    ppm = r.ppm.set_index("side")
    assert ppm.loc["total", "expected"] == pytest.approx(expected_ppm, abs=tol)
    assert ppm.loc["lower", "expected"] == pytest.approx(ppm.loc["upper", "expected"])
    assert list(r.ppm.columns) == ["side", "observed", "expected"]


def test_observed_ppm_counts_values_outside():
    x = np.arange(1.0, 101.0)  # 100 values, 3 below 4 and 5 above 95
    r = cap(x, lsl=4.0, usl=95.0)
    ppm = r.ppm.set_index("side")["observed"]
    assert ppm["lower"] == pytest.approx(30000.0)
    assert ppm["upper"] == pytest.approx(50000.0)
    assert ppm["total"] == pytest.approx(80000.0)


def test_chi_square_interval_for_cp_by_hand():
    # Cp interval: Cp * sqrt(chi2_{a/2,n-1}/(n-1)) .. Cp * sqrt(chi2_{1-a/2,n-1}/(n-1));
    # hand computation with scipy.stats.chi2.
    x = exact_sample(0.0, 1.0, n=50)
    r = cap(x, lsl=-3.6, usl=3.6, sigma_within=1.2, confidence=0.9)
    cp = 7.2 / (6 * 1.2)
    lower = cp * math.sqrt(stats.chi2.ppf(0.05, 49) / 49)
    upper = cp * math.sqrt(stats.chi2.ppf(0.95, 49) / 49)
    assert row(r, "cp")["value"] == pytest.approx(cp)
    assert row(r, "cp")["lower"] == pytest.approx(lower, rel=1e-12)
    assert row(r, "cp")["upper"] == pytest.approx(upper, rel=1e-12)
    pp = row(r, "pp")
    assert pp["lower"] == pytest.approx(1.2 * math.sqrt(stats.chi2.ppf(0.05, 49) / 49))


def test_bissell_interval_for_cpk():
    # Bissell (1990): Cpk +- z * sqrt(1/(9n) + Cpk^2/(2(n-1))).
    n = 40
    x = exact_sample(5.0, 1.0, n=n)
    r = cap(x, lsl=1.0, usl=8.0)
    ppk = 1.0  # (8 - 5) / 3
    half = stats.norm.ppf(0.975) * math.sqrt(1 / (9 * n) + ppk**2 / (2 * (n - 1)))
    got = row(r, "ppk")
    assert got["value"] == pytest.approx(ppk)
    assert got["lower"] == pytest.approx(ppk - half, rel=1e-12)
    assert got["upper"] == pytest.approx(ppk + half, rel=1e-12)


def test_minimum_fill_has_lower_side_only():
    x = exact_sample(455.0, 1.5)
    r = cap(x, lsl=450.0, sigma_within=1.4)
    assert r.indices["index"].tolist() == ["cpl", "cpk", "ppl", "ppk"]
    assert r.ppm["side"].tolist() == ["lower", "total"]


def test_anderson_darling_against_scipy_and_statsmodels():
    # Statistic: scipy.stats.anderson; statistic and D'Agostino-Stephens p value:
    # statsmodels.stats.diagnostic.normal_ad (general-purpose libraries).
    rng = np.random.default_rng(7)
    for x in (rng.normal(size=25), rng.exponential(size=60), rng.uniform(size=200)):
        a2, p = anderson_darling_normal(x)
        ref_a2, ref_p = normal_ad(x)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)
            assert a2 == pytest.approx(stats.anderson(x, dist="norm").statistic, rel=1e-10)
        assert a2 == pytest.approx(ref_a2, rel=1e-10)
        assert p == pytest.approx(ref_p, rel=1e-10, abs=1e-300)


def test_warnings_for_small_non_normal_and_unstable_data():
    x = np.random.default_rng(2).exponential(size=20)
    r = cap(x, usl=6.0, in_control=False)
    text = " ".join(r.warnings)
    assert "not look normal" in text
    assert "not in statistical control" in text
    assert "Only 20 values" in text
    assert "Cp and Cpk are omitted" in text
    assert r.normality["p"].iloc[0] < 0.05


def test_clean_data_carry_no_warning():
    # The caution is the views' (qcexplore.caution), chosen by the data, not a result's.
    r = cap(exact_sample(0.0, 1.0), lsl=-4, usl=4, sigma_within=1.0, in_control=True)
    assert r.warnings == ()


def test_histogram_and_curve_for_drawing():
    x = exact_sample(100.0, 3.0, n=300)
    r = cap(x, lsl=90.0, usl=110.0)
    assert list(r.histogram.columns) == ["left", "right", "count"]
    assert r.histogram["count"].sum() == 300
    assert list(r.curve.columns) == ["x", "density"]
    assert r.curve["x"].min() <= 90.0 and r.curve["x"].max() >= 110.0
    width = r.histogram["right"].iloc[0] - r.histogram["left"].iloc[0]
    # The curve is the fitted normal scaled to counts: its area equals n * bin width.
    area = np.trapezoid(r.curve["density"], r.curve["x"])
    assert area == pytest.approx(300 * width, rel=0.01)


def test_the_chart_limits_carry_the_sigma_estimator_and_its_degrees_of_freedom():
    # 20 subgroups of 10 (X-bar/S): nu = k c4^2 / (2 (1 - c4^2)) with the handbook
    # c4(10) = 0.9727 (common practice tables); 20 subgroups of 4 (X-bar/R):
    # nu = k d2^2 / (2 d3^2) with d2(4) = 2.059, d3(4) = 0.880 (the same tables).
    rng = np.random.default_rng(4)
    for n, kind, expected in (
        (10, "xbar_s", 20 * 0.9727**2 / (2 * (1 - 0.9727**2))),
        (4, "xbar_r", 20 * 2.059**2 / (2 * 0.880**2)),
    ):
        f = pd.DataFrame({"h": np.repeat(np.arange(20), n), "w": rng.normal(0, 1, 20 * n)})
        chart = control_chart(f, value="w", subgroup="h", kind=kind)
        for limits in (chart.limits, chart.secondary.limits):
            assert limits["estimator"].tolist() == [{"xbar_s": "sd", "xbar_r": "range"}[kind]]
            assert float(limits["sigma_df"].iloc[0]) == pytest.approx(expected, rel=5e-3)
        r = chart_capability(f, value="w", spec=Spec(lsl=-4.0, usl=4.0), chart=chart)
        assert f"{float(chart.limits['sigma_df'].iloc[0]):.1f} effective" in r.interval_method
    # The R chart beside a chart of the means with another sigma keeps the within estimate.
    between = control_chart(f, value="w", subgroup="h", sigma_method="between_means")
    assert between.limits["estimator"].tolist() == ["between_means"]
    assert between.limits["sigma_df"].isna().all()
    assert between.secondary.limits["estimator"].tolist() == ["range"]
    given_sigma = control_chart(f, value="w", subgroup="h", sigma=1.0)
    assert given_sigma.limits["estimator"].tolist() == ["given"]
    assert given_sigma.limits["sigma_df"].isna().all()
    r = chart_capability(f, value="w", spec=Spec(lsl=-4.0, usl=4.0), chart=given_sigma)
    assert "not given" in r.interval_method
    per_stratum = control_chart(
        f.assign(g=f["h"] % 2), value="w", subgroup="h", by="g", limits="per_stratum"
    )
    with pytest.raises(QCDataError, match="limits='pooled'"):
        chart_capability(f, value="w", spec=Spec(lsl=-4.0, usl=4.0), chart=per_stratum)


@pytest.mark.parametrize(
    ("kwargs", "values", "match"),
    [
        ({"lsl": 1.0}, [1.0, 2.0], "at least 3"),
        (
            {"lsl": 1.0},
            [1.0, np.nan, 2.0, 3.0],
            "given as value: missing or infinite values in row 2;",
        ),
        ({"usl": 1.0}, [2.0, 2.0, 2.0], "identical"),
        ({"usl": 9.0, "sigma_within": 0.0}, [1.0, 2.0, 3.0], "sigma_within"),
        ({"usl": 9.0, "confidence": 1.5}, [1.0, 2.0, 3.0], "confidence"),
        # Arguments that are not numbers are bad input too, never a TypeError.
        ({"usl": 9.0, "sigma_within": "x"}, [1.0, 2.0, 3.0], "sigma_within"),
        ({"usl": 9.0, "confidence": None}, [1.0, 2.0, 3.0], "confidence"),
        ({"usl": 9.0}, ["a", "b", "c"], "given as value: cells that are not numbers.*rows 1, 2, 3"),
    ],
)
def test_bad_input_raises(kwargs, values, match):
    with pytest.raises(QCDataError, match=match):
        cap(np.array(values, dtype=object), **kwargs)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({}, "at least one limit"),
        ({"lsl": 5.0, "usl": 5.0}, "not below usl"),
        ({"usl": np.inf}, "usl"),
        ({"lsl": "a"}, "lsl='a'"),
        ({"usl": 9.0, "target": "mid"}, "target"),
    ],
)
def test_a_bad_specification_is_refused_by_spec(kwargs, match):
    # The limits are checked once, where the Spec is made, before any capability is computed.
    with pytest.raises(QCDataError, match=match):
        cap(np.array([1.0, 2.0, 3.0]), **kwargs)


def test_a_table_is_required():
    with pytest.raises(QCDataError, match="DataFrame"):
        capability(np.array([1.0, 2.0, 3.0]), value="net_g", spec=Spec(usl=9.0))


@settings(max_examples=40, deadline=None)
@given(
    loc=st.floats(-1e6, 1e6),
    scale=st.floats(1e-3, 1e3),
    seed=st.integers(0, 2**16),
    sigma_ratio=st.floats(0.5, 2.0),
)
def test_indices_invariant_to_units_and_ordered(loc, scale, seed, sigma_ratio):
    # Property: changing units (affine map of values and limits) leaves every index,
    # interval and ppm unchanged; Cpk <= Cp and Ppk <= Pp; intervals contain the estimate.
    z = np.random.default_rng(seed).normal(size=40)
    base = cap(z, lsl=-2.5, usl=3.0, sigma_within=sigma_ratio)
    moved = cap(
        loc + scale * z,
        lsl=loc - 2.5 * scale,
        usl=loc + 3.0 * scale,
        sigma_within=sigma_ratio * scale,
    )
    cols = ["value", "lower", "upper"]
    np.testing.assert_allclose(moved.indices[cols], base.indices[cols], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(moved.ppm["expected"], base.ppm["expected"], rtol=1e-5, atol=1e-6)
    values = base.indices.set_index("index")["value"]
    assert values["cpk"] <= values["cp"] + 1e-12 and values["ppk"] <= values["pp"] + 1e-12
    assert (base.indices["lower"] <= base.indices["value"]).all()
    assert (base.indices["value"] <= base.indices["upper"]).all()

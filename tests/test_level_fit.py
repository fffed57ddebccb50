"""Level comparisons of a factor that changes inside subgroups, when some subgroup x level
cells are empty: the within-subgroup least-squares fit against statsmodels.

Reference throughout: statsmodels OLS ``y ~ C(sg) + C(noz)`` (the subgroup as a block), its
coefficients and their covariance (``cov_params``), predictions averaged over the subgroups
for the least-squares means; scipy's t and studentized-range distributions and ``kruskal``
for the tests built on them. The layouts are invented for the tests.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import stats

from qcexplore.stats.variation import variation
from qcexplore.stats.variation.distributions import anom_critical

ALPHA = 0.05


def layout(present: np.ndarray, *, effects=(0.0, 0.0, 3.0), block_sd=2.0, noise=0.25, seed=0):
    """One value per present subgroup x nozzle cell (``present``: subgroups x nozzles)."""
    rng = np.random.default_rng(seed)
    k, levels = present.shape
    sg, noz = np.nonzero(present)
    names = np.array(list("abcdefgh"))[:levels]
    y = rng.normal(0, block_sd, k)[sg] + np.asarray(effects)[noz] + rng.normal(0, noise, sg.size)
    return pd.DataFrame(
        {
            "sg": pd.Categorical(sg, categories=range(k), ordered=True),
            "noz": pd.Categorical(names[noz], categories=names),
            "y": y,
        }
    )


def comparisons(frame: pd.DataFrame) -> pd.DataFrame:
    # the variance components do not enter the comparisons: the quickest estimates will do
    r = variation(frame, value="y", subgroup="sg", factors=["noz"], components="ems")
    return r.comparisons["noz"]


def reference(frame: pd.DataFrame) -> dict[str, object]:
    """Least-squares means, the covariance of the level coefficients per unit error
    variance, s and df, from statsmodels OLS."""
    fit = smf.ols("y ~ C(sg) + C(noz)", frame).fit()
    levels = list(frame["noz"].cat.categories)
    names = [f"C(noz)[T.{lev}]" for lev in levels[1:]]
    coef = np.r_[0.0, fit.params[names].to_numpy()]
    cov = np.zeros((len(levels), len(levels)))
    cov[1:, 1:] = fit.cov_params().loc[names, names].to_numpy() / fit.scale  # per unit s^2
    grid = pd.DataFrame(
        [(s, lev) for lev in levels for s in frame["sg"].cat.categories], columns=["sg", "noz"]
    )
    grid["sg"] = pd.Categorical(grid["sg"], categories=frame["sg"].cat.categories)
    lsmean = fit.predict(grid).to_numpy().reshape(len(levels), -1).mean(axis=1)
    n = frame["noz"].value_counts().reindex(levels).to_numpy(dtype=float)
    sg_effect = fit.fittedvalues - coef[frame["noz"].cat.codes.to_numpy()]
    return {
        "levels": levels, "coef": coef, "cov": cov, "lsmean": lsmean, "n": n,
        "s": np.sqrt(fit.scale), "df": fit.df_resid, "sg_effect": sg_effect.to_numpy(),
    }  # fmt: skip


def assert_matches_ols(table: pd.DataFrame, frame: pd.DataFrame, tukey_p: bool = True) -> None:
    """Every comparison row against the statsmodels fit: estimates and standard errors to
    1e-9, the Tukey p-values and limits (scipy's studentized range, slow quadrature: left
    out of the property test, whose q statistics are checked) to 1e-5."""
    ref = reference(frame)
    levels, coef, cov, s, df = ref["levels"], ref["coef"], ref["cov"], ref["s"], ref["df"]
    k = len(levels)
    at = {lev: i for i, lev in enumerate(levels)}
    tukey = table[table["test"] == "tukey"]
    assert len(tukey) == k * (k - 1) // 2
    q_crit = stats.studentized_range.ppf(1 - ALPHA, k, df) if tukey_p else np.nan
    for row in tukey.itertuples():
        i, j = at[row.level], at[row.versus]
        se = s * np.sqrt((cov[i, i] + cov[j, j] - 2 * cov[i, j]) / 2)  # Tukey-Kramer
        assert row.estimate == pytest.approx(coef[i] - coef[j], abs=1e-9)
        assert row.statistic == pytest.approx(abs(coef[i] - coef[j]) / se, rel=1e-9)
        if tukey_p:
            q_sf = stats.studentized_range.sf(row.statistic, k, df)
            assert row.p == pytest.approx(q_sf, abs=1e-5)
            assert row.upper - row.estimate == pytest.approx(q_crit * se, rel=1e-5)
    w = ref["n"] / ref["n"].sum()
    u = np.eye(k) - w
    effect, se = u @ coef, s * np.sqrt(np.diag(u @ cov @ u.T))
    effects = table[table["test"] == "effect"].set_index("level").loc[levels]
    assert effects["estimate"].to_numpy() == pytest.approx(effect, abs=1e-9)
    assert effects["se"].to_numpy() == pytest.approx(se, rel=1e-9)
    assert effects["p"].to_numpy() == pytest.approx(
        2 * stats.t.sf(np.abs(effect / se), df), rel=1e-9, abs=1e-15
    )
    anom = table[table["test"] == "anom"].set_index("level").loc[levels]
    assert anom["estimate"].to_numpy() == pytest.approx(ref["lsmean"], abs=1e-9)
    grand = float(w @ ref["lsmean"])
    effect_cov = u @ cov @ u.T
    if np.allclose(effect_cov, effect_cov[0, 0] * k / (k - 1) * (np.eye(k) - 1 / k)):
        # correlated as k equal groups (a balanced incomplete layout): the exact ANOM value,
        # itself checked against Nelson's table and simulation in tests/test_variation.py
        h = anom_critical(ALPHA, k, df)
    else:  # Sidak's bound, and its adjusted p
        h = stats.t.ppf(1 - (1 - (1 - ALPHA) ** (1 / k)) / 2, df)
        p_each = 2 * stats.t.sf(np.abs(effect / se), df)
        assert anom["p"].to_numpy() == pytest.approx(1 - (1 - p_each) ** k, rel=1e-9)
    assert anom["lower"].to_numpy() == pytest.approx(grand - h * se, abs=1e-9)
    assert anom["upper"].to_numpy() == pytest.approx(grand + h * se, abs=1e-9)
    # Kruskal-Wallis on the values less their subgroup's fitted effect (scipy.stats.kruskal),
    # leaving out the subgroups of one value (each is exactly its level's fit)
    # values equal but for rounding tie, as in the package (10 significant digits)
    raw = frame["y"].to_numpy() - ref["sg_effect"]
    aligned = np.round(raw, 9 - int(np.floor(np.log10(np.max(np.abs(raw))))))
    shared = frame.groupby("sg", observed=True)["y"].transform("size").to_numpy() > 1
    groups = [aligned[shared & (frame["noz"].to_numpy() == lev)] for lev in levels]
    kw = table[table["test"] == "kruskal_wallis"].iloc[0]
    assert kw["statistic"] == pytest.approx(stats.kruskal(*groups).statistic, rel=1e-9)


def test_hand_example_of_eight_values_in_three_subgroups():
    # Issue 21's hand example: nozzle c reads 3 above a and b in every subgroup it is in and
    # is missing from the third. statsmodels OLS y ~ C(sg) + C(noz) gives a - c = -3.000;
    # each cell centred on its own subgroup's mean (the method replaced) gave -2.667.
    frame = pd.DataFrame(
        {
            "sg": pd.Categorical([1, 1, 1, 2, 2, 2, 3, 3], ordered=True),
            "noz": pd.Categorical(list("abcabcab")),
            "y": [0.0, 0.0, 3.0, 10.0, 10.0, 13.0, 20.0, 20.0],
        }
    )
    r = variation(frame, value="y", subgroup="sg", factors=["noz"])
    tukey = r.comparisons["noz"].query("test == 'tukey'").set_index(["level", "versus"])
    fit = smf.ols("y ~ C(sg) + C(noz)", frame).fit()
    assert -fit.params["C(noz)[T.c]"] == pytest.approx(-3.0, abs=1e-9)
    assert tukey.loc[("a", "c"), "estimate"] == pytest.approx(-3.0, abs=1e-9)
    assert tukey.loc[("a", "b"), "estimate"] == pytest.approx(0.0, abs=1e-9)
    assert any("'noz' is missing from some subgroups (1 of 9" in n for n in r.notes)
    # the same layout with noise: every row against statsmodels
    noisy = frame.assign(y=frame["y"] + [0.1, -0.2, 0.05, 0.0, 0.15, -0.1, 0.05, -0.05])
    assert_matches_ols(comparisons(noisy), noisy)


def test_twenty_of_a_hundred_cells_missing_match_ols():
    # Issue 21's case: 20 subgroups x 5 nozzles, 20 cells missing at random, nozzle c at +3.
    rng = np.random.default_rng(4)
    present = np.ones(100, bool)
    present[rng.choice(100, 20, replace=False)] = False
    frame = layout(present.reshape(20, 5), effects=(0, 0, 3, 0, 0), seed=4)
    assert_matches_ols(comparisons(frame), frame)


def test_a_minus_c_is_unbiased_with_missing_cells():
    # Simulation (issue 21): 100 data sets of 20 subgroups x 5 nozzles, 20 of the 100 cells
    # missing at random, subgroup sd 2, value sd 0.25, nozzle c at +3. The mean of a - c lies
    # within four standard errors of -3 (its sd over data sets is about 0.1, so the band is
    # about 0.04); the method replaced averaged -2.81.
    estimates = []
    for seed in range(100):
        rng = np.random.default_rng(seed)
        present = np.ones(100, bool)
        present[rng.choice(100, 20, replace=False)] = False
        frame = layout(present.reshape(20, 5), effects=(0, 0, 3, 0, 0), seed=seed + 1000)
        table = comparisons(frame).query("test == 'tukey'").set_index(["level", "versus"])
        estimates.append(table.loc[("a", "c"), "estimate"])
    estimates = np.asarray(estimates)
    assert estimates.mean() == pytest.approx(-3.0, abs=4 * estimates.std(ddof=1) / 10)


def test_repeated_values_count_once_per_cell():
    # The unit is the subgroup x level cell mean (the interaction is the error of a factor
    # inside subgroups): statsmodels OLS on the table of cell means, from pandas groupby.
    rng = np.random.default_rng(9)
    present = rng.random((10, 4)) < 0.8
    present[:, 0] = True
    frame = layout(present, effects=(0, 1, 0, -1), seed=9)
    repeats = rng.integers(1, 4, len(frame))
    repeated = frame.loc[frame.index.repeat(repeats)].reset_index(drop=True)
    repeated["y"] += rng.normal(0, 0.3, len(repeated))
    means = repeated.groupby(["sg", "noz"], observed=True)["y"].mean().reset_index()
    assert_matches_ols(comparisons(repeated), means)


@settings(max_examples=40, deadline=None)
@given(
    k=st.integers(3, 12),
    levels=st.integers(2, 5),
    share=st.floats(0.4, 0.95),
    seed=st.integers(0, 10_000),
)
def test_any_layout_with_empty_cells_matches_ols(k, levels, share, seed):
    # Property: on any layout of one value per present cell, the comparisons are the
    # statsmodels fit's; a layout whose levels never all meet in subgroups (the OLS design
    # short of full rank, numpy.linalg.matrix_rank) has no comparisons and a note.
    rng = np.random.default_rng(seed)
    present = rng.random((k, levels)) < share
    present[np.arange(k), rng.integers(0, levels, k)] = True  # every subgroup holds a value
    assume(not present.all() and present.any(axis=0).all())
    assume(present.sum(axis=1).max() > 1)  # the factor changes inside some subgroup
    frame = layout(present, effects=np.arange(levels) * 0.7, seed=seed)
    fit = smf.ols("y ~ C(sg) + C(noz)", frame).fit()
    r = variation(frame, value="y", subgroup="sg", factors=["noz"])
    if np.linalg.matrix_rank(fit.model.exog) < k + levels - 1:
        assert r.comparisons["noz"].empty
        assert any("never meet in a subgroup" in n for n in r.notes)
    elif fit.df_resid > 0:
        assert_matches_ols(r.comparisons["noz"], frame, tukey_p=False)

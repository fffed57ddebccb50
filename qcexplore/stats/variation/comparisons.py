"""The levels of each factor compared: Tukey pairs, level effects, analysis of means,
Kruskal-Wallis, and the equality of spread between levels.

A factor constant inside subgroups is compared through the subgroup means; any other factor
through its subgroup x level cell means with the subgroup as a block (the cells are what its
effect is replicated over, so repeated values in a cell count once). Both are one
least-squares fit, unit = block + level, solved for the levels alone after absorbing the
blocks: the reduced normal equations, a levels x levels system built from cell counts
(Searle, Linear Models, 1971, ch. 7; from memory). The subgroup means are a single block,
which is the one-way analysis. When a level is missing from some subgroups, a cell mean
centred on its own subgroup's mean would carry the effects of the levels that subgroup
happens to hold; the fit does not. Every estimate and standard error is a contrast of that
fit and its covariance: least-squares means (the fitted level averaged over the blocks),
Tukey-Kramer pairs of them, effects and the analysis of means against their size-weighted
average. Each factor is compared on its own, so associated factors get a note
(:func:`marginal_note`).

Checked against statsmodels OLS with the subgroup and the factor as categorical terms
(unbalanced layouts with empty cells), scipy ``tukey_hsd``, ``kruskal`` and ``levene``, R's
InsectSprays Kruskal-Wallis, Nelson's ANOM table and simulation (tests/test_variation.py,
tests/test_level_fit.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.stats.subgroups import constant_within, group_moments
from qcexplore.stats.variation.anova import gram, solve
from qcexplore.stats.variation.distributions import (
    anom_cdf,
    anom_critical,
    sidak_critical,
    studentized_range_sf,
    tukey_critical,
)
from qcexplore.stats.variation.factors import Factor, cell_codes, crosstab
from qcexplore.stats.variation.structure import Design, association

#: Cramer's V at or above which two factors count as associated for the note on level
#: comparisons (0.1 is the usual "small" association, common practice).
ASSOCIATION_NOTE_V = 0.1
#: Exact ANOM critical values up to this many levels (Sidak beyond).
ANOM_MAX_LEVELS = 100
#: Values a level needs before its spread enters an equal-spread test: with two values the
#: absolute deviations from their centre are equal, so the test's within-level variation is
#: zero and any difference between levels looks infinitely significant.
SPREAD_MIN_VALUES = 3
#: Relative tolerance of the check that the effects are correlated as in an equal-size
#: layout: far above rounding, far below any real imbalance.
_BALANCE_TOLERANCE = 1e-9

#: ``signal``: an analysis-of-means level whose mean lies outside its decision limits
#: (False on the rows of the other tests).
COMPARISON_COLUMNS = [
    "test", "level", "versus", "estimate", "statistic", "p", "lower", "upper", "se", "signal",
]  # fmt: skip


@dataclass(frozen=True)
class Units:
    """What one factor's levels are compared on: a value per unit, its block and level."""

    y: np.ndarray
    blocks: np.ndarray
    n_blocks: int
    codes: np.ndarray


def level_units(d: Design, f: Factor) -> Units:
    """The units of a factor's comparison: the subgroup means in one block for a factor
    constant inside subgroups, else the subgroup x level cell means blocked by subgroup."""
    per_subgroup = constant_within(f.codes, d.subgroup.codes, d.k)
    if np.all(per_subgroup >= 0):
        return Units(d.means, np.zeros(d.k, np.intp), 1, per_subgroup)
    cells = cell_codes(d.subgroup.codes, [f])
    cm = group_moments(d.y, cells)
    return Units(
        cm.mean,
        constant_within(d.subgroup.codes, cells, cm.n.size),
        d.k,
        constant_within(f.codes, cells, cm.n.size),
    )


@dataclass(frozen=True)
class LevelFit:
    """The least-squares fit unit = block + level, over the levels that hold units.

    ``cov`` is a generalised inverse of the levels' reduced normal equations: times s^2 it
    is the covariance of every estimable contrast of the level effects.
    """

    labels: list[str]
    n: np.ndarray  # units per level
    lsmean: np.ndarray  # the fitted level averaged over the blocks
    cov: np.ndarray
    s: float
    df: int
    connected: bool  # every pair of levels can be compared within blocks
    #: each unit less its block's fitted effect (about their average), for the units in
    #: blocks of two or more (alone in its block, a unit is its level's fit, not data)
    aligned: np.ndarray
    codes: np.ndarray  # the level of each aligned unit, indexing ``labels``

    @property
    def weights(self) -> np.ndarray:
        return self.n / self.n.sum()

    def effect_cov(self) -> np.ndarray:
        """Covariance (per unit s^2) of the effects: lsmean less their weighted average."""
        u = np.eye(self.n.size) - self.weights
        return u @ self.cov @ u.T

    def balanced(self) -> bool:
        """Whether the effects are correlated as the equal-size one-way layout's are."""
        v = self.effect_cov()
        k = self.n.size
        equal = v[0, 0] * k / (k - 1) * (np.eye(k) - 1.0 / k)
        return bool(np.allclose(v, equal, rtol=0.0, atol=_BALANCE_TOLERANCE * v[0, 0]))


def level_fit(units: Units, levels: pd.Index) -> LevelFit:
    """Fit unit = block + level by least squares with the blocks absorbed: a levels x levels
    system from counts, whatever the number of blocks."""
    held = np.bincount(units.codes) > 0
    kept, codes = np.flatnonzero(held), (np.cumsum(held) - 1)[units.codes]
    k = kept.size
    g = gram(
        units.y, np.ones(units.y.size), units.blocks, units.n_blocks,
        [Factor("level", codes, pd.RangeIndex(k))],
    )  # fmt: skip
    effect, rss, rank, cov = solve(g, np.eye(k))
    size = np.bincount(units.blocks, minlength=units.n_blocks)
    has = size > 0
    df = int(units.y.size - np.count_nonzero(has) - rank)
    # each block's effect given the level effects: its units' mean less their levels' effects
    block = group_moments(units.y - effect[codes], units.blocks, units.n_blocks).mean
    centre = float(block[has].mean())
    shared = size[units.blocks] > 1
    return LevelFit(
        labels=[str(v) for v in np.asarray(levels)[kept]],
        n=np.bincount(codes, minlength=k).astype(np.float64),
        lsmean=centre + effect,
        cov=cov,
        s=float(np.sqrt(rss / df)) if df > 0 else float("nan"),
        df=df,
        connected=rank == k - 1,
        aligned=(units.y - (block[units.blocks] - centre))[shared],
        codes=codes[shared],
    )


def _row(
    test: str, level: str, versus: str, estimate: float, statistic: float, p: float,
    lower: float, upper: float, se: float, signal: bool = False,
) -> dict[str, object]:  # fmt: skip
    values = (test, level, versus, estimate, statistic, p, lower, upper, se, signal)
    return dict(zip(COMPARISON_COLUMNS, values, strict=True))


def _tukey_rows(fit: LevelFit, alpha: float) -> list[dict[str, object]]:
    """Tukey-Kramer pairs of least-squares means: ``statistic`` is the studentized range q,
    each pair scaled by the standard error of its own difference."""
    k, v = fit.n.size, fit.cov
    i, j = np.triu_indices(k, 1)
    diff = fit.lsmean[i] - fit.lsmean[j]
    se_pair = fit.s * np.sqrt(np.maximum(v[i, i] + v[j, j] - 2.0 * v[i, j], 0.0) / 2.0)
    q = np.abs(diff) / se_pair if fit.s > 0 else np.full(diff.size, np.nan)
    p = studentized_range_sf(q, k, float(fit.df))
    qcrit = tukey_critical(alpha, k, float(fit.df))
    return [
        _row("tukey", fit.labels[a], fit.labels[b], est, qq, float(pp), est - half, est + half,
             np.nan)
        for a, b, est, qq, pp, half in zip(i, j, diff, q, p, qcrit * se_pair, strict=True)
    ]  # fmt: skip


def _mean_rows(fit: LevelFit, alpha: float) -> list[dict[str, object]]:
    """Level effects (each least-squares mean less their size-weighted average, so that the
    effects weighted by size sum to zero) and the analysis of means."""
    k, df = fit.n.size, fit.df
    grand = float(fit.weights @ fit.lsmean)
    se = fit.s * np.sqrt(np.maximum(np.diag(fit.effect_cov()), 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        t = (fit.lsmean - grand) / se
    p_raw = 2 * stats.t.sf(np.abs(t), df)
    t_each = stats.t.ppf(1 - alpha / 2, df)
    with np.errstate(invalid="ignore"):
        if k <= ANOM_MAX_LEVELS and fit.balanced():
            h = anom_critical(alpha, k, float(df))
            p_anom = 1.0 - anom_cdf(np.abs(t), k, float(df))
        else:  # unequal sizes or missing cells: Sidak's bound, slightly conservative
            h = sidak_critical(alpha, k, df)
            p_anom = 1.0 - (1.0 - p_raw) ** k
    effects, anom = [], []
    for lab, mu, e, tt, pr, pa in zip(fit.labels, fit.lsmean, se, t, p_raw, p_anom, strict=True):
        half = t_each * e
        effects.append(_row("effect", lab, "overall", mu - grand, tt, float(pr),
                            mu - grand - half, mu - grand + half, e))  # fmt: skip
        low, high = grand - h * e, grand + h * e
        anom.append(_row("anom", lab, "overall", mu, tt, float(pa), low, high, e,
                         mu < low or mu > high))  # fmt: skip
    return effects + anom


def _kruskal_row(y: np.ndarray, codes: np.ndarray) -> dict[str, object]:
    # Aligned values equal but for rounding in the fit (the same value less the same subgroup
    # effect reached two ways) must tie in the ranks: keep 10 significant digits of the scale.
    scale = float(np.max(np.abs(y))) if y.size else 0.0
    if scale > 0 and np.isfinite(scale):
        y = np.round(y, 9 - int(np.floor(np.log10(scale))))
    groups = np.split(y[np.argsort(codes, kind="stable")], np.cumsum(np.bincount(codes))[:-1])
    groups = [g for g in groups if g.size]
    try:
        with np.errstate(invalid="ignore", divide="ignore"):  # all values tied: NaN
            h_stat, h_p = stats.kruskal(*groups)
    except ValueError:
        h_stat, h_p = float("nan"), float("nan")
    return _row(
        "kruskal_wallis", "all", "", np.nan, float(h_stat), float(h_p), np.nan, np.nan, np.nan
    )


def level_comparisons(fit: LevelFit, alpha: float) -> pd.DataFrame:
    """The comparisons table of one factor (empty with fewer than two levels, no error df,
    or levels that never meet in a block)."""
    if fit.n.size < 2 or fit.df <= 0 or not fit.connected:
        return pd.DataFrame(columns=COMPARISON_COLUMNS)
    rows = _tukey_rows(fit, alpha) + _mean_rows(fit, alpha)
    rows.append(_kruskal_row(fit.aligned, fit.codes))
    return pd.DataFrame(rows, columns=COMPARISON_COLUMNS)


def compare_levels(d: Design, alpha: float) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """Each factor's comparisons table, and a note on each factor that changes inside
    subgroups but is missing from some (compared by least-squares means) or whose levels
    never meet in a subgroup (not compared)."""
    tables, notes = {}, []
    for f in d.factors:
        units = level_units(d, f)
        fit = level_fit(units, f.levels)
        tables[f.name] = level_comparisons(fit, alpha)
        cells = units.n_blocks * fit.n.size
        if units.n_blocks == 1 or fit.n.size < 2 or units.y.size == cells:
            continue
        if not fit.connected:
            notes.append(
                f"the levels of {f.name!r} fall into sets that never meet in a subgroup, so "
                "they cannot all be compared within subgroups: no level comparisons."
            )
        else:
            notes.append(
                f"{f.name!r} is missing from some subgroups ({cells - units.y.size} of "
                f"{cells} subgroup x level cells are empty): its levels are compared by "
                "least-squares means of the fit with the subgroup as a block, with the "
                "Tukey-Kramer pairs, effects and analysis-of-means limits (by Sidak's "
                "bound) from that fit's covariance."
            )
    return tables, notes


def spread_table(d: Design, factors: list[Factor]) -> tuple[pd.DataFrame, list[str]]:
    """Levene and Brown-Forsythe tests of equal spread between the levels of each factor, on
    deviations from the subgroup mean (or on single values), and notes on the tests left
    out. A level enters with at least ``SPREAD_MIN_VALUES`` values; a factor with fewer than
    two such levels is not tested (NaN)."""
    residual = d.y if d.single else d.y - d.means[d.subgroup.codes]
    rows, notes = [], []
    for f in factors:
        order = np.argsort(f.codes, kind="stable")
        counts = np.bincount(f.codes, minlength=f.n_levels)
        groups = [
            g
            for g in np.split(residual[order], np.cumsum(counts)[:-1])
            if g.size >= SPREAD_MIN_VALUES
        ]
        if len(groups) < 2 and f.n_levels > 1:
            notes.append(
                f"equal-spread tests of {f.name!r} need at least {SPREAD_MIN_VALUES} values in "
                f"two or more levels (its levels hold at most {int(counts.max())}): not tested."
            )
        for test, center in (("levene", "mean"), ("brown_forsythe", "median")):
            stat = p = float("nan")
            if len(groups) > 1:
                with np.errstate(invalid="ignore", divide="ignore"):
                    stat, p = stats.levene(*groups, center=center)
            rows.append({"factor": f.name, "test": test, "statistic": float(stat), "p": float(p)})
    return pd.DataFrame(rows, columns=["factor", "test", "statistic", "p"]), notes


def marginal_note(d: Design) -> list[str]:
    """A note when associated factors make the one-factor level comparisons unreliable.

    Tukey, ANOM, Kruskal-Wallis and the effects compare the levels of one factor on
    their own; with factors that are partly confounded a level can differ only through
    the levels of another factor it goes with, while the Type II ANOVA adjusts for that.
    """
    factors = [f for f in d.factors if f.n_levels > 1]
    pairs = []
    for i, a in enumerate(factors):
        for b in factors[i + 1 :]:
            v = association(crosstab(a, b))[0]
            if v >= ASSOCIATION_NOTE_V:
                pairs.append(f"{a.name!r} and {b.name!r} (Cramer's V = {v:.2f})")
    if not pairs:
        return []
    return [
        f"factors go together: {'; '.join(pairs)}. The level comparisons (Tukey, ANOM, "
        "Kruskal-Wallis, effects) look at each factor on its own, so a level can look "
        "different only because it often comes with a level of another factor; the ANOVA "
        "table adjusts each factor for the others. Where they disagree, go by the ANOVA."
    ]

"""The levels of each factor compared: Tukey pairs, level effects, analysis of means,
Kruskal-Wallis, and the equality of spread between levels.

A factor constant inside subgroups is compared through the subgroup means; any other factor
through its subgroup x level cell means centred on their subgroup (the subgroup as a block;
the cells are what its effect is replicated over). Each factor is compared on its own, so
associated factors get a note (:func:`marginal_note`).

Checked against scipy ``tukey_hsd``, ``kruskal`` and ``levene``, R's InsectSprays
Kruskal-Wallis, Nelson's ANOM table and simulation (tests/test_variation.py).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.stats.subgroups import constant_within, group_moments
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

#: ``signal``: an analysis-of-means level whose mean lies outside its decision limits
#: (False on the rows of the other tests).
COMPARISON_COLUMNS = [
    "test", "level", "versus", "estimate", "statistic", "p", "lower", "upper", "se", "signal",
]  # fmt: skip


def level_data(d: Design, f: Factor) -> tuple[np.ndarray, np.ndarray, int]:
    """Values and level codes to compare, and the error degrees of freedom already used.

    A factor constant inside subgroups is compared through the subgroup means. Any other
    factor through its subgroup x level cell means, each centred on the mean of its
    subgroup's cells (the subgroup as a block, which uses one df per subgroup but one): the
    cell, not the value, is the unit that the factor's effect is replicated over when the
    subgroups are random, so repeated values in a cell do not count as independent
    evidence. With one value per cell these are the values centred on their subgroup mean.
    """
    per_subgroup = constant_within(f.codes, d.subgroup.codes, d.k)
    if np.all(per_subgroup >= 0):
        return d.means, per_subgroup, 0
    cells = cell_codes(d.subgroup.codes, [f])
    cm = group_moments(d.y, cells)
    cell_sg = constant_within(d.subgroup.codes, cells, cm.n.size)
    cell_level = constant_within(f.codes, cells, cm.n.size)
    sg_mean = group_moments(cm.mean, cell_sg, d.k).mean
    return cm.mean - sg_mean[cell_sg] + cm.mean.mean(), cell_level, d.k - 1


def _row(
    test: str, level: str, versus: str, estimate: float, statistic: float, p: float,
    lower: float, upper: float, se: float, signal: bool = False,
) -> dict[str, object]:  # fmt: skip
    values = (test, level, versus, estimate, statistic, p, lower, upper, se, signal)
    return dict(zip(COMPARISON_COLUMNS, values, strict=True))


def _tukey_rows(
    labels: list[str], n: np.ndarray, mean: np.ndarray, s: float, df: int, alpha: float
) -> list[dict[str, object]]:
    """Tukey-Kramer pairs: ``statistic`` is the studentized range q."""
    k = n.size
    i, j = np.triu_indices(k, 1)
    diff = mean[i] - mean[j]
    se_pair = s * np.sqrt(0.5 * (1 / n[i] + 1 / n[j]))
    q = np.abs(diff) / se_pair if s > 0 else np.full(diff.size, np.nan)
    p = studentized_range_sf(q, k, float(df))
    qcrit = tukey_critical(alpha, k, float(df))
    return [
        _row("tukey", labels[a], labels[b], est, qq, float(pp), est - half, est + half, np.nan)
        for a, b, est, qq, pp, half in zip(i, j, diff, q, p, qcrit * se_pair, strict=True)
    ]


def _mean_rows(
    labels: list[str], n: np.ndarray, mean: np.ndarray, s: float, df: int, alpha: float
) -> list[dict[str, object]]:
    """Level effects (the effects weighted by n sum to zero) and the analysis of means."""
    k, total = n.size, n.sum()
    grand = float(np.sum(n * mean) / total)
    se = s * np.sqrt((total - n) / (total * n))
    with np.errstate(invalid="ignore", divide="ignore"):
        t = (mean - grand) / se
    p_raw = 2 * stats.t.sf(np.abs(t), df)
    t_each = stats.t.ppf(1 - alpha / 2, df)
    exact = np.all(n == n[0]) and k <= ANOM_MAX_LEVELS
    with np.errstate(invalid="ignore"):
        if exact:
            h = anom_critical(alpha, k, float(df))
            p_anom = 1.0 - anom_cdf(np.abs(t), k, float(df))
        else:  # unequal sizes: Sidak's bound, slightly conservative
            h = sidak_critical(alpha, k, df)
            p_anom = 1.0 - (1.0 - p_raw) ** k
    effects, anom = [], []
    for lab, mu, e, tt, pr, pa in zip(labels, mean, se, t, p_raw, p_anom, strict=True):
        half = t_each * e
        effects.append(_row("effect", lab, "overall", mu - grand, tt, float(pr),
                            mu - grand - half, mu - grand + half, e))  # fmt: skip
        low, high = grand - h * e, grand + h * e
        anom.append(_row("anom", lab, "overall", mu, tt, float(pa), low, high, e,
                         mu < low or mu > high))  # fmt: skip
    return effects + anom


def _kruskal_row(y: np.ndarray, codes: np.ndarray, m_n: np.ndarray) -> dict[str, object]:
    groups = np.split(y[np.argsort(codes, kind="stable")], np.cumsum(m_n)[:-1])
    groups = [g for g in groups if g.size]
    try:
        with np.errstate(invalid="ignore", divide="ignore"):  # all values tied: NaN
            h_stat, h_p = stats.kruskal(*groups)
    except ValueError:
        h_stat, h_p = float("nan"), float("nan")
    return _row(
        "kruskal_wallis", "all", "", np.nan, float(h_stat), float(h_p), np.nan, np.nan, np.nan
    )


def level_comparisons(
    y: np.ndarray, codes: np.ndarray, used_df: int, levels: pd.Index, alpha: float
) -> pd.DataFrame:
    """The comparisons table of one factor (empty with fewer than two levels or no error df)."""
    m = group_moments(y, codes, len(levels))
    keep = m.n > 0
    n, mean = m.n[keep], m.mean[keep]
    labels = [str(v) for v in np.asarray(levels)[keep]]
    df = n.sum() - n.size - used_df
    if n.size < 2 or df <= 0:
        return pd.DataFrame(columns=COMPARISON_COLUMNS)
    s = np.sqrt(float(np.nansum(m.ss[keep]) / df))
    rows = _tukey_rows(labels, n, mean, s, df, alpha) + _mean_rows(labels, n, mean, s, df, alpha)
    rows.append(_kruskal_row(y, codes, m.n))
    return pd.DataFrame(rows, columns=COMPARISON_COLUMNS)


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

"""Variance components of an additive random model: every factor and the subgroup random.

The subgroup x factor interaction is pooled into the residual; negative estimates are set to
zero with a note.

* Expected mean squares for balanced data (the classical equations); for unbalanced data the
  same equations with the effective group size n0 of each term (moment estimates), with
  Satterthwaite intervals (chi-square for the residual).
* REML: Henderson's mixed-model equations with the subgroup block absorbed and the subgroups
  pooled by size, so each likelihood evaluation is a small dense Cholesky factorisation
  whatever the number of rows.

Checked against Bates' lme4 book values for Dyestuff and Pastes and statsmodels MixedLM (REML)
(tests/test_variation.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import optimize, sparse, stats

from qcexplore.stats.variation.factors import Factor, cell_codes
from qcexplore.stats.variation.structure import Design


def _balanced(d: Design) -> bool:
    if np.unique(d.sizes).size != 1 or len(d.between) > 1:
        return False
    if d.between and np.unique(np.bincount(d.between[0].codes)).size != 1:
        return False
    if d.within:
        cell = cell_codes(np.zeros(d.n, np.int64), d.within)
        counts = np.bincount(d.subgroup.codes * (cell.max() + 1) + cell)
        return np.unique(counts).size == 1
    return True


def _interval(coefs: list[tuple[float, float, float]], level: float) -> tuple[float, float]:
    """Satterthwaite interval for sum(c * ms) from (c, ms, df) triples (chi-square if one)."""
    estimate = sum(c * ms for c, ms, _ in coefs)
    if estimate <= 0 or any(df <= 0 for _, _, df in coefs):
        return float("nan"), float("nan")
    df = estimate**2 / sum((c * ms) ** 2 / df for c, ms, df in coefs)
    if df < 0.1:  # too few effective degrees of freedom for a usable interval
        return float("nan"), float("nan")
    tail = (1 - level) / 2
    return (
        df * estimate / stats.chi2.ppf(1 - tail, df),
        df * estimate / stats.chi2.ppf(tail, df),
    )


def _moment_components(d: Design, anova: pd.DataFrame, level: float) -> tuple[list[dict], str]:
    """Expected-mean-square estimates of an additive random model.

    Balanced data: the classical expected mean squares. Unbalanced data: the same
    equations with the effective group size n0 = (N - sum(m^2)/N) / (L - 1) of each term.
    """
    table = anova.set_index("source")
    ms = table["ms"].to_dict()
    dfs = table["df"].to_dict()
    rows = []
    interaction = [s for s in table.index if s.startswith("subgroup x ")]
    if d.single:
        e_ms, e_df = ms["residual"], dfs["residual"]
    else:
        pooled = ["residual", *interaction]
        e_df = sum(dfs[s] for s in pooled)
        e_ms = sum(table.loc[s, "ss"] for s in pooled) / e_df if e_df > 0 else float("nan")

    def n0(counts: np.ndarray) -> float:
        counts = counts[counts > 0]
        if counts.size < 2:  # one level: no variance between levels to estimate
            return float("nan")
        return (counts.sum() - np.sum(counts**2) / counts.sum()) / (counts.size - 1)

    sg_ms, sg_df = (ms["subgroup"], dfs["subgroup"]) if "subgroup" in ms else (e_ms, e_df)
    n_sg = n0(d.sizes) if not d.single else 1.0
    for f in d.between:
        rows_per_level = np.bincount(f.codes, weights=d.sizes, minlength=f.n_levels)
        c = 1.0 / n0(rows_per_level)
        coefs = [(c, ms[f.name], dfs[f.name]), (-c, sg_ms, sg_df)]
        rows.append((f.name, coefs))
    if not d.single:
        rows.append(("subgroup", [(1 / n_sg, sg_ms, sg_df), (-1 / n_sg, e_ms, e_df)]))
    for f in d.within:
        c = 1.0 / n0(np.bincount(f.codes, minlength=f.n_levels))
        rows.append((f.name, [(c, ms[f.name], dfs[f.name]), (-c, e_ms, e_df)]))
    out = []
    for name, coefs in rows:
        estimate = sum(c * m for c, m, _ in coefs)
        low, high = _interval(coefs, level)
        out.append({"source": name, "variance": estimate, "lower": low, "upper": high})
    low, high = _interval([(1.0, e_ms, e_df)], level)
    out.append({"source": "residual", "variance": e_ms, "lower": low, "upper": high})
    method = "expected mean squares" if _balanced(d) else "moment estimates (effective n0)"
    return out, method


@dataclass(frozen=True)
class _RemlStats:
    """Sufficient statistics of the additive random model with the subgroup block absorbed.

    The columns ``W`` are the intercept, then the levels of each random factor; ``K`` is
    the subgroup x column count matrix. The subgroups are pooled by size, since the
    absorbed subgroup block depends on a subgroup only through its size.
    """

    n: int
    yy: float  # sum of squares of the centred values
    wtw: np.ndarray  # W'W
    wty: np.ndarray  # W'y
    term: np.ndarray  # the factor of each column (-1: the intercept)
    sizes: np.ndarray  # distinct subgroup sizes (empty for single values)
    count: np.ndarray  # subgroups of each size
    kk: np.ndarray  # per size: K'K
    ks: np.ndarray  # per size: K' (subgroup sums)
    ss: np.ndarray  # per size: sum of squared subgroup sums


def _reml_stats(d: Design, terms: list[Factor]) -> _RemlStats:
    y = d.y - d.y.mean()
    first = np.cumsum([1] + [f.n_levels for f in terms])
    m = int(first[-1])
    cols = np.column_stack(
        [np.zeros(d.n, np.intp)] + [f.codes + o for f, o in zip(terms, first, strict=False)]
    )
    rows = np.repeat(np.arange(d.n), cols.shape[1])
    w = sparse.csr_matrix((np.ones(rows.size), (rows, cols.ravel())), shape=(d.n, m))
    term = np.repeat(np.arange(-1, len(terms)), [1] + [f.n_levels for f in terms])
    sizes, which = np.unique(d.sizes, return_inverse=True)
    if d.single:  # no subgroup term: nothing to absorb
        sizes = sizes[:0]
    count = np.bincount(which, minlength=sizes.size)[: sizes.size]
    kk = np.zeros((sizes.size, m, m))
    ks = np.zeros((sizes.size, m))
    ss = np.zeros(sizes.size)
    if sizes.size:
        sg = d.subgroup.codes
        k = sparse.csr_matrix((np.ones(d.n), (sg, np.arange(d.n))), shape=(d.k, d.n)) @ w
        sums = np.bincount(sg, weights=y, minlength=d.k)
        for j in range(sizes.size):
            rows_j = np.flatnonzero(which == j)
            part = k[rows_j]
            kk[j] = (part.T @ part).toarray()
            ks[j] = part.T @ sums[rows_j]
            ss[j] = float(sums[rows_j] @ sums[rows_j])
    wtw, wty = (w.T @ w).toarray(), w.T @ y
    return _RemlStats(d.n, float(y @ y), wtw, wty, term, sizes.astype(float), count, kk, ks, ss)


def _reml_profile(s: _RemlStats, ratios: np.ndarray) -> tuple[float, float]:
    """Minus twice the REML log likelihood, the residual variance profiled out, and that
    variance; ``ratios`` are the variance ratios of the factors, then of the subgroup.

    Henderson's mixed-model equations with each random column scaled by the square root
    of its ratio (a ratio of zero is then a regular point); the diagonal subgroup block is
    absorbed in closed form, which leaves a dense system of one column per level.
    """
    g = ratios[-1] if s.sizes.size else 0.0
    scale = np.sqrt(np.concatenate([[1.0], ratios[s.term[1:]]]))
    shrink = 1.0 / (1.0 + g * s.sizes)
    q = (s.wtw - g * np.tensordot(shrink, s.kk, axes=1)) * np.outer(scale, scale)
    q[np.diag_indices_from(q)] += s.term >= 0
    r = scale * (s.wty - g * (shrink @ s.ks))
    try:
        chol = np.linalg.cholesky(q)
    except np.linalg.LinAlgError:
        return float("inf"), float("nan")
    z = np.linalg.solve(chol, r)
    sigma2 = max(s.yy - g * float(shrink @ s.ss) - float(z @ z), 0.0) / (s.n - 1)
    logdet = 2.0 * float(np.sum(np.log(np.diag(chol)))) + float(s.count @ np.log1p(g * s.sizes))
    return (s.n - 1) * np.log(max(sigma2, 1e-300)) + logdet, sigma2


def _reml_components(d: Design, start: dict[str, float]) -> list[dict]:
    """REML estimates of the additive random model (every factor and the subgroup random,
    the mean fixed) from sufficient statistics: the work per likelihood evaluation does
    not grow with the number of rows. ``start``: moment estimates to start from.

    Checked against statsmodels MixedLM (REML) on nested, crossed and single-value
    layouts and against Bates' lme4 book values for Pastes (tests/test_variation.py).
    """
    terms = [Factor(f.name, f.codes[d.subgroup.codes], f.levels) for f in d.between]
    terms += d.within
    order = [f.name for f in terms] + ([] if d.single else ["subgroup"])
    s = _reml_stats(d, terms)
    ratios = np.zeros(len(order))
    if s.yy > 0 and order:
        e0 = max(start.get("residual", 0.0), 1e-6 * s.yy / s.n)
        x0 = np.log([max(start.get(name, 0.0) / e0, 0.05) for name in order])
        floor = np.log(1e-9)
        best = optimize.minimize(
            lambda t: _reml_profile(s, np.exp(t))[0],
            x0,
            method="L-BFGS-B",
            bounds=[(floor, np.log(1e6))] * len(order),
        )
        ratios = np.where(best.x > floor + np.log(1e3), np.exp(best.x), 0.0)
    sigma2 = _reml_profile(s, ratios)[1] if s.yy > 0 else 0.0
    variance = dict(zip(order, ratios * sigma2, strict=True))
    shown = [f.name for f in d.between] + ([] if d.single else ["subgroup"])
    shown += [f.name for f in d.within]
    return [
        {"source": name, "variance": float(value), "lower": np.nan, "upper": np.nan}
        for name, value in [*((n, variance[n]) for n in shown), ("residual", sigma2)]
    ]


#: REML is used up to this many level columns (dense Cholesky per evaluation) and
#: columns^2 x distinct subgroup sizes (the pooled products); moment estimates beyond.
_REML_MAX_COLUMNS = 150
_REML_MAX_POOLED = 1e6


def _reml_feasible(d: Design) -> bool:
    columns = 1 + sum(f.n_levels for f in [*d.between, *d.within])
    return columns <= _REML_MAX_COLUMNS and columns**2 * np.unique(d.sizes).size <= _REML_MAX_POOLED


def components_table(
    d: Design, anova: pd.DataFrame, method: str, level: float
) -> tuple[pd.DataFrame, str, list[str]]:
    notes: list[str] = []
    balanced = _balanced(d)
    rows, used = _moment_components(d, anova, level)
    wanted = method == "reml" or (method == "auto" and not balanced)
    if wanted and _reml_feasible(d):
        start = {r["source"]: r["variance"] for r in rows}
        rows, used = _reml_components(d, start), "REML (from sufficient statistics)"
    elif wanted:
        notes.append(
            "too many factor levels for REML here: components are moment estimates with "
            "effective group sizes (n0), approximate."
        )
    table = pd.DataFrame(rows)
    negative = table["variance"] < 0
    for name in table.loc[negative, "source"]:
        notes.append(f"the estimate for {name!r} came out negative and is set to zero.")
    table["variance"] = table["variance"].clip(lower=0.0)
    total = table["variance"].sum()
    table["sd"] = np.sqrt(table["variance"])
    table["share"] = table["variance"] / total if total > 0 else np.nan
    return table[["source", "variance", "sd", "share", "lower", "upper"]], used, notes

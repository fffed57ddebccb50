"""Variance components of an additive random model: every factor and the subgroup random.

The subgroup x factor interaction is pooled into the residual (a factor inside the subgroups
is still estimated against its interaction, as it is tested); a factor nested in another or
in the subgroups is a random factor whose levels are read per level of its parent (the
nested model); negative estimates are set to zero with a note.

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

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import optimize, sparse, stats
from threadpoolctl import threadpool_limits

from qcexplore.stats.variation.anova import Anova
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


#: Satterthwaite intervals need at least this many effective degrees of freedom: below one,
#: the chi-square quantile of the upper limit goes to zero and the limit to astronomical
#: values (1e17 for an estimate just above zero) that say nothing.
INTERVAL_MIN_DF = 1.0


def satterthwaite_df(coefs: list[tuple[float, float, float]]) -> float:
    """Effective df of sum(c * ms) from (c, ms, df) triples (Satterthwaite, 1946)."""
    estimate = sum(c * ms for c, ms, _ in coefs)
    if estimate <= 0 or any(df <= 0 for _, _, df in coefs):
        return float("nan")
    return estimate**2 / sum((c * ms) ** 2 / df for c, ms, df in coefs)


def _interval(coefs: list[tuple[float, float, float]], level: float) -> tuple[float, float]:
    """Satterthwaite interval for sum(c * ms) from (c, ms, df) triples (chi-square if one);
    NaN below ``INTERVAL_MIN_DF`` effective degrees of freedom."""
    estimate = sum(c * ms for c, ms, _ in coefs)
    df = satterthwaite_df(coefs)
    if not df >= INTERVAL_MIN_DF:
        return float("nan"), float("nan")
    tail = (1 - level) / 2
    return (
        df * estimate / stats.chi2.ppf(1 - tail, df),
        df * estimate / stats.chi2.ppf(tail, df),
    )


def _n0(counts: np.ndarray) -> float:
    """Effective group size (N - sum(m^2)/N) / (L - 1) of groups of ``counts`` values."""
    counts = counts[counts > 0]
    if counts.size < 2:  # one level: no variance between levels to estimate
        return float("nan")
    return (counts.sum() - np.sum(counts**2) / counts.sum()) / (counts.size - 1)


def _moment_components(d: Design, anova: Anova, level: float) -> tuple[list[dict], str]:
    """Expected-mean-square estimates of an additive random model.

    Each term's component is (MS - MS of its error term) / n0, its error term the one its
    F test uses (the subgroup x factor interaction for a factor inside the subgroups, its
    children for a parent of nested factors). Balanced data: the classical expected mean
    squares. Unbalanced data: the same equations with the effective group size
    n0 = (N - sum(m^2)/N) / (L - 1) of each term (for one random factor the estimate is
    unbiased; Searle, Casella and McCulloch, Variance Components, ch. 3; from memory).
    """
    table = anova.table.set_index("source")
    ms, dfs = table["ms"].to_dict(), table["df"].to_dict()
    pooled = [s for s in table.index if s == "residual" or s.startswith("subgroup x ")]
    e_df = sum(dfs[s] for s in pooled)
    e_ms = sum(table.loc[s, "ss"] for s in pooled) / e_df if e_df > 0 else float("nan")
    terms = [(f.name, np.bincount(f.codes, weights=d.sizes, minlength=f.n_levels))
             for f in d.between]  # fmt: skip
    if not d.single:
        terms.append(("subgroup", d.sizes.astype(float)))
    terms += [(f.name, np.bincount(f.codes, minlength=f.n_levels)) for f in d.within]
    out = []
    for name, counts in terms:
        if name not in ms:  # a row without degrees of freedom: nothing to estimate
            continue
        error = anova.errors[name]
        c = 1.0 / _n0(counts.astype(float))
        coefs = [(c, ms[name], dfs[name]), (-c, error.ms, error.df)]
        estimate = sum(k * m for k, m, _ in coefs)
        low, high = _interval(coefs, level)
        out.append(
            {
                "source": name, "variance": estimate, "lower": low, "upper": high,
                "interval_df": satterthwaite_df(coefs),
            }
        )  # fmt: skip
    low, high = _interval([(1.0, e_ms, e_df)], level)
    out.append(
        {"source": "residual", "variance": e_ms, "lower": low, "upper": high, "interval_df": e_df}
    )
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


#: Upper bound of a component's sd relative to the residual sd.
_THETA_MAX = 1e3


def _reml_maximum(objective: Callable[[np.ndarray], float], x0: np.ndarray) -> np.ndarray:
    """The relative sds theta (>= 0) that minimise ``objective`` (minus twice the profiled
    REML log likelihood).

    Parametrised by theta = sigma_j / sigma (lme4's choice; Bates et al., J. Stat. Softw.
    67(1), 2015; from memory) the likelihood is smooth up to and at the boundary theta = 0,
    so a bounded quasi-Newton search reaches a zero component instead of creeping towards
    it. Each component left near zero is then tried at zero, and the search restarted from
    the better point, until nothing improves: the result is never below what a nearby
    boundary point gives.
    """
    bounds = [(0.0, _THETA_MAX)] * x0.size
    options = {"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000}
    theta = optimize.minimize(objective, x0, method="L-BFGS-B", bounds=bounds, options=options).x
    for _ in range(x0.size):
        value, moved = objective(theta), False
        for i in np.flatnonzero((theta > 0) & (theta < 1e-2)):
            trial = theta.copy()
            trial[i] = 0.0
            if objective(trial) <= value:
                theta, value, moved = trial, objective(trial), True
        if not moved:
            break
        theta = optimize.minimize(
            objective, theta, method="L-BFGS-B", bounds=bounds, options=options
        ).x
    return theta


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
        x0 = np.sqrt([max(start.get(name, 0.0) / e0, 0.05) for name in order])
        # The matrices are small (one row per level): threads of a parallel BLAS cost more in
        # start-up than they save, several times over on a busy machine.
        with threadpool_limits(limits=1):
            ratios = _reml_maximum(lambda theta: _reml_profile(s, theta * theta)[0], x0) ** 2
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
    d: Design, anova: Anova, method: str, level: float
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
    if "interval_df" in table:
        thin = table[(table["variance"] > 0) & ~(table["interval_df"] >= INTERVAL_MIN_DF)]
        for name, df in zip(thin["source"], thin["interval_df"], strict=True):
            notes.append(
                f"the interval for {name!r} would rest on {df:.2g} effective degrees of "
                f"freedom (Satterthwaite), under {INTERVAL_MIN_DF:g}: it is not given."
            )
    negative = table["variance"] < 0
    for name in table.loc[negative, "source"]:
        notes.append(f"the estimate for {name!r} came out negative and is set to zero.")
    table["variance"] = table["variance"].clip(lower=0.0)
    total = table["variance"].sum()
    table["sd"] = np.sqrt(table["variance"])
    table["share"] = table["variance"] / total if total > 0 else np.nan
    return table[["source", "variance", "sd", "share", "lower", "upper"]], used, notes

"""Sources of variation: which factor moves the value, tested with the right error term.

The design decides the test. A factor that changes inside a subgroup (a nozzle, a
position) is crossed with time: it is tested against the within-subgroup residual with
the subgroup as a block. A factor that is constant inside each subgroup (the crew on
shift, the raw-material lot) can only be compared through subgroup means, so its error
term is the subgroup-to-subgroup variation within its levels; testing it against single
values would count every value as independent evidence (pseudo-replication). Two factors
whose levels fix each other cannot be separated at all, and the result says so.

Everything is computed from per-group sufficient statistics (counts, weighted sums,
within-group sums of squares) so that 200,000 rows take a fraction of a second:

* within-subgroup factors: least squares with the subgroup absorbed (values and
  indicator columns centred inside each subgroup), the Gram matrix built from cell
  counts with ``np.bincount``;
* between-subgroup factors: weighted least squares on the subgroup means with the
  subgroup sizes as weights, which gives exactly the sums of squares of the nested
  model on single values;
* sums of squares of Type II (each factor adjusted for all other main effects);
* REML variance components: Henderson's mixed-model equations with the subgroup block
  absorbed and the subgroups pooled by size, so each likelihood evaluation is a small
  dense Cholesky factorisation whatever the number of rows.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pandas as pd
from scipy import integrate, interpolate, optimize, sparse, special, stats

from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.results import VariationResult
from qcexplore.stats.subgroups import group_moments

__all__ = [
    "adjusted_values",
    "design_structure",
    "measurement_offsets",
    "multivari_table",
    "variation",
]

#: Goodman-Kruskal lambda at or above which one factor is taken to fix another.
CONFOUNDING_THRESHOLD = 0.95
#: Cramer's V at or above which two factors count as associated for the note on level
#: comparisons (0.1 is the usual "small" association, common practice).
ASSOCIATION_NOTE_V = 0.1

_ANOVA_COLUMNS = ["source", "df", "ss", "ms", "f", "p", "error_term"]
_COMPARISON_COLUMNS = ["test", "level", "versus", "estimate", "statistic", "p", "lower", "upper"]
_OFFSET_COLUMNS = ["factor", "level", "offset", "se", "lower", "upper", "p", "note"]


# --------------------------------------------------------------------------- input


@dataclass(frozen=True)
class _Factor:
    name: str
    codes: np.ndarray  # int per row
    levels: pd.Index

    @property
    def n_levels(self) -> int:
        return len(self.levels)


def _factor(frame: pd.DataFrame, name: str) -> _Factor:
    column = frame[name]
    if not isinstance(column.dtype, pd.CategoricalDtype):
        column = column.astype("category")
    column = column.cat.remove_unused_categories()
    codes = column.cat.codes.to_numpy().astype(np.intp)
    bad = np.flatnonzero(codes < 0)
    if bad.size:
        raise QCDataError(
            f"column {name!r} has missing labels at rows {frame.index[bad[:5]].tolist()}; "
            "fill or drop them first."
        )
    return _Factor(name, codes, column.cat.categories)


def _prepare(
    frame: pd.DataFrame, value: str, subgroup: str, factors: Sequence[str]
) -> tuple[np.ndarray, _Factor, list[_Factor]]:
    if isinstance(factors, str):
        factors = (factors,)
    require_columns(frame, [subgroup, *factors], "subgroup/factor")
    if len(frame) < 2:
        raise QCDataError(f"need at least two rows of {value!r}; got {len(frame)}.")
    y = finite_column(frame, value, "value")
    return y, _factor(frame, subgroup), [_factor(frame, f) for f in factors if f != subgroup]


# --------------------------------------------------------------------------- structure


def _constant_within(codes: np.ndarray, groups: np.ndarray, n_groups: int) -> np.ndarray:
    """Per group: the code of its first row; ``-1`` in a group where the code varies."""
    first = np.full(n_groups, -1, dtype=np.intp)
    first[groups[::-1]] = codes[::-1]
    varies = np.zeros(n_groups, dtype=bool)
    varies[groups[codes != first[groups]]] = True
    first[varies] = -1
    return first


def _crosstab(a: _Factor, b: _Factor, weights: np.ndarray | None = None) -> np.ndarray:
    counts = np.bincount(
        a.codes * b.n_levels + b.codes, weights=weights, minlength=a.n_levels * b.n_levels
    )
    return counts.reshape(a.n_levels, b.n_levels)


def _association(table: np.ndarray) -> tuple[float, float, float]:
    """Cramer's V and Goodman-Kruskal lambda in both directions (rows fix cols, cols fix rows)."""
    table = table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0]
    total = table.sum()
    rows, cols = table.sum(axis=1), table.sum(axis=0)
    expected = np.outer(rows, cols) / total
    chi2 = float(np.sum((table - expected) ** 2 / expected))
    k = min(table.shape) - 1
    v = float(np.sqrt(chi2 / (total * k))) if k > 0 else float("nan")

    def lam(t: np.ndarray, margin: np.ndarray) -> float:
        base = margin.max()
        if total - base <= 0:
            return float("nan")  # the predicted factor has a single level
        return float((t.max(axis=1).sum() - base) / (total - base))

    return v, lam(table, cols), lam(table.T, rows)


def _structure_rows(
    subgroup: _Factor, factors: list[_Factor], threshold: float
) -> tuple[pd.DataFrame, dict[str, str], dict[str, np.ndarray]]:
    """Structure table, relation of each factor, and per-subgroup level codes of the
    factors that are constant within subgroups."""
    k = subgroup.n_levels
    sizes = np.bincount(subgroup.codes, minlength=k)
    single = bool(np.all(sizes == 1))
    rows: list[dict[str, object]] = []
    relation: dict[str, str] = {}
    per_subgroup: dict[str, np.ndarray] = {}
    for f in factors:
        first = _constant_within(f.codes, subgroup.codes, k)
        if np.all(first >= 0):
            relation[f.name] = "between_subgroups"
            per_subgroup[f.name] = first
            counts = np.bincount(first, minlength=f.n_levels)
            note = (
                "single values: each value is its own subgroup"
                if single
                else "constant inside each subgroup; compared through subgroup means"
            )
            if counts.max() <= 1 and not single:
                relation[f.name] = "confounded"
                note = (
                    "every level is a single subgroup: the factor and the subgroup are the "
                    "same thing, so its effect is the subgroup-to-subgroup variation"
                )
        else:
            relation[f.name] = "within_subgroup"
            share = float(np.mean(first < 0))
            note = f"varies inside {share:.0%} of subgroups; the subgroup is used as a block"
        rows.append(
            {
                "factor": f.name,
                "relation": relation[f.name],
                "with_": subgroup.name,
                "note": note,
                "association": float("nan"),
            }
        )
    for i, a in enumerate(factors):
        for b in factors[i + 1 :]:
            table = _crosstab(a, b)
            v, a_fixes_b, b_fixes_a = _association(table)
            if not (a_fixes_b >= threshold or b_fixes_a >= threshold):
                continue
            pairs = [
                f"{a.levels[r]}->{b.levels[c]}"
                for r, c in enumerate(table.argmax(axis=1))
                if table[r].sum() > 0
            ]
            shown = ", ".join(pairs[:6]) + (", ..." if len(pairs) > 6 else "")
            for x, other, fx, fo in ((a, b, b_fixes_a, a_fixes_b), (b, a, a_fixes_b, b_fixes_a)):
                rows.append(
                    {
                        "factor": x.name,
                        "relation": "confounded",
                        "with_": other.name,
                        "note": (
                            f"Cramer's V = {v:.3f}; the levels of {other.name!r} fix those of "
                            f"{x.name!r} with lambda = {fx:.3f}, and the reverse with lambda = "
                            f"{fo:.3f}; level pairs ({a.name}->{b.name}): {shown}"
                        ),
                        "association": v,
                    }
                )
    return (
        pd.DataFrame(rows, columns=["factor", "relation", "with_", "note", "association"]),
        (relation),
        per_subgroup,
    )


def design_structure(
    frame: pd.DataFrame,
    *,
    subgroup: str,
    factors: Sequence[str],
    threshold: float = CONFOUNDING_THRESHOLD,
) -> pd.DataFrame:
    """How each factor sits in the design: against the subgroups and against each other.

    One row per factor with its relation to the subgroups (``"within_subgroup"``: it
    changes inside subgroups, so it is crossed with time; ``"between_subgroups"``: it is
    constant inside each subgroup; ``"confounded"`` when each of its levels is a single
    subgroup, so that it is the subgroup under another name) and ``with_`` the subgroup
    column; then, for every
    pair of factors where the levels of one fix those of the other in at least
    ``threshold`` of the cases that are not already explained by the commonest level
    (Goodman and Kruskal's lambda), two rows with ``relation == "confounded"``, one for
    each factor, ``with_`` naming the other. ``association`` holds Cramer's V for the
    pair and ``note`` the lambdas and the level pairs.

    Examples
    --------
    >>> f = pd.DataFrame({"day": pd.Categorical([1, 1, 2, 2, 3, 3, 4, 4]),
    ...                   "crew": pd.Categorical(list("aabbaabb")),
    ...                   "scale": pd.Categorical(list("xxyyxxyy"))})
    >>> design_structure(f, subgroup="day", factors=["crew", "scale"])["relation"].tolist()
    ['between_subgroups', 'between_subgroups', 'confounded', 'confounded']
    """
    require_columns(frame, [subgroup, *factors], "subgroup/factor")
    sg = _factor(frame, subgroup)
    table, _, _ = _structure_rows(sg, [_factor(frame, f) for f in factors], threshold)
    return table


# --------------------------------------------------------------------------- least squares


@dataclass(frozen=True)
class _Gram:
    """Normal equations of all indicator columns after absorbing a blocking factor."""

    xx: np.ndarray  # indicator Gram matrix, centred within blocks
    xy: np.ndarray
    yy: float  # within-block sum of squares of y
    sizes: list[int]  # indicator columns per factor


def _gram(
    y: np.ndarray, w: np.ndarray, blocks: np.ndarray, n_blocks: int, factors: list[_Factor]
) -> _Gram:
    y = y - y[0]  # near values subtract exactly: keeps a large common offset out of the sums
    wb = np.bincount(blocks, weights=w, minlength=n_blocks)
    with np.errstate(invalid="ignore", divide="ignore"):
        ybar = np.bincount(blocks, weights=w * y, minlength=n_blocks) / wb
    resid = y - ybar[blocks]
    yy = float(np.sum(w * resid * resid))
    present = wb > 0
    inv = sparse.diags(np.where(present, 1.0 / np.where(present, wb, 1.0), 0.0))
    # block x level weighted counts, sparse: many subgroups times many levels stays small
    cell = [
        sparse.csr_matrix((w, (blocks, f.codes)), shape=(n_blocks, f.n_levels)) for f in factors
    ]
    blocks_xx = []
    for i, a in enumerate(factors):
        row = []
        for j, b in enumerate(factors):
            raw = (
                np.diag(np.bincount(a.codes, weights=w, minlength=a.n_levels))
                if i == j
                else _crosstab(a, b, w)
            )
            row.append(raw - (cell[i].T @ (inv @ cell[j])).toarray())
        blocks_xx.append(row)
    xx = np.block(blocks_xx) if factors else np.zeros((0, 0))
    xy = (
        np.concatenate(
            [np.bincount(f.codes, weights=w * resid, minlength=f.n_levels) for f in factors]
        )
        if factors
        else np.zeros(0)
    )
    return _Gram(xx, xy, yy, [f.n_levels for f in factors])


def _coding(sizes: list[int], keep: Sequence[int], kind: str) -> np.ndarray:
    """Map indicator columns to treatment (drop first level) or sum-to-zero columns."""
    blocks = []
    for index, size in enumerate(sizes):
        if index not in keep or size < 2:
            blocks.append(np.zeros((size, 0)))
        elif kind == "treatment":
            blocks.append(np.eye(size)[:, 1:])
        else:
            blocks.append(np.vstack([np.eye(size - 1), -np.ones((1, size - 1))]))
    rows = sum(sizes)
    cols = sum(b.shape[1] for b in blocks)
    out = np.zeros((rows, cols))
    r = c = 0
    for b in blocks:
        out[r : r + b.shape[0], c : c + b.shape[1]] = b
        r, c = r + b.shape[0], c + b.shape[1]
    return out


def _solve(g: _Gram, t: np.ndarray) -> tuple[np.ndarray, float, int, np.ndarray]:
    """Coefficients, residual sum of squares, rank and pseudo-inverse for coding ``t``."""
    a = t.T @ g.xx @ t
    b = t.T @ g.xy
    if a.size == 0:
        return np.zeros(0), g.yy, 0, np.zeros((0, 0))
    scale = np.sqrt(np.maximum(np.diag(a), 1e-300))
    # one eigendecomposition gives both the pseudo-inverse and the rank
    w, v = np.linalg.eigh(a / np.outer(scale, scale))
    size = np.abs(w)
    keep = size > 1e-10 * size.max()
    inv = (v[:, keep] / w[keep]) @ v[:, keep].T / np.outer(scale, scale)
    coef = inv @ b
    rank = int(np.sum(size > 1e-9))
    return coef, max(g.yy - float(coef @ b), 0.0), rank, inv


def _type2(
    g: _Gram, test: Sequence[int] | None = None
) -> tuple[list[tuple[float, int]], float, int]:
    """Type II sums of squares and df of the factors ``test`` (default all), each adjusted
    for every other factor, plus the residual sum of squares and the rank of the model."""
    everything = list(range(len(g.sizes)))
    _, rss, rank, _ = _solve(g, _coding(g.sizes, everything, "treatment"))
    out = []
    for j in everything if test is None else test:
        others = [i for i in everything if i != j]
        _, rss_j, rank_j, _ = _solve(g, _coding(g.sizes, others, "treatment"))
        out.append((max(rss_j - rss, 0.0), rank - rank_j))
    return out, rss, rank


def _f_row(source: str, ss: float, df: float, error: tuple[float, float, str] | None) -> dict:
    ms = ss / df if df > 0 else float("nan")
    f = p = float("nan")
    term = ""
    if error is not None:
        ems, edf, term = error
        if df > 0 and edf > 0 and ems > 0:
            f = ms / ems
            p = float(stats.f.sf(f, df, edf))
    return {"source": source, "df": df, "ss": ss, "ms": ms, "f": f, "p": p, "error_term": term}


# --------------------------------------------------------------------------- the design


@dataclass(frozen=True)
class _Design:
    y: np.ndarray
    subgroup: _Factor
    sizes: np.ndarray  # rows per subgroup
    means: np.ndarray  # per subgroup
    within_ss: float
    between: list[_Factor]  # factors constant within subgroups, codes per subgroup
    within: list[_Factor]  # factors varying within subgroups, codes per row
    factors: list[_Factor]  # every factor asked for, codes per row
    structure: pd.DataFrame
    notes: tuple[str, ...]

    @property
    def n(self) -> int:
        return self.y.size

    @property
    def k(self) -> int:
        return self.subgroup.n_levels

    @property
    def single(self) -> bool:
        return bool(np.all(self.sizes == 1))


def _design(frame: pd.DataFrame, value: str, subgroup: str, factors: Sequence[str]) -> _Design:
    y, sg, fs = _prepare(frame, value, subgroup, factors)
    structure, relation, per_subgroup = _structure_rows(sg, fs, CONFOUNDING_THRESHOLD)
    notes: list[str] = []
    dropped: set[str] = set()
    for row in structure[structure["relation"] == "confounded"].itertuples():
        order = [f.name for f in fs]
        if row.with_ not in order or row.factor in dropped or row.with_ in dropped:
            continue  # confounded with the subgroup itself: handled below
        later = max(row.factor, row.with_, key=order.index)
        earlier = min(row.factor, row.with_, key=order.index)
        dropped.add(later)
        notes.append(
            f"{later!r} is confounded with {earlier!r}: their effects cannot be told apart; "
            f"{later!r} is left out of the joint model and tested alone in its comparisons."
        )
    for f in fs:
        if f.n_levels < 2 and f.name not in dropped:
            dropped.add(f.name)
            notes.append(f"{f.name!r} has a single level and is left out.")
        elif relation[f.name] == "confounded" and f.name not in dropped:
            dropped.add(f.name)
            notes.append(
                f"each level of {f.name!r} is a single subgroup: it cannot be told apart from "
                "the subgroup-to-subgroup variation (the 'subgroup' row) and is left out."
            )
    m = group_moments(y, sg.codes, sg.n_levels)
    between = [
        _Factor(f.name, per_subgroup[f.name], f.levels)
        for f in fs
        if relation[f.name] == "between_subgroups" and f.name not in dropped
    ]
    within = [f for f in fs if relation[f.name] == "within_subgroup" and f.name not in dropped]
    return _Design(
        y, sg, m.n, m.mean, float(np.nansum(m.ss)), between, within, fs, structure, tuple(notes)
    )


def _anova(d: _Design) -> pd.DataFrame:
    rows: list[dict] = []
    within_df = d.n - d.k
    # Between subgroups, on single values without the subgroup block: with no
    # within-subgroup factors this is weighted least squares on the subgroup means.
    between_rows = [_Factor(f.name, f.codes[d.subgroup.codes], f.levels) for f in d.between]
    gb = _gram(d.y, np.ones(d.n), np.zeros(d.n, np.intp), 1, [*between_rows, *d.within])
    parts_b, rss_b, rank_b = _type2(gb, range(len(d.between)))
    # within subgroups: the subgroup absorbed as a block
    gw = _gram(d.y, np.ones(d.n), d.subgroup.codes, d.k, d.within)
    parts_w, rss_w, rank_w = _type2(gw)
    sg_ss, sg_df = rss_b - rss_w, d.k - 1 - rank_b + rank_w
    names = " and ".join(f.name for f in d.between)
    sg_error = (
        sg_ss / sg_df if sg_df > 0 else float("nan"),
        sg_df,
        (f"subgroups within {names}" if names else "subgroups")
        if not d.single
        else "residual (single values)",
    )
    for f, (ss, df) in zip(d.between, parts_b, strict=True):
        rows.append(_f_row(f.name, ss, df, sg_error))
    if within_df <= 0:
        rows.append(_f_row("residual", sg_ss, sg_df, None))
        return pd.DataFrame(rows, columns=_ANOVA_COLUMNS)
    resid_ss, resid_df = rss_w, within_df - rank_w
    cells_ss = cells_df = None
    if d.within:
        cell = np.zeros(d.n, np.int64) + d.subgroup.codes
        for f in d.within:
            cell = cell * f.n_levels + f.codes
        _, cell_codes = np.unique(cell, return_inverse=True)
        cm = group_moments(d.y, cell_codes)
        if d.n - cm.n.size > 0:
            cells_ss, cells_df = float(np.nansum(cm.ss)), d.n - cm.n.size
    residual = (cells_ss, cells_df) if cells_ss is not None else (resid_ss, resid_df)
    # No residual degrees of freedom left (the within factors use them all): no F tests.
    error_ms = residual[0] / residual[1] if residual[1] > 0 else float("nan")
    error_w = (error_ms, residual[1], "within subgroups")
    rows.append(_f_row("subgroup", sg_ss, sg_df, error_w))
    for f, (ss, df) in zip(d.within, parts_w, strict=True):
        rows.append(_f_row(f.name, ss, df, error_w))
    if cells_ss is not None and resid_df - cells_df > 0:
        label = "subgroup x " + " x ".join(f.name for f in d.within)
        rows.append(_f_row(label, resid_ss - cells_ss, resid_df - cells_df, error_w))
    rows.append(_f_row("residual", residual[0], residual[1], None))
    return pd.DataFrame(rows, columns=_ANOVA_COLUMNS)


# --------------------------------------------------------------------------- components


def _balanced(d: _Design) -> bool:
    if np.unique(d.sizes).size != 1 or len(d.between) > 1:
        return False
    if d.between and np.unique(np.bincount(d.between[0].codes)).size != 1:
        return False
    if d.within:
        cell = np.zeros(d.n, np.int64)
        for f in d.within:
            cell = cell * f.n_levels + f.codes
        _, cell = np.unique(cell, return_inverse=True)
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


def _moment_components(d: _Design, anova: pd.DataFrame, level: float) -> tuple[list[dict], str]:
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


def _reml_stats(d: _Design, terms: list[_Factor]) -> _RemlStats:
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


def _reml_components(d: _Design, start: dict[str, float]) -> list[dict]:
    """REML estimates of the additive random model (every factor and the subgroup random,
    the mean fixed) from sufficient statistics: the work per likelihood evaluation does
    not grow with the number of rows. ``start``: moment estimates to start from.

    Checked against statsmodels MixedLM (REML) on nested, crossed and single-value
    layouts and against Bates' lme4 book values for Pastes (tests/test_variation.py).
    """
    terms = [_Factor(f.name, f.codes[d.subgroup.codes], f.levels) for f in d.between]
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


def _reml_feasible(d: _Design) -> bool:
    columns = 1 + sum(f.n_levels for f in [*d.between, *d.within])
    return columns <= _REML_MAX_COLUMNS and columns**2 * np.unique(d.sizes).size <= _REML_MAX_POOLED


def _components(
    d: _Design, anova: pd.DataFrame, method: str, level: float
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


# --------------------------------------------------------------------------- comparisons


def _level_data(d: _Design, f: _Factor) -> tuple[np.ndarray, np.ndarray, int]:
    """Values and level codes to compare, and the error degrees of freedom already used:
    subgroup means for a factor constant inside subgroups; otherwise values centred on
    their subgroup mean (the subgroup as a block, which uses one df per subgroup but one).
    """
    per_subgroup = _constant_within(f.codes, d.subgroup.codes, d.k)
    if np.all(per_subgroup >= 0):
        return d.means, per_subgroup, 0
    return d.y - d.means[d.subgroup.codes] + d.y.mean(), f.codes, d.k - 1


#: Exact ANOM critical values up to this many levels (Sidak beyond).
_ANOM_MAX_LEVELS = 100


@lru_cache(maxsize=64)
def _anom_max_cdf(k: int) -> interpolate.CubicSpline:
    """G(c) = P(max_i |Z_i - Zbar| <= c) for k independent standard normals, as a spline.

    Given sum(Z) = 0 the Z_i are the deviations, so with the Fourier form of the delta
    function G(c) = sqrt(2k / pi) * int_0^inf g(t)^k dt, where
    g(t) = int_{-c}^{c} phi(x) cos(t x) dx
         = -Re(exp(-c^2/2) (exp(ict) w((t + ic)/sqrt 2) - exp(-ict) w((t - ic)/sqrt 2))) / 2
    with w the Faddeeva function (no overflow). Simpson's rule in t; the oscillating tail
    of g decays as 1/t, so three and four levels integrate further. Two levels: exact.
    """
    c = np.linspace(0.0, 7.0, 141)
    if k == 2:
        return interpolate.CubicSpline(c, 2.0 * stats.norm.cdf(np.sqrt(2.0) * c) - 1.0)
    t = np.linspace(0.0, 40.0 if k <= 4 else 20.0, 1601 if k <= 4 else 801)
    cc, tt = c[:, None], t[None, :]
    ict = 1j * cc * tt
    faddeeva = np.exp(ict) * special.wofz((tt + 1j * cc) / np.sqrt(2.0)) - np.exp(
        -ict
    ) * special.wofz((tt - 1j * cc) / np.sqrt(2.0))
    g = -0.5 * np.exp(-0.5 * cc**2) * faddeeva.real
    values = np.sqrt(2.0 * k / np.pi) * integrate.simpson(g**k, x=t, axis=-1)
    return interpolate.CubicSpline(c, np.clip(values, 0.0, 1.0))


@lru_cache(maxsize=64)
def _chi_nodes(df: float) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights for the distribution of s / sigma on ``df``."""
    low, high = np.sqrt(stats.chi2.ppf([1e-12, 1.0 - 1e-12], df) / df)
    x, w = np.polynomial.legendre.leggauss(96)
    u = low + (high - low) * (x + 1.0) / 2.0
    return u, w * (high - low) / 2.0 * stats.chi2.pdf(df * u * u, df) * 2.0 * df * u


def _studentized(spline: interpolate.CubicSpline, c: np.ndarray, df: float) -> np.ndarray:
    """E[G(c * s / sigma)] with s on ``df`` degrees of freedom, for a distribution function
    G of a normal-theory statistic held as a spline on [0, x_max] (1 beyond)."""
    top = float(spline.x[-1])
    if np.isinf(df):
        return np.clip(spline(np.minimum(c, top)), 0.0, 1.0)
    u, w = _chi_nodes(df)
    return np.clip(spline(np.minimum(np.multiply.outer(c, u), top)), 0.0, 1.0) @ w


def _anom_cdf(h: np.ndarray, k: int, df: float) -> np.ndarray:
    """P(max_i |Ybar_i - Ybar| / (s sqrt((k - 1) / (k n))) <= h) for k equal groups of
    normal values, s on ``df`` degrees of freedom."""
    c = np.asarray(h, dtype=float) * np.sqrt((k - 1) / k)
    return _studentized(_anom_max_cdf(k), c, df)


@lru_cache(maxsize=64)
def _range_cdf(k: int) -> interpolate.CubicSpline:
    """P(range of k standard normals <= w) = k int phi(z) (Phi(z) - Phi(z - w))^(k-1) dz,
    by Gauss-Legendre quadrature on [-9, 9], as a spline in w on [0, 20]."""
    z, weight = np.polynomial.legendre.leggauss(200)
    z, weight = 9.0 * z, 9.0 * weight * stats.norm.pdf(9.0 * z)
    w = np.linspace(0.0, 20.0, 801)
    inside = stats.norm.cdf(z)[None, :] - stats.norm.cdf(z[None, :] - w[:, None])
    return interpolate.CubicSpline(w, k * (np.clip(inside, 0.0, 1.0) ** (k - 1)) @ weight)


def _studentized_range_sf(q: np.ndarray, k: int, df: float) -> np.ndarray:
    """Upper tail of the studentized range (the Tukey test): a vectorised quadrature.

    Checked against scipy.stats.studentized_range through scipy.stats.tukey_hsd
    (tests/test_variation.py).
    """
    return 1.0 - _studentized(_range_cdf(k), np.asarray(q, dtype=float), df)


@lru_cache(maxsize=256)
def _anom_critical(alpha: float, k: int, df: float) -> float:
    """Exact ANOM critical value h(alpha; k, df) for equal group sizes.

    The root of :func:`_anom_cdf`, bracketed by the single-comparison t quantile (below)
    and the Sidak value (above, by Sidak's inequality). Checked against brute-force
    simulation, the t quantile for k = 2 and Nelson's table value h(0.05; 3, inf) = 2.34
    (tests/test_variation.py).
    """
    low = stats.t.ppf(1 - alpha / 2, df)
    high = stats.t.ppf(1 - (1 - (1 - alpha) ** (1 / k)) / 2, df)
    return float(
        optimize.brentq(
            lambda h: float(_anom_cdf(h, k, df)) - (1 - alpha), 0.99 * low, 1.01 * high, xtol=1e-7
        )
    )


@lru_cache(maxsize=256)
def _tukey_critical(alpha: float, k: int, df: float) -> float:
    return float(
        optimize.brentq(lambda q: float(_studentized_range_sf(q, k, df)) - alpha, 0.1, 1e3)
    )


def _comparisons(
    y: np.ndarray, codes: np.ndarray, used_df: int, levels: pd.Index, alpha: float
) -> pd.DataFrame:
    m = group_moments(y, codes, len(levels))
    keep = m.n > 0
    n, mean = m.n[keep], m.mean[keep]
    labels = [str(v) for v in np.asarray(levels)[keep]]
    k, total = n.size, n.sum()
    df = total - k - used_df
    rows: list[dict] = []
    if k < 2 or df <= 0:
        return pd.DataFrame(columns=[*_COMPARISON_COLUMNS, "se"])
    mse = float(np.nansum(m.ss[keep]) / df)
    s = np.sqrt(mse)
    # Tukey-Kramer pairs
    i, j = np.triu_indices(k, 1)
    diff = mean[i] - mean[j]
    se_pair = s * np.sqrt(0.5 * (1 / n[i] + 1 / n[j]))
    q = np.abs(diff) / se_pair if s > 0 else np.full(diff.size, np.nan)
    p = _studentized_range_sf(q, k, float(df))
    qcrit = _tukey_critical(alpha, k, float(df))
    for a, b, est, qq, pp, half in zip(i, j, diff, q, p, qcrit * se_pair, strict=True):
        rows.append(
            {
                "test": "tukey",
                "level": labels[a],
                "versus": labels[b],
                "estimate": est,
                "statistic": qq,
                "p": float(pp),
                "lower": est - half,
                "upper": est + half,
                "se": np.nan,
            }
        )
    # Level effects (sum of effects weighted by n is zero) and analysis of means
    grand = float(np.sum(n * mean) / total)
    se = s * np.sqrt((total - n) / (total * n))
    with np.errstate(invalid="ignore", divide="ignore"):
        t = (mean - grand) / se
    p_raw = 2 * stats.t.sf(np.abs(t), df)
    t_each = stats.t.ppf(1 - alpha / 2, df)
    exact = np.all(n == n[0]) and k <= _ANOM_MAX_LEVELS
    with np.errstate(invalid="ignore"):
        if exact:
            h = _anom_critical(alpha, k, float(df))
            p_anom = 1.0 - _anom_cdf(np.abs(t), k, float(df))
        else:  # unequal sizes: Sidak's bound, slightly conservative
            h = stats.t.ppf(1 - (1 - (1 - alpha) ** (1 / k)) / 2, df)
            p_anom = 1.0 - (1.0 - p_raw) ** k
    for lab, mu, e, tt, pr in zip(labels, mean, se, t, p_raw, strict=True):
        rows.append(
            {
                "test": "effect",
                "level": lab,
                "versus": "overall",
                "estimate": mu - grand,
                "statistic": tt,
                "p": float(pr),
                "lower": mu - grand - t_each * e,
                "upper": mu - grand + t_each * e,
                "se": e,
            }
        )
    for lab, mu, e, tt, pr in zip(labels, mean, se, t, p_anom, strict=True):
        rows.append(
            {
                "test": "anom",
                "level": lab,
                "versus": "overall",
                "estimate": mu,
                "statistic": tt,
                "p": float(pr),
                "lower": grand - h * e,
                "upper": grand + h * e,
                "se": e,
            }
        )
    groups = np.split(y[np.argsort(codes, kind="stable")], np.cumsum(m.n)[:-1])
    groups = [g for g in groups if g.size]
    try:
        with np.errstate(invalid="ignore", divide="ignore"):  # all values tied: NaN
            h_stat, h_p = stats.kruskal(*groups)
    except ValueError:
        h_stat, h_p = float("nan"), float("nan")
    rows.append(
        {
            "test": "kruskal_wallis",
            "level": "all",
            "versus": "",
            "estimate": np.nan,
            "statistic": float(h_stat),
            "p": float(h_p),
            "lower": np.nan,
            "upper": np.nan,
            "se": np.nan,
        }
    )
    return pd.DataFrame(rows, columns=[*_COMPARISON_COLUMNS, "se"])


def _spread(d: _Design, factors: list[_Factor]) -> pd.DataFrame:
    residual = d.y if d.single else d.y - d.means[d.subgroup.codes]
    rows = []
    for f in factors:
        order = np.argsort(f.codes, kind="stable")
        counts = np.bincount(f.codes, minlength=f.n_levels)
        groups = [g for g in np.split(residual[order], np.cumsum(counts)[:-1]) if g.size > 1]
        for test, center in (("levene", "mean"), ("brown_forsythe", "median")):
            stat = p = float("nan")
            if len(groups) > 1:
                with np.errstate(invalid="ignore", divide="ignore"):
                    stat, p = stats.levene(*groups, center=center)
            rows.append({"factor": f.name, "test": test, "statistic": float(stat), "p": float(p)})
    return pd.DataFrame(rows, columns=["factor", "test", "statistic", "p"])


# --------------------------------------------------------------------------- offsets


def _sum_coded_effects(
    g: _Gram, factors: list[_Factor], keep: list[int], resid_df: float, level: float
) -> list[dict]:
    t = _coding(g.sizes, list(range(len(g.sizes))), "sum")
    coef, rss, rank, inv = _solve(g, t)
    df = resid_df - rank
    sigma2 = rss / df if df > 0 else float("nan")
    rows = []
    col = 0
    for index, f in enumerate(factors):
        width = f.n_levels - 1 if f.n_levels > 1 else 0
        if index in keep and width:
            # map sum-coded coefficients to one effect per level
            m = np.vstack([np.eye(width), -np.ones((1, width))])
            eff = m @ coef[col : col + width]
            cov = m @ inv[col : col + width, col : col + width] @ m.T * sigma2
            se = np.sqrt(np.maximum(np.diag(cov), 0.0))
            tq = stats.t.ppf(0.5 + level / 2, df) if df > 0 else np.nan
            with np.errstate(invalid="ignore", divide="ignore"):
                p = 2 * stats.t.sf(np.abs(eff / se), df) if df > 0 else np.full(eff.size, np.nan)
            for lab, e, s, pp in zip(f.levels, eff, se, p, strict=True):
                rows.append(
                    {
                        "factor": f.name,
                        "level": str(lab),
                        "offset": float(e),
                        "se": float(s),
                        "lower": float(e - tq * s),
                        "upper": float(e + tq * s),
                        "p": float(pp),
                    }
                )
        col += width
    return rows


def _confounding_notes(d: _Design, measured_by: Sequence[str]) -> dict[str, str]:
    """For each measured_by factor confounded with another factor or the subgroup: a note
    that its offsets carry the other's effect too."""
    s = d.structure
    out = {}
    for m in measured_by:
        rows = s[(s["factor"] == m) & (s["relation"] == "confounded")]
        others = [str(w) for w in rows["with_"]]
        if others:
            named = " and ".join(repr(o) for o in others)
            out[m] = (
                f"confounded with {named}: these offsets are the effect of {m!r} and {named} "
                "together; the data cannot tell them apart"
            )
    return out


def _marginal_note(d: _Design) -> list[str]:
    """A note when associated factors make the one-factor level comparisons unreliable.

    Tukey, ANOM, Kruskal-Wallis and the effects compare the levels of one factor on
    their own; with factors that are partly confounded a level can differ only through
    the levels of another factor it goes with, while the Type II ANOVA adjusts for that.
    """
    factors = [f for f in d.factors if f.n_levels > 1]
    pairs = []
    for i, a in enumerate(factors):
        for b in factors[i + 1 :]:
            v = _association(_crosstab(a, b))[0]
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


def _offsets(d: _Design, measured_by: Sequence[str], level: float) -> pd.DataFrame:
    rows: list[dict] = []
    names_b = [f.name for f in d.between]
    names_w = [f.name for f in d.within]
    if any(m in names_b for m in measured_by):
        g = _gram(d.means, d.sizes.astype(float), np.zeros(d.k, np.intp), 1, d.between)
        keep = [i for i, n in enumerate(names_b) if n in measured_by]
        rows += _sum_coded_effects(g, d.between, keep, d.k - 1, level)
    if any(m in names_w for m in measured_by):
        g = _gram(d.y, np.ones(d.n), d.subgroup.codes, d.k, d.within)
        keep = [i for i, n in enumerate(names_w) if n in measured_by]
        rows += _sum_coded_effects(g, d.within, keep, d.n - d.k, level)
    table = pd.DataFrame(rows, columns=_OFFSET_COLUMNS[:-1])
    notes = _confounding_notes(d, measured_by)
    table["note"] = [notes.get(name, "") for name in table["factor"]]
    return table


def measurement_offsets(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    measured_by: Sequence[str],
    factors: Sequence[str] = (),
    level: float = 0.95,
) -> pd.DataFrame:
    """Offset of each level of the sampling/measurement factors, the process held fixed.

    Each offset is a level's effect under sum-to-zero coding: its deviation from the
    unweighted average of all levels of that factor (the offsets of a factor sum to
    zero), adjusted for the other factors. A measured_by factor that varies inside
    subgroups is estimated with the subgroup as a block (time removed) together with the
    other within-subgroup factors; one that is constant inside subgroups is estimated
    from the subgroup means (weighted by subgroup size) together with the other
    between-subgroup factors, with the subgroup-to-subgroup variation as its error.
    ``se`` is the standard error, ``lower``/``upper`` a ``level`` t interval and ``p``
    the t test of a zero offset. The measured_by factors enter the joint model first, so
    a factor confounded with one of them is left out; the offsets then carry both effects
    and ``note`` says so (it is empty otherwise).

    Checked against statsmodels OLS with ``C(factor, Sum)`` coding (tests/test_variation.py).

    Examples
    --------
    >>> f = pd.DataFrame({"hour": pd.Categorical([1, 1, 2, 2, 3, 3]),
    ...                   "crew": pd.Categorical(list("ababab")),
    ...                   "w": [10.0, 11.0, 12.0, 13.1, 9.0, 9.9]})
    >>> o = measurement_offsets(f, value="w", subgroup="hour", measured_by=["crew"])
    >>> o["offset"].round(2).tolist()
    [-0.5, 0.5]
    """
    measured_by = (measured_by,) if isinstance(measured_by, str) else tuple(measured_by)
    d = _offsets_design(frame, value, subgroup, measured_by, factors)
    return _offsets(d, measured_by, level)


def _offsets_design(
    frame: pd.DataFrame,
    value: str,
    subgroup: str,
    measured_by: Sequence[str],
    factors: Sequence[str],
    design: _Design | None = None,
) -> _Design:
    """The design with the measured_by factors first (``design`` reused when it already
    keeps all of them)."""
    if design is not None:
        kept = {f.name for f in [*design.between, *design.within]}
        if all(m in kept for m in measured_by):
            return design
    return _design(frame, value, subgroup, list(dict.fromkeys([*measured_by, *factors])))


def adjusted_values(frame: pd.DataFrame, *, value: str, offsets: pd.DataFrame) -> np.ndarray:
    """The values with each row's measurement offsets taken off (one per factor in ``offsets``).

    ``offsets`` is a table from :func:`measurement_offsets` (``factor, level, offset``).
    Raises QCDataError when a level of the frame has no offset.

    Examples
    --------
    >>> f = pd.DataFrame({"crew": ["a", "b"], "w": [10.0, 12.0]})
    >>> o = pd.DataFrame({"factor": ["crew", "crew"], "level": ["a", "b"],
    ...                   "offset": [-1.0, 1.0]})
    >>> adjusted_values(f, value="w", offsets=o).tolist()
    [11.0, 11.0]
    """
    y = finite_column(frame, value, "value").copy()
    if not isinstance(offsets, pd.DataFrame):
        raise QCDataError(
            f"offsets is a {type(offsets).__name__}; pass the table from measurement_offsets()."
        )
    require_columns(offsets, ["factor", "level", "offset"], "offsets")
    for name, table in offsets.groupby("factor", sort=False):
        require_columns(frame, [name], "offset factor")
        lookup = dict(zip(table["level"].astype(str), table["offset"], strict=True))
        labels = frame[name].astype(str).to_numpy()
        shift = pd.Series(labels).map(lookup).to_numpy(dtype=np.float64)
        bad = np.flatnonzero(np.isnan(shift))
        if bad.size:
            raise QCDataError(
                f"column {name!r} has levels without an offset at rows "
                f"{frame.index[bad[:5]].tolist()} ({sorted(set(labels[bad]))[:5]}); "
                "estimate the offsets on data that include these levels."
            )
        y -= shift
    return y


# --------------------------------------------------------------------------- multi-vari


def multivari_table(
    frame: pd.DataFrame, *, value: str, subgroup: str, factors: Sequence[str]
) -> pd.DataFrame:
    """Level means of each factor nested in each subgroup: a tidy table ready to draw.

    Columns ``subgroup, factor, level, mean, n``: for each factor, one row per
    (subgroup, level) cell that has data; then one row per subgroup with
    ``factor == "subgroup"`` and ``level`` the subgroup's label (the subgroup mean).
    ``subgroup`` keeps the ordered categories of the input (time order); ``level`` is
    text. Checked against pandas ``groupby`` means and sizes (tests/test_variation.py).

    Examples
    --------
    >>> f = pd.DataFrame({"h": pd.Categorical([1, 1, 2, 2], ordered=True),
    ...                   "nozzle": pd.Categorical(list("abab")), "w": [1.0, 2.0, 3.0, 5.0]})
    >>> multivari_table(f, value="w", subgroup="h", factors=["nozzle"])["mean"].tolist()
    [1.0, 2.0, 3.0, 5.0, 1.5, 4.0]
    """
    return _multivari(*_prepare(frame, value, subgroup, factors))


def _multivari(y: np.ndarray, sg: _Factor, fs: list[_Factor]) -> pd.DataFrame:
    cats = sg.levels
    parts = []
    for f in fs:
        cell = sg.codes * f.n_levels + f.codes
        size = sg.n_levels * f.n_levels
        n = np.bincount(cell, minlength=size)
        total = np.bincount(cell, weights=y, minlength=size)
        present = np.flatnonzero(n)
        parts.append(
            pd.DataFrame(
                {
                    "subgroup": pd.Categorical.from_codes(
                        present // f.n_levels, categories=cats, ordered=True
                    ),
                    "factor": f.name,
                    "level": pd.Index(f.levels).astype(str).to_numpy()[present % f.n_levels],
                    "mean": total[present] / n[present],
                    "n": n[present],
                }
            )
        )
    m = group_moments(y, sg.codes, sg.n_levels)
    present = np.flatnonzero(m.n)
    parts.append(
        pd.DataFrame(
            {
                "subgroup": pd.Categorical.from_codes(present, categories=cats, ordered=True),
                "factor": "subgroup",
                "level": pd.Index(cats).astype(str).to_numpy()[present],
                "mean": m.mean[present],
                "n": m.n[present],
            }
        )
    )
    return pd.concat(parts, ignore_index=True)


# --------------------------------------------------------------------------- entry point


def variation(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    factors: Sequence[str],
    measured_by: Sequence[str] = (),
    time: str | None = None,
    alpha: float = 0.05,
    components: str = "auto",
    level: float = 0.95,
    compare: bool = True,
) -> VariationResult:
    """Split the variance of ``value`` into its sources, each tested with the right error.

    Parameters
    ----------
    frame : long table in time order (see the internal data contract in DESIGN.md).
    value, subgroup : column names; ``subgroup`` is the rational subgroup (use
        observation numbers for single values).
    factors : stratification columns; ``measured_by`` the subset that describes sampling
        or measurement (their offsets go to ``offsets``).
    time : accepted so that callers can pass their roles uniformly; the order of the
        subgroup categories is the time order used here.
    alpha : level of the analysis-of-means decision limits and Tukey intervals.
    components : ``"auto"`` (expected mean squares for balanced data, REML for
        unbalanced data, computed from sufficient statistics so that its cost does not
        grow with the rows; moment estimates with effective group sizes, with a note, when
        the factors have more than a few hundred levels in all), ``"ems"`` or ``"reml"``.
    level : confidence level of the component and offset intervals.
    compare : ``False`` leaves ``comparisons`` and ``spread`` empty (quicker, for
        simulations and first looks).

    Returns
    -------
    VariationResult
        ``structure`` (see :func:`design_structure`); ``anova`` with Type II sums of
        squares: between-subgroup factors from subgroup means weighted by size and tested
        against "subgroups within <those factors>", the subgroups and within-subgroup
        factors tested "within subgroups" (within cells when there are replicates, with the
        subgroup x factor interaction as its own row); ``components`` (random-effects
        variances of an additive model: every factor and the subgroup random, the
        subgroup x factor interaction pooled into the residual; negative estimates set to
        zero with a note; ``lower``/``upper`` are Satterthwaite intervals, chi-square for
        the residual, NaN for REML); per-factor
        ``comparisons`` (``tukey`` pairs (Tukey-Kramer, ``statistic`` the studentized
        range q); ``effect`` rows: level mean minus the size-weighted overall mean with its
        ``se`` and t test; ``anom`` rows: level mean, ``lower``/``upper`` the decision
        limits of the analysis of means, grand mean +- h * se, with ``p`` the matching
        adjusted p-value: for equal group sizes (up to 100 levels) h is the exact critical
        value h(alpha; k, df) of max |mean_i - grand| / se for independent normal means
        (see ``_anom_max_cdf``); for unequal sizes the Sidak value
        t(1 - (1 - (1 - alpha)^(1/k)) / 2, df), a documented approximation that is
        slightly conservative, with Sidak-adjusted p;
        ``kruskal_wallis``) on subgroup means for between-subgroup
        factors and on subgroup-centred values otherwise (error df reduced by the
        number of subgroups less one); each factor's comparisons ignore the other
        factors, and ``notes`` says so when two factors go together (Cramer's V at
        least ``ASSOCIATION_NOTE_V``); ``spread`` (Levene and
        Brown-Forsythe on deviations from the subgroup mean, or on single values);
        ``offsets`` (:func:`measurement_offsets`; a measured_by factor confounded with
        another factor keeps its offsets, whose ``note`` says that they carry the other
        factor's effect too, and ``notes`` repeats it); ``multivari``
        (:func:`multivari_table`).

    Checked against R's documented examples (PlantGrowth one-way F, InsectSprays
    Kruskal-Wallis), Bates' lme4 book values for Dyestuff and Pastes, statsmodels
    ``anova_lm`` (Type II) and MixedLM (REML), scipy ``tukey_hsd`` and ``levene``, Nelson's
    ANOM table and simulation; see tests/test_variation.py.

    Examples
    --------
    >>> f = pd.DataFrame({"hour": pd.Categorical(np.repeat(np.arange(6), 2), ordered=True),
    ...                   "nozzle": pd.Categorical(["a", "b"] * 6),
    ...                   "w": [10.0, 11.2, 9.8, 11.0, 10.1, 11.3, 9.9, 11.1, 10.2, 11.0,
    ...                         10.0, 11.4]})
    >>> r = variation(f, value="w", subgroup="hour", factors=["nozzle"])
    >>> r.anova[["source", "error_term"]].values.tolist()
    [['subgroup', 'within subgroups'], ['nozzle', 'within subgroups'], ['residual', '']]
    """
    if components not in ("auto", "ems", "reml"):
        raise QCDataError(f"components={components!r}: use 'auto', 'ems' or 'reml'.")
    factors = (factors,) if isinstance(factors, str) else tuple(factors)
    measured_by = (measured_by,) if isinstance(measured_by, str) else tuple(measured_by)
    unknown = [m for m in measured_by if m not in factors]
    if unknown:
        raise QCDataError(
            f"measured_by {unknown} are not among factors {list(factors)}; list them in both."
        )
    d = _design(frame, value, subgroup, factors)
    anova = _anova(d)
    comps, method, comp_notes = _components(d, anova, components, level)
    comparisons = (
        {f.name: _comparisons(*_level_data(d, f), f.levels, alpha) for f in d.factors}
        if compare
        else {}
    )
    spread = _spread(d, d.factors if compare else [])
    offsets = pd.DataFrame(columns=_OFFSET_COLUMNS)
    if measured_by:
        od = _offsets_design(frame, value, subgroup, measured_by, factors, d)
        offsets = _offsets(od, measured_by, level)
    notes = list(d.notes) + comp_notes
    confounded = _confounding_notes(d, measured_by)
    notes += [f"offsets of {m!r}: {text}." for m, text in confounded.items()]
    if compare:
        notes += _marginal_note(d)
    if d.single:
        notes.append("single values: subgroup-to-subgroup and residual variation coincide.")
    if (anova.loc[anova["source"] == "residual", "df"] <= 0).all():
        notes.append(
            "no degrees of freedom are left for the residual (the factors have about one "
            "value per level): F tests and variance components are undefined (NaN); "
            "collect repeats within the levels."
        )
    return VariationResult(
        structure=d.structure,
        anova=anova,
        components=comps,
        comparisons=comparisons,
        spread=spread,
        offsets=offsets,
        multivari=_multivari(d.y, d.subgroup, d.factors),
        method=f"Type II sums of squares; components by {method}",
        notes=tuple(notes),
    )

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
* sums of squares of Type II (each factor adjusted for all other main effects).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pandas as pd
from scipy import optimize, sparse, stats

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
#: Unbalanced data get REML up to this much work (see ``_reml_cost``: under about a second
#: here), moment estimates beyond it.
_REML_MAX_COST = 3e6

_ANOVA_COLUMNS = ["source", "df", "ss", "ms", "f", "p", "error_term"]
_COMPARISON_COLUMNS = ["test", "level", "versus", "estimate", "statistic", "p", "lower", "upper"]
_OFFSET_COLUMNS = ["factor", "level", "offset", "se", "lower", "upper", "p"]


# --------------------------------------------------------------------------- input


@dataclass(frozen=True)
class _Factor:
    name: str
    codes: np.ndarray  # int per row
    levels: pd.Index

    @property
    def n_levels(self) -> int:
        return len(self.levels)


def _check_columns(frame: pd.DataFrame, columns: Sequence[str], role: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise QCDataError(
            f"{role} column(s) {missing} not found; the frame has columns "
            f"{list(frame.columns)[:12]}. Pass the names of existing columns."
        )


def _values(frame: pd.DataFrame, value: str) -> np.ndarray:
    _check_columns(frame, [value], "value")
    try:
        y = frame[value].to_numpy(dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise QCDataError(
            f"value column {value!r} is not numeric; convert it to numbers first."
        ) from exc
    bad = np.flatnonzero(~np.isfinite(y))
    if bad.size:
        raise QCDataError(
            f"value column {value!r} has missing or infinite values at rows "
            f"{frame.index[bad[:5]].tolist()}; drop or fill them first."
        )
    return y


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
    _check_columns(frame, [subgroup, *factors], "subgroup/factor")
    if len(frame) < 2:
        raise QCDataError(f"need at least two rows of {value!r}; got {len(frame)}.")
    y = _values(frame, value)
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
    _check_columns(frame, [subgroup, *factors], "subgroup/factor")
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
    inv = np.linalg.pinv(a / np.outer(scale, scale), rcond=1e-10, hermitian=True)
    inv = inv / np.outer(scale, scale)
    coef = inv @ b
    rank = int(np.linalg.matrix_rank(a / np.outer(scale, scale), tol=1e-9))
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
    error_w = (residual[0] / residual[1], residual[1], "within subgroups")
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
        e_ms = sum(table.loc[s, "ss"] for s in pooled) / e_df

    def n0(counts: np.ndarray) -> float:
        counts = counts[counts > 0]
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


def _reml_nested(d: _Design) -> list[dict]:
    """REML for value = mean + level of one between factor + subgroup + residual, from
    sufficient statistics (subgroup sizes and means, the within-subgroup sum of squares).
    With single values the subgroup term is the residual.

    The likelihood splits into the within-subgroup part (chi-square, residual variance
    only) and the subgroup means, whose covariance within a level of the factor is
    diag(s2_sub + s2_e / n_i) + s2_factor (Sherman-Morrison gives its inverse and
    determinant in closed form). Checked against statsmodels MixedLM
    (tests/test_variation.py).
    """
    top = d.between[0].codes if d.between else np.arange(d.k)
    n_top = int(top.max()) + 1
    ybar = d.means - np.average(d.means, weights=d.sizes)
    within_df = d.n - d.k
    scale = float(np.var(d.y)) or 1.0

    def objective(theta: np.ndarray) -> float:
        e2, s2, b2 = np.exp(theta) * scale
        w = 1.0 / (s2 + e2 / d.sizes)
        big_w = np.bincount(top, weights=w, minlength=n_top)
        t = np.bincount(top, weights=w * ybar, minlength=n_top)
        shrink = 1.0 + b2 * big_w
        info = float(np.sum(big_w / shrink))
        mu = float(np.sum(t / shrink)) / info
        r = ybar - mu
        q = float(np.sum(w * r * r)) - float(
            np.sum(b2 * np.bincount(top, weights=w * r, minlength=n_top) ** 2 / shrink)
        )
        logdet = float(np.sum(np.log(1.0 / w)) + np.sum(np.log(shrink)))
        within = within_df * np.log(e2) + d.within_ss / e2 if within_df > 0 else 0.0
        return 0.5 * (within + logdet + q + np.log(info))

    floor, free = np.log(1e-10), (np.log(1e-10), np.log(1e3))
    # single values: subgroup and residual variation are one thing, kept as the residual
    start = np.log([0.5, 1e-10 if d.single else 0.3, 0.2 if d.between else 1e-10])
    bounds = [free, (floor, floor) if d.single else free, free if d.between else (floor, floor)]
    best = optimize.minimize(objective, start, method="L-BFGS-B", bounds=bounds)
    e2, s2, b2 = np.exp(best.x) * scale
    # a component sitting on the lower bound is zero
    e2, s2, b2 = (v if v > 1e-8 * scale else 0.0 for v in (e2, s2, b2))
    rows = [{"source": d.between[0].name, "variance": b2}] if d.between else []
    rows += [] if d.single else [{"source": "subgroup", "variance": s2}]
    rows += [{"source": "residual", "variance": e2}]
    return [{**r, "lower": np.nan, "upper": np.nan} for r in rows]


def _reml_cost(d: _Design) -> float:
    """Rough work of one MixedLM iteration: rows x (random levels)^2 in one dense group."""
    levels = sum(f.n_levels for f in [*d.between, *d.within]) + (0 if d.single else d.k)
    return float(d.n) * levels**2


def _reml_components(d: _Design) -> tuple[list[dict], list[str]]:
    """REML with statsmodels MixedLM: every term a variance component in one group."""
    import statsmodels.formula.api as smf

    terms: dict[str, np.ndarray] = {}
    for f in d.between:
        terms[f.name] = f.codes[d.subgroup.codes]
    if not d.single:
        terms["subgroup"] = d.subgroup.codes
    for f in d.within:
        terms[f.name] = f.codes
    names = {f"t{i}": name for i, name in enumerate(terms)}
    data = pd.DataFrame({key: terms[name] for key, name in names.items()})
    scale = float(np.std(d.y)) or 1.0  # the optimiser works best on unit-scale data
    data["y"] = (d.y - d.y.mean()) / scale
    data["g"] = 0
    model = smf.mixedlm(
        "y ~ 1",
        data,
        groups="g",
        re_formula="0",
        vc_formula={key: f"0 + C({key})" for key in names},
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = model.fit(reml=True, method=["lbfgs", "powell"])
    notes = sorted({f"REML: {w.message}" for w in caught})
    variance = {names[key]: float(v) for key, v in zip(model.exog_vc.names, fit.vcomp, strict=True)}
    variance["residual"] = float(fit.scale)
    return [
        {"source": name, "variance": variance[name] * scale**2, "lower": np.nan, "upper": np.nan}
        for name in [*terms, "residual"]
    ], notes


def _components(
    d: _Design, anova: pd.DataFrame, method: str, level: float
) -> tuple[pd.DataFrame, str, list[str]]:
    notes: list[str] = []
    balanced = _balanced(d)
    nested = not d.within and len(d.between) <= 1
    small = _reml_cost(d) <= _REML_MAX_COST
    use_reml = method == "reml" or (method == "auto" and not balanced and (nested or small))
    if use_reml and nested:
        rows, used = _reml_nested(d), "REML (nested, from sufficient statistics)"
    elif use_reml:
        rows, notes = _reml_components(d)
        used = "REML (statsmodels MixedLM)"
    else:
        rows, used = _moment_components(d, anova, level)
        if not balanced and method == "auto":
            notes.append(
                "unbalanced data too large for REML here: components are moment estimates "
                "with effective group sizes (n0), approximate."
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


@lru_cache(maxsize=256)
def _tukey_critical(alpha: float, k: int, df: float) -> float:
    return float(stats.studentized_range.ppf(1 - alpha, k, df))


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
    p = stats.studentized_range.sf(q, k, df)
    qcrit = _tukey_critical(alpha, k, df)
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
    h = stats.t.ppf(1 - (1 - (1 - alpha) ** (1 / k)) / 2, df)  # Sidak
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
    for lab, mu, e, tt, pr in zip(labels, mean, se, t, p_raw, strict=True):
        rows.append(
            {
                "test": "anom",
                "level": lab,
                "versus": "overall",
                "estimate": mu,
                "statistic": tt,
                "p": float(1 - (1 - pr) ** k),
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
    return pd.DataFrame(rows, columns=_OFFSET_COLUMNS)


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
    the t test of a zero offset. Factors confounded with an earlier factor are left out.

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
    all_factors = list(dict.fromkeys([*measured_by, *factors]))
    d = _design(frame, value, subgroup, all_factors)
    return _offsets(d, measured_by, level)


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
    y = _values(frame, value).copy()
    for name, table in offsets.groupby("factor", sort=False):
        _check_columns(frame, [name], "offset factor")
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
    text.

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
    components : ``"auto"`` (expected mean squares for balanced data, REML for small
        unbalanced data, moment estimates with effective group sizes for large unbalanced
        data), ``"ems"`` or ``"reml"``.
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
        limits of the analysis of means with a Sidak critical value
        t(1 - (1 - (1 - alpha)^(1/k)) / 2, df), a documented approximation that is slightly
        conservative against the exact equal-n values, and ``p`` Sidak-adjusted;
        ``kruskal_wallis``) on subgroup means for between-subgroup
        factors and on subgroup-centred values otherwise (error df reduced by the
        number of subgroups less one); ``spread`` (Levene and
        Brown-Forsythe on deviations from the subgroup mean, or on single values);
        ``offsets`` (:func:`measurement_offsets`); ``multivari`` (:func:`multivari_table`).

    Checked against R's documented examples (PlantGrowth one-way F, InsectSprays
    Kruskal-Wallis), Bates' lme4 book values for Dyestuff and Pastes, statsmodels
    ``anova_lm`` (Type II), scipy ``tukey_hsd`` and ``levene``; see tests/test_variation.py.

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
    offsets = (
        _offsets(d, measured_by, level) if measured_by else pd.DataFrame(columns=_OFFSET_COLUMNS)
    )
    notes = list(d.notes) + comp_notes
    if d.single:
        notes.append("single values: subgroup-to-subgroup and residual variation coincide.")
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

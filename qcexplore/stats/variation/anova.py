"""Type II sums of squares, each factor tested against the error term the design calls for.

The subgroups (hours, days, lots) are random: a later subgroup is another draw of the same
kind. So a factor that changes inside the subgroups (a nozzle, a position) has an effect that
may itself vary from subgroup to subgroup, and the evidence for its average effect is the
number of subgroups it was seen in, not the number of values: it is tested against the
subgroup x factor interaction (the mixed model with the subgroups random; Montgomery, Design
and Analysis of Experiments, ch. 13, the unrestricted model; from memory). Values repeated
inside one subgroup x level cell estimate the within-cell (measurement and sampling) error,
against which the interaction is tested; a few repeated cells therefore add a row, never
change the error of the factors. The interaction is pooled with the within-cell error only by
the stated rule ``pool_above`` (its p-value above that level, the "sometimes pool" rule
common practice uses in gauge studies), never by default.

Everything is least squares on per-group sufficient statistics, so 200,000 rows take a
fraction of a second:

* within-subgroup factors: the subgroup absorbed as a block (values and indicator columns
  centred inside each subgroup), the Gram matrix built from cell counts with ``np.bincount``;
  the subgroup x factor interaction of each factor is the drop in the residual when the
  subgroup x level cells are absorbed instead of the subgroups (each adjusted for the
  main effects);
* between-subgroup factors: weighted least squares on the subgroup means with the subgroup
  sizes as weights, which gives exactly the sums of squares of the nested model on single
  values; they are tested against "subgroups within <those factors>";
* Type II: each factor adjusted for all other main effects, except the factors nested in it
  (hierarchy: a parent is adjusted for neither its children nor tested against the values
  below them, but against its children);
* a row without degrees of freedom is not printed; the notes say why.

Checked against statsmodels ``anova_lm`` (Type II) and OLS fits of the models compared, R's
PlantGrowth one-way F, statsmodels MixedLM's Wald test on balanced data, and by simulation
(tests/test_variation.py, tests/test_honesty.py).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse, stats

from qcexplore.stats.subgroups import constant_within
from qcexplore.stats.variation.factors import Factor, cell_codes, crosstab
from qcexplore.stats.variation.structure import Design

ANOVA_COLUMNS = ["source", "df", "ss", "ms", "f", "p", "error_term"]


@dataclass(frozen=True)
class Gram:
    """Normal equations of all indicator columns after absorbing a blocking factor."""

    xx: np.ndarray  # indicator Gram matrix, centred within blocks
    xy: np.ndarray
    yy: float  # within-block sum of squares of y
    sizes: list[int]  # indicator columns per factor


def gram(
    y: np.ndarray, w: np.ndarray, blocks: np.ndarray, n_blocks: int, factors: list[Factor]
) -> Gram:
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
                else crosstab(a, b, w)
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
    return Gram(xx, xy, yy, [f.n_levels for f in factors])


def coding(sizes: list[int], keep: Sequence[int], kind: str) -> np.ndarray:
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


def solve(g: Gram, t: np.ndarray) -> tuple[np.ndarray, float, int, np.ndarray]:
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
    g: Gram, test: Sequence[int] | None = None, children: Sequence[Sequence[int]] = ()
) -> tuple[list[tuple[float, int]], float, int]:
    """Type II sums of squares and df of the factors ``test`` (default all), each adjusted
    for every other factor except those nested in it (``children[j]``: indices of the
    factors nested in factor j), plus the residual sum of squares and rank of the model."""
    everything = list(range(len(g.sizes)))
    _, rss, rank, _ = solve(g, coding(g.sizes, everything, "treatment"))
    out = []
    for j in everything if test is None else test:
        kids = set(children[j]) if children else set()
        with_j = [i for i in everything if i not in kids]
        rss_a, rank_a = (
            (rss, rank) if not kids else solve(g, coding(g.sizes, with_j, "treatment"))[1:3]
        )
        _, rss_b, rank_b, _ = solve(g, coding(g.sizes, [i for i in with_j if i != j], "treatment"))
        out.append((max(rss_b - rss_a, 0.0), rank_a - rank_b))
    return out, rss, rank


@dataclass(frozen=True)
class Error:
    """The error term of one F test: its mean square, degrees of freedom and name."""

    ms: float
    df: float
    name: str


def _pooled(parts: Sequence[tuple[float, float]], name: str) -> Error:
    ss, df = sum(p[0] for p in parts), sum(p[1] for p in parts)
    return Error(ss / df if df > 0 else float("nan"), df, name)


def _f_row(source: str, ss: float, df: float, error: Error | None) -> dict:
    ms = ss / df if df > 0 else float("nan")
    f = p = float("nan")
    term = ""
    if error is not None:
        term = error.name
        if df > 0 and error.df > 0 and error.ms > 0:
            f = ms / error.ms
            p = float(stats.f.sf(f, df, error.df))
    return {"source": source, "df": df, "ss": ss, "ms": ms, "f": f, "p": p, "error_term": term}


@dataclass(frozen=True)
class Anova:
    """The ANOVA table, the error term of every tested row, and what the reader must know."""

    table: pd.DataFrame
    errors: dict[str, Error]
    notes: tuple[str, ...]


def _children(d: Design, fs: list[Factor]) -> list[list[int]]:
    names = [f.name for f in fs]
    return [[names.index(c) for c in d.children(f.name) if c in names] for f in fs]


def _interaction(d: Design, f: Factor, rss_w: float, resid_df: int) -> tuple[float, int]:
    """Sum of squares and df of subgroup x ``f``: the subgroup x level cells absorbed in
    place of the subgroups, the other within-subgroup factors kept."""
    cells = cell_codes(d.subgroup.codes, [f])
    n_cells = int(cells.max()) + 1
    others = [g for g in d.within if g is not f]
    _, rss_j, rank_j = _type2(gram(d.y, np.ones(d.n), cells, n_cells, others), ())
    return max(rss_w - rss_j, 0.0), resid_df - (d.n - n_cells - rank_j)


def _interaction_coefficients(
    d: Design, g: Gram, index: int, df_f: float, df_int: float
) -> tuple[float, float]:
    """The coefficients of the subgroup x factor variance in the expected mean squares of
    within-subgroup factor ``index`` and of its interaction.

    E(y'Ay) = tr(A V) + mu'A mu (Searle, Linear Models, ch. 2; from memory): with Z the
    subgroup x level cell indicators, the interaction adds sigma_int^2 tr(A Z Z') to each
    sum of squares. tr(P Z Z') for the projection P on the block-centred columns X_c is
    tr((X_c'X_c)^- (Z'X_c)'(Z'X_c)), so everything comes from cell counts. Equal repeats
    per cell make the two coefficients equal (one value per cell: both 1).
    """
    f = d.within[index]
    cells = cell_codes(d.subgroup.codes, [f])
    n_cells = int(cells.max()) + 1
    n_c = np.bincount(cells, minlength=n_cells).astype(float)
    cell_sg = constant_within(d.subgroup.codes, cells, n_cells)
    share = n_c / d.sizes[cell_sg]
    cell = Factor("cells", cells, pd.RangeIndex(n_cells))
    centre = sparse.diags(share) @ sparse.csr_matrix(
        (np.ones(n_cells), (np.arange(n_cells), cell_sg)), shape=(n_cells, d.k)
    )
    zx = sparse.hstack(
        [
            sparse.csr_matrix(crosstab(cell, h))
            - centre @ sparse.csr_matrix(crosstab(d.subgroup, h))
            for h in d.within
        ]  # fmt: skip
    ).tocsr()
    m = (zx.T @ zx).toarray()

    def trace(keep: list[int]) -> float:
        t = coding(g.sizes, keep, "treatment")
        inv = solve(g, t)[3]
        return float(np.sum(inv * (t.T @ m @ t)))

    everything = list(range(len(g.sizes)))
    full = trace(everything)
    t_f = full - trace([i for i in everything if i != index])
    t_int = d.n - float(np.sum(n_c * share)) - full
    return t_f / df_f, t_int / df_int


def _within_error(
    name: str,
    part: tuple[float, int],
    ratio: float,
    residual: Error,
    res_ss: float,
    pool_above: float | None,
) -> Error:
    """The error of a within-subgroup factor: its subgroup x factor interaction (for unequal
    repeats per cell, the combination of the interaction and within-cell mean squares with
    the factor's expected interaction share, ``ratio`` = c_factor / c_interaction, on
    Satterthwaite's df), pooled with the within-cell error only when the interaction's
    p-value exceeds ``pool_above``."""
    ss, df = part
    own = Error(ss / df, df, f"subgroup x {name}")
    if not (residual.df > 0 and residual.ms > 0):
        return own
    if pool_above is not None:
        p = float(stats.f.sf(own.ms / residual.ms, df, residual.df))
        if p > pool_above:
            return _pooled(
                [(ss, df), (res_ss, residual.df)],
                f"subgroup x {name} pooled with within cells (its p = {p:.2g} > {pool_above:g})",
            )
    if abs(ratio - 1.0) < 1e-9:
        return own
    ms = ratio * own.ms + (1.0 - ratio) * residual.ms
    if not ms > 0:
        return own
    terms = ((ratio * own.ms) ** 2 / df) + ((1.0 - ratio) * residual.ms) ** 2 / residual.df
    sign = "-" if ratio > 1 else "+"
    return Error(
        ms,
        ms * ms / terms,
        f"subgroup x {name} (unequal repeats: {ratio:.3g} MS(subgroup x {name}) {sign} "
        f"{abs(1.0 - ratio):.3g} MS(within cells), Satterthwaite df)",
    )


def anova_table(d: Design, pool_above: float | None = None) -> Anova:
    """The ANOVA rows: between-subgroup factors, subgroup, within-subgroup factors, the
    subgroup x factor interactions and the residual, each with the error it is tested
    against (see the module notes)."""
    rows: list[dict] = []
    errors: dict[str, Error] = {}
    notes: list[str] = []
    within_df = d.n - d.k
    inner = [f for f in d.within if d.nested.get(f.name) == d.subgroup.name]
    crossed = [f for f in d.within if f not in inner]
    # Between subgroups, on single values without the subgroup block: with no
    # within-subgroup factors this is weighted least squares on the subgroup means.
    # Factors nested in the subgroups are left out: the subgroup is not adjusted for them.
    between_rows = [Factor(f.name, f.codes[d.subgroup.codes], f.levels) for f in d.between]
    fb = [*between_rows, *crossed]
    gb = gram(d.y, np.ones(d.n), np.zeros(d.n, np.intp), 1, fb)
    parts_b, rss_b, rank_b = _type2(gb, range(len(d.between)), _children(d, fb))
    # within subgroups: the subgroup absorbed as a block
    gc = gram(d.y, np.ones(d.n), d.subgroup.codes, d.k, crossed)
    _, rss_c, rank_c = _type2(gc, ())
    gw = gram(d.y, np.ones(d.n), d.subgroup.codes, d.k, d.within) if inner else gc
    parts_w, rss_w, rank_w = _type2(gw, None, _children(d, d.within))
    sg_ss, sg_df = rss_b - rss_c, d.k - 1 - rank_b + rank_c
    names = " and ".join(f.name for f in d.between)
    sg_error = Error(
        sg_ss / sg_df if sg_df > 0 else float("nan"),
        sg_df,
        (f"subgroups within {names}" if names else "subgroups")
        if not d.single
        else "residual (single values)",
    )
    b_parts = dict(zip([f.name for f in d.between], parts_b, strict=True))
    for f in d.between:
        kids = [k for k in d.children(f.name) if k in b_parts]
        errors[f.name] = (
            _pooled([b_parts[k] for k in kids], " and ".join(kids)) if kids else sg_error
        )
    if within_df <= 0:
        for f in d.between:
            rows.append(_f_row(f.name, *b_parts[f.name], errors[f.name]))
        rows.append(_f_row("residual", sg_ss, sg_df, None))
        return _finish(rows, errors, notes)
    resid_df = within_df - rank_w
    inter = {f.name: _interaction(d, f, rss_w, resid_df) for f in crossed}
    inter = {name: part for name, part in inter.items() if part[1] > 0}
    res_ss = rss_w - sum(ss for ss, _ in inter.values())
    res_df = resid_df - sum(df for _, df in inter.values())
    res_name = "within cells" if d.within else "within subgroups"
    if res_df < 0 or res_ss < -1e-9 * max(rss_w, 1e-300):
        notes.append(
            "the subgroup x factor interactions overlap in this unbalanced layout, so they "
            "are not split: every within-subgroup factor is tested against everything left "
            "within subgroups (the interactions pooled), which can overstate its evidence."
        )
        inter, res_ss, res_df = {}, rss_w, resid_df
        res_name = "within subgroups (interactions pooled)"
    res_ss = max(res_ss, 0.0)
    alone = res_df == 0 and len(inter) == 1  # one value per cell: the interaction is all
    if alone:
        (name, (res_ss, res_df)), inter = next(iter(inter.items())), {}
        res_name = f"subgroup x {name} (residual)"
    residual = Error(res_ss / res_df if res_df > 0 else float("nan"), res_df, res_name)
    w_parts = dict(zip([f.name for f in d.within], parts_w, strict=True))
    for f in d.within:
        kids = [k for k in d.children(f.name) if k in w_parts]
        if kids:
            errors[f.name] = _pooled([w_parts[k] for k in kids], " and ".join(kids))
        elif f.name in inter:
            index = d.within.index(f)
            c_f, c_int = _interaction_coefficients(
                d, gw, index, w_parts[f.name][1], inter[f.name][1]
            )
            errors[f.name] = _within_error(
                f.name, inter[f.name], c_f / c_int, residual, res_ss, pool_above
            )
        elif f in crossed and not alone:
            errors[f.name] = Error(
                residual.ms, residual.df, f"{res_name} (no subgroup x {f.name} df)"
            )
        else:
            errors[f.name] = residual
    if inner:
        errors["subgroup"] = _pooled(
            [w_parts[f.name] for f in inner],
            " and ".join(f.name for f in inner) + " (nested in the subgroups)",
        )
    elif inter and not any("pooled with" in errors[n].name for n in inter):
        errors["subgroup"] = _pooled(list(inter.values()), " and ".join(
            f"subgroup x {n}" for n in inter
        ))  # fmt: skip
    else:
        errors["subgroup"] = residual
    for f in d.between:
        rows.append(_f_row(f.name, *b_parts[f.name], errors[f.name]))
    rows.append(_f_row("subgroup", sg_ss, sg_df, errors["subgroup"]))
    for f in d.within:
        rows.append(_f_row(f.name, *w_parts[f.name], errors[f.name]))
    for name, (ss, df) in inter.items():
        errors[f"subgroup x {name}"] = residual
        rows.append(_f_row(f"subgroup x {name}", ss, df, residual))
    rows.append(_f_row("residual", res_ss, res_df, None))
    return _finish(rows, errors, notes)


def _finish(rows: list[dict], errors: dict[str, Error], notes: list[str]) -> Anova:
    """The table without rows that have no degrees of freedom, and a note on each."""
    kept = []
    for row in rows:
        if row["source"] != "residual" and not row["df"] > 0:
            notes.append(
                f"{row['source']!r} has no degrees of freedom left after the other terms "
                "(its levels are fixed by them), so it is not tested and not shown."
            )
            errors.pop(row["source"], None)
            continue
        kept.append(row)
    untested = [
        r["source"] for r in kept if r["source"] in errors and not errors[r["source"]].df > 0
    ]
    if untested:
        notes.append(
            f"no degrees of freedom are left for the error term of {', '.join(untested)} "
            "(the factors have about one value per level): those F tests and variance "
            "components are undefined (NaN); collect repeats within the levels."
        )
    return Anova(pd.DataFrame(kept, columns=ANOVA_COLUMNS), errors, tuple(notes))

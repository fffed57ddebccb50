"""Measurement offsets: how far each level of a sampling/measurement factor reads off, the
process held fixed, and the values with those offsets taken off.

Checked against statsmodels OLS with ``C(factor, Sum)`` coding (tests/test_variation.py).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.variation.anova import Error, Gram, anova_table, coding, gram, solve
from qcexplore.stats.variation.factors import Factor
from qcexplore.stats.variation.structure import Design, design

OFFSET_COLUMNS = ["factor", "level", "offset", "se", "lower", "upper", "p", "note"]


def sum_coded_effects(
    g: Gram,
    factors: list[Factor],
    keep: list[int],
    resid_df: float,
    level: float,
    errors: Mapping[str, Error],
) -> list[dict]:
    """Sum-coded effects of the factors ``keep``; each factor's standard errors come from the
    error term its F test uses (``errors``; the model's residual when absent)."""
    t = coding(g.sizes, list(range(len(g.sizes))), "sum")
    coef, rss, rank, inv = solve(g, t)
    df_model = resid_df - rank
    rows = []
    col = 0
    for index, f in enumerate(factors):
        width = f.n_levels - 1 if f.n_levels > 1 else 0
        error = errors.get(f.name)
        sigma2, df = (
            (error.ms, error.df)
            if error is not None
            else (rss / df_model if df_model > 0 else float("nan"), df_model)
        )
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


def confounding_notes(d: Design, measured_by: Sequence[str]) -> dict[str, str]:
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


def offsets_table(
    d: Design,
    measured_by: Sequence[str],
    level: float,
    errors: Mapping[str, Error],
    periods: Sequence[Factor] = (),
) -> pd.DataFrame:
    """The offsets of the measured_by factors of design ``d`` (see :func:`measurement_offsets`);
    ``errors``: the error term of each within-subgroup factor's test (``anova_table``);
    ``periods``: two-level factors per subgroup (before/after a point in time) that the
    between-subgroup offsets are adjusted for."""
    between = [*d.between, *periods]
    sides = (  # between subgroups: on the subgroup means; within: the subgroup as a block
        (between, lambda: gram(d.means, d.sizes.astype(float), np.zeros(d.k, np.intp), 1,
                               between), d.k - 1),
        (d.within, lambda: gram(d.y, np.ones(d.n), d.subgroup.codes, d.k, d.within), d.n - d.k),
    )  # fmt: skip
    rows: list[dict] = []
    within = {f.name: errors[f.name] for f in d.within if f.name in errors}
    for factors, fitted, resid_df in sides:
        keep = [i for i, f in enumerate(factors) if f.name in measured_by]
        if keep:
            own = within if factors is d.within else {}  # between: the model's residual
            rows += sum_coded_effects(fitted(), factors, keep, resid_df, level, own)
    table = pd.DataFrame(rows, columns=OFFSET_COLUMNS[:-1])
    notes = confounding_notes(d, measured_by)
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
    the t test of a zero offset; for a factor inside the subgroups they rest on the error
    term of its F test (the subgroup x factor interaction, see ``variation``), so repeated
    values in a subgroup x level cell do not narrow them. The measured_by factors enter the
    joint model first, so a factor confounded with one of them is left out; the offsets
    then carry both effects and ``note`` says so (it is empty otherwise).

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
    d = offsets_design(frame, value, subgroup, measured_by, factors)
    return offsets_table(d, measured_by, level, anova_table(d).errors)


def offsets_design(
    frame: pd.DataFrame,
    value: str,
    subgroup: str,
    measured_by: Sequence[str],
    factors: Sequence[str],
    reuse: Design | None = None,
    nested: Mapping[str, str] | None = None,
) -> Design:
    """The design with the measured_by factors first (``reuse`` when it already keeps all
    of them)."""
    if reuse is not None:
        kept = {f.name for f in [*reuse.between, *reuse.within]}
        if all(m in kept for m in measured_by):
            return reuse
    order = list(dict.fromkeys([*measured_by, *factors]))
    return design(frame, value, subgroup, order, nested)


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

"""Nested factors: the ones the design nests, and labels that are probably nested.

A factor is nested in another when each of its levels belongs to one level of the other (a
cask to one batch). Plants often label such levels by position, a, b and c in every batch,
so the labels look crossed with the batch although cask a of one batch has nothing to do
with cask a of the next. The data then show a tell-tale pattern: no main effect of the
labels, and a large subgroup x label interaction (the cask-to-cask variation inside each
batch). The same numbers would come from a crossed factor whose effect changes from subgroup
to subgroup; the data cannot tell the two readings apart, so the check says "probably" and
offers the nested reading (``variation(..., nested={factor: subgroup})``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.stats.variation.anova import Anova
from qcexplore.stats.variation.factors import Factor, crosstab
from qcexplore.stats.variation.structure import Design

NESTING_COLUMNS = [
    "factor", "parent", "kind", "main_variance", "interaction_variance", "residual_variance",
    "p_interaction", "note",
]  # fmt: skip
#: The subgroup x label interaction counts as large when its test against the within-cell
#: error has a p-value below this and its variance is at least the within-cell variance.
NESTED_P = 0.001
#: ... and the labels show no main effect when its variance is below this share of the
#: interaction's (for nested labels the expected main effect is zero).
NESTED_MAIN_SHARE = 0.25
#: Each label must occur in at least this share of the subgroups to look crossed.
NESTED_COVERAGE = 0.8
_SHOWN = 4


def _given_rows(d: Design) -> list[dict[str, object]]:
    rows = []
    for child, parent in d.nested.items():
        where = "the subgroups" if parent == d.subgroup.name else repr(parent)
        rows.append(
            {
                "factor": child, "parent": parent, "kind": "nested",
                "main_variance": np.nan, "interaction_variance": np.nan,
                "residual_variance": np.nan, "p_interaction": np.nan,
                "note": (
                    f"{child!r} is nested in {where}: each of its levels belongs to one level "
                    f"of {parent!r}; it is estimated as a variance component nested in "
                    f"{where}, and {'the subgroup' if parent == d.subgroup.name else parent!r}"
                    f" is tested against it."
                ),
            }
        )  # fmt: skip
    return rows


def _suspect_row(d: Design, f: Factor, anova: Anova) -> dict[str, object] | None:
    table = anova.table.set_index("source")
    name = f"subgroup x {f.name}"
    if name not in table.index or f.name not in table.index or "residual" not in table.index:
        return None
    present = crosstab(d.subgroup, f) > 0
    coverage = float(present.mean(axis=0).min())
    ms, df = table["ms"].astype(float), table["df"].astype(float)
    ms_f, ms_int, ms_res = (float(ms[s]) for s in (f.name, name, "residual"))
    df_int, df_res = float(df[name]), float(df["residual"])
    if not (coverage >= NESTED_COVERAGE and df_res > 0 and ms_res > 0):
        return None
    per_cell = d.n / present.sum()
    interaction = (ms_int - ms_res) / per_cell
    main = max((ms_f - ms_int) / (d.n / f.n_levels), 0.0)
    p = float(stats.f.sf(ms_int / ms_res, df_int, df_res))
    if not (p < NESTED_P and interaction >= ms_res and main < NESTED_MAIN_SHARE * interaction):
        return None
    labels = ", ".join(str(v) for v in f.levels[:_SHOWN]) + (", ..." if f.n_levels > _SHOWN else "")
    sg = d.subgroup.name
    note = (
        f"the labels of {f.name!r} ({labels}) occur in at least {coverage:.0%} of the "
        f"subgroups, yet {f.name!r} shows no main effect (variance {main:.3g}) while the "
        f"subgroup x {f.name} interaction is large (variance {interaction:.3g} against "
        f"{ms_res:.3g} within cells, p = {p:.2g}): the labels are probably nested, the same "
        f"names for different things in each subgroup (as casks a, b, c of every batch). The "
        "data cannot tell that from a crossed factor whose effect changes from subgroup to "
        f"subgroup. If they are nested, give nested={{{f.name!r}: {sg!r}}} (or relabel them "
        f"{sg}/{f.name}) to estimate them as a component nested in the subgroups."
    )
    return {
        "factor": f.name, "parent": sg, "kind": "probably_nested", "main_variance": main,
        "interaction_variance": interaction, "residual_variance": ms_res,
        "p_interaction": p, "note": note,
    }  # fmt: skip


def nesting_table(d: Design, anova: Anova) -> pd.DataFrame:
    """One row per nested factor (``kind == "nested"``: given, or levels that each lie in
    one subgroup) and per factor whose labels are probably nested (``"probably_nested"``:
    the rule of the module notes, with its numbers)."""
    rows = _given_rows(d)
    for f in d.within:
        if f.name in d.nested:
            continue
        row = _suspect_row(d, f, anova)
        if row is not None:
            rows.append(row)
    return pd.DataFrame(rows, columns=NESTING_COLUMNS)

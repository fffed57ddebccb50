"""How the factors sit in the design: against the subgroups, and against each other.

A factor that changes inside a subgroup (a nozzle, a position) is crossed with time; one that
is constant inside each subgroup (the crew on shift, the raw-material lot) can only be compared
through subgroup means; two factors whose levels fix each other cannot be separated at all.
:func:`design` turns that into the model the other parts fit, and says what it leaves out.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from qcexplore.data.validate import require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import constant_within, group_moments
from qcexplore.stats.variation.factors import Factor, crosstab, factor, prepare

#: Goodman-Kruskal lambda at or above which one factor is taken to fix another.
CONFOUNDING_THRESHOLD = 0.95

_STRUCTURE_COLUMNS = ["factor", "relation", "with_", "note", "association"]
#: Level pairs shown in the note on two confounded factors.
_PAIRS_SHOWN = 6


def association(table: np.ndarray) -> tuple[float, float, float]:
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


def _subgroup_relation(
    f: Factor, subgroup: Factor, single: bool
) -> tuple[str, str, np.ndarray | None]:
    """The relation of one factor to the subgroups, its note, and its level per subgroup
    (None when it varies inside subgroups)."""
    first = constant_within(f.codes, subgroup.codes, subgroup.n_levels)
    if not np.all(first >= 0):
        share = float(np.mean(first < 0))
        note = f"varies inside {share:.0%} of subgroups; the subgroup is used as a block"
        if nested_in_subgroups(f, subgroup):
            note += (
                "; each of its levels occurs in one subgroup only, so it is nested in the "
                "subgroups (estimated as a nested component)"
            )
        return "within_subgroup", note, None
    if single:
        return "between_subgroups", "single values: each value is its own subgroup", first
    if np.bincount(first, minlength=f.n_levels).max() <= 1:
        note = (
            "every level is a single subgroup: the factor and the subgroup are the "
            "same thing, so its effect is the subgroup-to-subgroup variation"
        )
        return "confounded", note, first
    return (
        "between_subgroups",
        "constant inside each subgroup; compared through subgroup means",
        first,
    )


def nested_in_subgroups(f: Factor, subgroup: Factor) -> bool:
    """Whether ``f`` changes inside subgroups while each of its levels lies in one subgroup."""
    home = constant_within(subgroup.codes, f.codes, f.n_levels)
    inside = constant_within(f.codes, subgroup.codes, subgroup.n_levels)
    return bool(np.all(home >= 0) and np.any(inside < 0))


def _confounded_pair_rows(a: Factor, b: Factor, threshold: float) -> list[dict[str, object]]:
    """Two rows, one per factor, when the levels of one fix those of the other; else none."""
    table = crosstab(a, b)
    v, a_fixes_b, b_fixes_a = association(table)
    if not (a_fixes_b >= threshold or b_fixes_a >= threshold):
        return []
    pairs = [
        f"{a.levels[r]}->{b.levels[c]}"
        for r, c in enumerate(table.argmax(axis=1))
        if table[r].sum() > 0
    ]
    shown = ", ".join(pairs[:_PAIRS_SHOWN]) + (", ..." if len(pairs) > _PAIRS_SHOWN else "")
    return [
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
        for x, other, fx, fo in ((a, b, b_fixes_a, a_fixes_b), (b, a, a_fixes_b, b_fixes_a))
    ]


def _nested_note(name: str, nested: Mapping[str, str]) -> str:
    if name not in nested:
        return ""
    parent = nested[name]
    return f"; nested in {parent!r}: its labels are read per level of {parent!r} ({parent}/{name})"


def structure_rows(
    subgroup: Factor,
    factors: list[Factor],
    threshold: float,
    nested: Mapping[str, str] | None = None,
) -> tuple[pd.DataFrame, dict[str, str], dict[str, np.ndarray]]:
    """Structure table, relation of each factor, and per-subgroup level codes of the
    factors that are constant within subgroups. A factor ``nested`` in another (child ->
    parent) fixes its parent by construction: that pair is not reported as confounded."""
    nested = dict(nested or {})
    single = bool(np.all(np.bincount(subgroup.codes, minlength=subgroup.n_levels) == 1))
    rows: list[dict[str, object]] = []
    relation: dict[str, str] = {}
    per_subgroup: dict[str, np.ndarray] = {}
    for f in factors:
        relation[f.name], note, first = _subgroup_relation(f, subgroup, single)
        if first is not None:
            per_subgroup[f.name] = first
        rows.append(
            {
                "factor": f.name,
                "relation": relation[f.name],
                "with_": subgroup.name,
                "note": note + _nested_note(f.name, nested),
                "association": float("nan"),
            }
        )
    for i, a in enumerate(factors):
        for b in factors[i + 1 :]:
            if nested.get(a.name) == b.name or nested.get(b.name) == a.name:
                continue
            rows += _confounded_pair_rows(a, b, threshold)
    return pd.DataFrame(rows, columns=_STRUCTURE_COLUMNS), relation, per_subgroup


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
    sg = factor(frame, subgroup, "subgroup")
    table, _, _ = structure_rows(sg, [factor(frame, f) for f in factors], threshold)
    return table


@dataclass(frozen=True)
class Design:
    """The model the analyses fit: values, subgroups, and the factors kept on each side."""

    y: np.ndarray
    subgroup: Factor
    sizes: np.ndarray  # rows per subgroup
    means: np.ndarray  # per subgroup
    between: list[Factor]  # factors constant within subgroups, codes per subgroup
    within: list[Factor]  # factors varying within subgroups, codes per row
    factors: list[Factor]  # every factor asked for, codes per row
    structure: pd.DataFrame
    notes: tuple[str, ...]
    #: child -> parent: factors nested in another factor or (parent = the subgroup column)
    #: in the subgroups, estimated hierarchically (a parent is not adjusted for its children
    #: and is tested against them)
    nested: dict[str, str] = field(default_factory=dict)

    @property
    def n(self) -> int:
        return self.y.size

    @property
    def k(self) -> int:
        return self.subgroup.n_levels

    @property
    def single(self) -> bool:
        return bool(np.all(self.sizes == 1))

    def children(self, name: str) -> list[str]:
        """The factors nested in ``name`` (the subgroup's column name for the subgroups)."""
        return [child for child, parent in self.nested.items() if parent == name]


def _left_out(
    fs: list[Factor], structure: pd.DataFrame, relation: dict[str, str]
) -> tuple[set[str], list[str]]:
    """The factors the joint model cannot hold, and a note on each."""
    notes: list[str] = []
    dropped: set[str] = set()
    order = [f.name for f in fs]
    for row in structure[structure["relation"] == "confounded"].itertuples():
        name, other = str(row.factor), str(row.with_)
        if other not in order or name in dropped or other in dropped:
            continue  # confounded with the subgroup itself: handled below
        later = max(name, other, key=order.index)
        earlier = min(name, other, key=order.index)
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
    return dropped, notes


def _nested_factors(fs: list[Factor], subgroup: Factor, nested: Mapping[str, str]) -> list[Factor]:
    """The factors with each nested child relabelled per level of its parent (parent/child)."""
    by_name = {f.name: f for f in fs}
    for child, parent in nested.items():
        if child not in by_name or (parent not in by_name and parent != subgroup.name):
            raise QCDataError(
                f"nested={{{child!r}: {parent!r}}}: name a factor and the factor (or the "
                f"subgroup column {subgroup.name!r}) it is nested in; factors are "
                f"{list(by_name)}."
            )
        if parent == child or parent in nested:
            raise QCDataError(
                f"nested={{{child!r}: {parent!r}}}: a factor is nested in another one, one "
                "level deep; relabel deeper hierarchies into one column first."
            )
    out = []
    for f in fs:
        if f.name not in nested:
            out.append(f)
            continue
        home = by_name.get(nested[f.name], subgroup)
        pair = home.codes.astype(np.int64) * f.n_levels + f.codes
        kept, codes = np.unique(pair, return_inverse=True)
        labels = [f"{home.levels[c // f.n_levels]}/{f.levels[c % f.n_levels]}" for c in kept]
        out.append(Factor(f.name, codes.astype(np.intp), pd.Index(labels)))
    return out


def design(
    frame: pd.DataFrame,
    value: str,
    subgroup: str,
    factors: Sequence[str],
    nested: Mapping[str, str] | None = None,
) -> Design:
    """The design of ``value`` by ``subgroup`` and ``factors``; the first of two confounded
    factors is kept. ``nested`` (child -> parent) relabels each child per level of its
    parent; a factor that changes inside subgroups while each of its levels lies in one
    subgroup is nested in the subgroups without being asked."""
    y, sg, fs = prepare(frame, value, subgroup, factors)
    nested = dict(nested or {})
    fs = _nested_factors(fs, sg, nested)
    structure, relation, per_subgroup = structure_rows(sg, fs, CONFOUNDING_THRESHOLD, nested)
    dropped, notes = _left_out(fs, structure, relation)
    m = group_moments(y, sg.codes, sg.n_levels)
    between = [
        Factor(f.name, per_subgroup[f.name], f.levels)
        for f in fs
        if relation[f.name] == "between_subgroups" and f.name not in dropped
    ]
    within = [f for f in fs if relation[f.name] == "within_subgroup" and f.name not in dropped]
    kept = {f.name for f in [*between, *within]}
    nested = {c: p for c, p in nested.items() if c in kept and (p in kept or p == sg.name)}
    for f in within:
        if f.name not in nested and nested_in_subgroups(f, sg):
            nested[f.name] = sg.name
    return Design(y, sg, m.n, m.mean, between, within, fs, structure, tuple(notes), nested)

"""Factor levels against time: can a level's effect be told from a change in the process?

A level that is present in only part of the record (a crew that joins on the day the process
changes, a scale that is retired after a repair) sits on one side of a point in time. Its
offset, estimated on its own, then also holds any change of the process at that point, and
removing it before the step search takes the step out of the series. So every level of a
factor that is constant inside subgroups is set against each candidate change: the steps
found in the series and the points where a level starts or stops appearing. A factor that
changes inside subgroups is compared within subgroups, where a change of the process
average cancels, and needs no such check.

For each level that lies (almost) wholly on one side of a change, the factor's offsets are
estimated together with a step there (weighted least squares on the subgroup means, sum-to-
zero coding, the subgroup-to-subgroup variation as error). How far the two can be told apart
is the share of the step indicator that the factor's levels explain, R^2 (weighted by size):
at or above ``TIME_CONFOUNDED_R2`` (a variance inflation of 10, the usual alarm; common
practice) the level and the change cannot be told apart.

Checked against statsmodels WLS of the subgroup means on the factor and the step indicator
(tests/test_honesty.py).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from qcexplore.stats.variation.anova import anova_table, gram
from qcexplore.stats.variation.factors import Factor
from qcexplore.stats.variation.offsets import (
    OFFSET_COLUMNS,
    offsets_design,
    offsets_table,
    sum_coded_effects,
)
from qcexplore.stats.variation.structure import Design, design

#: R^2 of the step indicator on a factor's levels at or above which the two cannot be told
#: apart (variance inflation 1 / (1 - R^2) of 10).
TIME_CONFOUNDED_R2 = 0.9
#: A level lies on one side of a change when at least this share of its rows does.
ONE_SIDED = 0.95
#: A level starts late (ends early) when it is absent from at least this share of the
#: subgroups at the start (end) of the record.
ABSENT_SHARE = 0.1

TIME_COLUMNS = [
    "factor", "level", "position", "subgroup", "start", "source", "share_after", "r2",
    "offset_alone", "offset_joint", "offset_joint_se", "step_joint", "step_joint_se",
    "p_step_joint", "confounded",
]  # fmt: skip


def _changes(codes: np.ndarray, level: int, steps: Sequence[int]) -> list[tuple[int, str]]:
    """Candidate changes for one level: (position of the first subgroup after it, source)."""
    k = codes.size
    where = np.flatnonzero(codes == level)
    out = [(int(p), "step") for p in steps if 0 < p < k]
    if where[0] >= ABSENT_SHARE * k:
        out.append((int(where[0]), "level_starts"))
    if where[-1] < (1.0 - ABSENT_SHARE) * k - 1:
        out.append((int(where[-1]) + 1, "level_ends"))
    return list(dict.fromkeys(out))


def _r2(target: np.ndarray, codes: np.ndarray, n_levels: int, w: np.ndarray) -> float:
    """Weighted R^2 of ``target`` on the levels ``codes`` (level means as the fit)."""
    total = np.bincount(codes, weights=w, minlength=n_levels)
    with np.errstate(invalid="ignore", divide="ignore"):
        fitted = (np.bincount(codes, weights=w * target, minlength=n_levels) / total)[codes]
    mean = np.sum(w * target) / w.sum()
    ss = np.sum(w * (target - mean) ** 2)
    return float(np.sum(w * (fitted - mean) ** 2) / ss) if ss > 0 else float("nan")


def _period(position: int, k: int) -> Factor:
    after = (np.arange(k) >= position).astype(np.intp)
    return Factor(f"period@{position}", after, pd.Index(["before", "after"]))


def _rows_of(d: Design, f: Factor, steps: Sequence[int], level: float) -> list[dict]:
    k, means, w = d.k, d.means, d.sizes.astype(float)
    alone = _effects(means, w, [f], level)
    rows = []
    for lev in range(f.n_levels):
        for position, source in _changes(f.codes, lev, steps):
            mine = f.codes == lev
            after = np.arange(k) >= position
            share = float(np.sum(w[mine & after]) / np.sum(w[mine]))
            if ONE_SIDED > share > 1.0 - ONE_SIDED:
                continue
            period = _period(position, k)
            r2 = _r2(after.astype(float), f.codes, f.n_levels, w)
            joint = _effects(means, w, [f, period], level)
            step = joint[f.n_levels + 1]  # the "after" effect: half the step
            rows.append(
                {
                    "factor": f.name, "level": str(f.levels[lev]), "position": position,
                    "subgroup": d.subgroup.levels[position], "source": source,
                    "share_after": share, "r2": r2,
                    "offset_alone": alone[lev]["offset"],
                    "offset_joint": joint[lev]["offset"], "offset_joint_se": joint[lev]["se"],
                    "step_joint": 2.0 * step["offset"], "step_joint_se": 2.0 * step["se"],
                    "p_step_joint": step["p"], "confounded": bool(r2 >= TIME_CONFOUNDED_R2),
                }
            )  # fmt: skip
    return rows


def _effects(means: np.ndarray, w: np.ndarray, fs: list[Factor], level: float) -> list[dict]:
    """Sum-coded effects of every level of ``fs`` on the subgroup means (weights ``w``)."""
    g = gram(means, w, np.zeros(means.size, np.intp), 1, fs)
    return sum_coded_effects(g, fs, list(range(len(fs))), means.size - 1, level, {})


def time_confounding(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    factors: Sequence[str],
    time: str | None = None,
    steps: Sequence[int] = (),
    level: float = 0.95,
) -> pd.DataFrame:
    """Each level of the factors constant inside subgroups against the changes in time.

    ``steps``: positions (0-based, the first subgroup after the change) of the steps found
    in the series; the points where a level starts (``"level_starts"``) or stops
    (``"level_ends"``) appearing are added. One row per level and change where the level's
    rows lie on one side (``share_after``, the share of its rows after the change, at least
    ``ONE_SIDED`` or at most 1 - ``ONE_SIDED``): ``factor, level, position, subgroup,
    start`` (the first time of that subgroup, when ``time`` is given), ``source``, ``r2``
    (of the step indicator on the factor's levels, weighted by size), ``offset_alone`` (the
    level's sum-coded offset on its own), ``offset_joint`` and ``offset_joint_se`` (with a
    step there), ``step_joint``, ``step_joint_se`` and ``p_step_joint`` (the step in the
    same fit, after minus before), ``confounded`` (r2 >= ``TIME_CONFOUNDED_R2``: the level
    and a change at that time cannot be told apart).

    Examples
    --------
    >>> day = np.repeat(np.arange(20), 2)
    >>> crew = np.where(np.arange(20) < 10, np.tile(["a", "b"], 10), "c")[day]
    >>> f = pd.DataFrame({"day": pd.Categorical(day, ordered=True), "crew": crew,
    ...                   "w": np.where(day >= 10, 1.0, 0.0) + 0.01 * (day % 3)})
    >>> t = time_confounding(f, value="w", subgroup="day", factors=["crew"])
    >>> c = t[t["level"] == "c"].iloc[0]
    >>> c["source"], int(c["position"]), round(float(c["r2"]), 3), bool(c["confounded"])
    ('level_starts', 10, 1.0, True)
    """
    d = design(frame, value, subgroup, factors)
    rows = []
    for f in d.between:
        rows += _rows_of(d, f, steps, level)
    table = pd.DataFrame(rows, columns=[c for c in TIME_COLUMNS if c != "start"])
    starts = None
    if time is not None and len(table):
        first = frame.groupby(subgroup, observed=True, sort=False)[time].min()
        starts = first.reindex(table["subgroup"]).to_numpy()
    table.insert(4, "start", pd.Series(starts if starts is not None else pd.NaT, index=table.index))
    return table.astype({"confounded": bool})


def step_safe_offsets(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    measured_by: Sequence[str],
    factors: Sequence[str] = (),
    level: float = 0.95,
) -> tuple[pd.DataFrame, tuple[str, ...]]:
    """The measured_by offsets that may be removed before a search for steps, and notes.

    A measured_by factor constant inside subgroups whose levels start or stop appearing
    part-way (see :func:`time_confounding`) has its offsets estimated together with a step
    at each of those points, so that a change of the process there stays in the series; a
    factor with a level that cannot be told apart from such a change keeps no offsets at
    all (nothing of it is removed), and a note says so. Other offsets are those of
    ``measurement_offsets``.

    Examples
    --------
    >>> f = pd.DataFrame({"hour": pd.Categorical(np.repeat(np.arange(6), 2), ordered=True),
    ...                   "crew": list("ab" * 6), "w": [10.0, 11.0] * 6})
    >>> o, notes = step_safe_offsets(f, value="w", subgroup="hour", measured_by=["crew"])
    >>> o["offset"].tolist(), notes
    ([-0.5, 0.5], ())
    """
    d = offsets_design(frame, value, subgroup, measured_by, factors)
    timing = time_confounding(frame, value=value, subgroup=subgroup, factors=measured_by)
    timing = timing[timing["source"] != "step"]
    blocked = sorted(set(timing.loc[timing["confounded"], "factor"]))
    periods = [_period(int(p), d.k) for p in sorted(set(timing["position"]))]
    offsets = offsets_table(d, measured_by, level, anova_table(d).errors, periods)
    offsets = offsets[~offsets["factor"].isin(blocked)].reset_index(drop=True)
    notes = tuple(
        f"the offsets of {name!r} are not removed before the step search: its level "
        f"{', '.join(timing.loc[timing['factor'] == name, 'level'].unique())} cannot be told "
        "apart from a change of the process when it starts or stops appearing."
        for name in blocked
    )
    if periods and set(timing["factor"]) - set(blocked):
        notes += (
            "offsets of levels present in only part of the record are estimated together "
            "with a step where they start or stop, so a change of the process there stays "
            "in the series.",
        )
    return offsets.reindex(columns=OFFSET_COLUMNS), notes

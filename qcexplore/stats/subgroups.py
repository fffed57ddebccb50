"""Per-group sufficient statistics, computed once and vectorised.

Almost every number in qcexplore reduces to counts, means, sums of squared
deviations, minima and maxima over groups (subgroups, or subgroup x stratum
cells). They are computed here with ``np.bincount`` and ``np.*.reduceat`` over
integer group codes, never with a Python loop over groups.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.coding import category_codes
from qcexplore.data.validate import require_columns, row_list
from qcexplore.errors import QCDataError


def group_codes(frame: pd.DataFrame, column: str, role: str) -> tuple[np.ndarray, pd.Index]:
    """Group codes ``0 .. k - 1`` and the ``k`` labels of a column: the input of every group
    statistic.

    Coded by :func:`qcexplore.data.coding.category_codes` (a categorical keeps its level
    order, so subgroups stay in time order; other columns in order of first appearance);
    levels that no row uses are left out, so every group has rows. A missing label is
    refused with a QCDataError naming ``role``, the column and the first rows.

    Examples
    --------
    >>> f = pd.DataFrame({"crew": pd.Categorical(["b", "b"], categories=["a", "b"])})
    >>> codes, levels = group_codes(f, "crew", "factor")
    >>> codes.tolist(), list(levels)
    ([0, 0], ['b'])
    """
    require_columns(frame, [column], role)
    codes, levels = category_codes(frame[column])
    missing = np.flatnonzero(codes < 0)
    if missing.size:
        raise QCDataError(
            f"{role}={column!r}: missing labels in {row_list(missing)}; fill or drop those "
            "rows first."
        )
    present = np.bincount(codes, minlength=len(levels)) > 0
    if present.all():
        return codes, levels
    return (np.cumsum(present) - 1)[codes], levels[present]


def constant_within(codes: np.ndarray, groups: np.ndarray, n_groups: int) -> np.ndarray:
    """Per group: the code that all its rows share, or -1 where the rows differ.

    Examples
    --------
    >>> constant_within(np.array([3, 3, 1, 2]), np.array([0, 0, 1, 1]), 2).tolist()
    [3, -1]
    """
    first = np.full(n_groups, -1, dtype=np.intp)
    first[groups[::-1]] = codes[::-1]
    varies = np.zeros(n_groups, dtype=bool)
    varies[groups[codes != first[groups]]] = True
    first[varies] = -1
    return first


@dataclass(frozen=True, eq=False)
class GroupMoments:
    """Counts, means, sums of squared deviations, minima and maxima per group.

    Groups with no values have ``n == 0`` and NaN for every other statistic.
    """

    n: np.ndarray
    mean: np.ndarray
    ss: np.ndarray
    min: np.ndarray
    max: np.ndarray

    @property
    def var(self) -> np.ndarray:
        """Sample variance (ddof=1); NaN where a group has fewer than two values."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.n > 1, self.ss / (self.n - 1), np.nan)

    @property
    def sd(self) -> np.ndarray:
        """Sample standard deviation (ddof=1); NaN where a group has fewer than two values."""
        return np.sqrt(self.var)

    @property
    def range(self) -> np.ndarray:
        """Largest minus smallest value of each group."""
        return self.max - self.min


#: Rows per block of squared deviations: a small temporary reused, not one row-length array
#: (fresh memory is what a pass over a million rows mostly costs).
_BLOCK_ROWS = 1 << 16


def _squared_deviations(
    values: np.ndarray, codes: np.ndarray, mean: np.ndarray, n_groups: int, in_order: bool
) -> np.ndarray:
    """Per group, the sum of squared deviations from its mean, added up in row order.

    With the codes in order the rows go in blocks that end where a group ends, so every
    group is summed in the same order, to the same bits, as by one ``np.bincount``.
    """
    if not in_order or values.size <= _BLOCK_ROWS:
        deviation = values - mean[codes]
        # float64 explicitly: bincount returns integers when there are no values at all.
        return np.bincount(codes, deviation * deviation, n_groups).astype(np.float64)
    ss = np.zeros(n_groups)
    start = 0
    while start < values.size:
        stop = int(
            np.searchsorted(codes, codes[min(start + _BLOCK_ROWS, values.size) - 1], "right")
        )
        block = codes[start:stop]
        first, last = int(block[0]), int(block[-1])
        deviation = values[start:stop] - mean[block]
        ss[first : last + 1] = np.bincount(block - first, deviation * deviation, last - first + 1)
        start = stop
    return ss


def group_moments(
    values: np.ndarray,
    codes: np.ndarray,
    n_groups: int | None = None,
    *,
    counts: np.ndarray | None = None,
) -> GroupMoments:
    """Sufficient statistics of ``values`` for each integer group code.

    Two passes keep the result exact to rounding when the values sit far from
    zero (a 1e9 offset gives the same spread): group means first, then the sum
    of squared deviations from each value's own group mean.

    Parameters
    ----------
    values : array of float, no NaN
    codes : array of int in ``0 .. n_groups - 1``, same length as ``values``
    n_groups : number of groups (default ``codes.max() + 1``)
    counts : the number of values of each group, when the caller has counted them already

    Checked against pandas ``groupby().agg(["count", "mean", "var", "min", "max"])``
    on random data (tests/test_subgroups.py).

    Examples
    --------
    >>> m = group_moments(np.array([1.0, 3.0, 10.0]), np.array([0, 0, 1]))
    >>> m.mean.tolist(), m.range.tolist()
    ([2.0, 10.0], [2.0, 0.0])
    """
    values = np.asarray(values, dtype=np.float64)
    codes = np.asarray(codes, dtype=np.intp)
    if n_groups is None:
        n_groups = int(codes.max()) + 1 if codes.size else 0
    n = np.bincount(codes, minlength=n_groups) if counts is None else counts
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(codes, weights=values, minlength=n_groups) / n
    in_order = codes.size < 2 or not np.any(codes[1:] < codes[:-1])
    ss = _squared_deviations(values, codes, mean, n_groups, in_order)
    ss[n == 0] = np.nan
    low = np.full(n_groups, np.nan)
    high = np.full(n_groups, np.nan)
    if values.size:
        if not in_order:
            order = np.argsort(codes, kind="stable")
            codes, values = codes[order], values[order]
        # With the codes in order, each present group's rows start where the counts say.
        present = np.flatnonzero(n)
        starts = (np.cumsum(n) - n)[present]
        low[present] = np.minimum.reduceat(values, starts)
        high[present] = np.maximum.reduceat(values, starts)
    return GroupMoments(n=n, mean=mean, ss=ss, min=low, max=high)


def subgroup_table(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    factors: tuple[str, ...] = (),
) -> pd.DataFrame:
    """One row per subgroup: ``subgroup, n, mean, sd, range, start`` and constant factors.

    The subgroups are coded by :func:`group_codes` (a Categorical's category order is the
    time order; empty categories are dropped). A factor appears in the table only if it
    takes a single value (not a missing one) within every subgroup.

    Checked against pandas ``groupby`` (count, mean, std, max - min) in
    tests/test_subgroups.py and tests/test_study.py.

    Examples
    --------
    >>> f = pd.DataFrame({"day": pd.Categorical(["a", "a", "b"]), "w": [1.0, 2.0, 4.0]})
    >>> subgroup_table(f, value="w", subgroup="day")[["subgroup", "n", "mean"]]
      subgroup  n  mean
    0        a  2   1.5
    1        b  1   4.0
    """
    codes, categories = group_codes(frame, subgroup, "subgroup")
    k = len(categories)
    m = group_moments(frame[value].to_numpy(dtype=np.float64), codes, k)
    table = pd.DataFrame(
        {
            "subgroup": pd.Categorical.from_codes(
                np.arange(k), categories=categories, ordered=True
            ),
            "n": m.n,
            "mean": m.mean,
            "sd": m.sd,
            "range": m.range,
        }
    )
    if time is not None:
        table["start"] = frame[time].groupby(codes, sort=True).min().to_numpy()
    else:
        table["start"] = pd.NaT
    for factor in factors:
        if factor == subgroup:
            continue
        level_codes, levels = category_codes(frame[factor])
        shared = constant_within(level_codes, codes, k)
        if np.all(shared >= 0):
            table[factor] = pd.Categorical.from_codes(shared, categories=levels)
    return table

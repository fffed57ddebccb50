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


def group_moments(
    values: np.ndarray, codes: np.ndarray, n_groups: int | None = None
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
    n = np.bincount(codes, minlength=n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(codes, weights=values, minlength=n_groups) / n
    deviation = values - mean[codes]
    # float64 explicitly: bincount returns integers when there are no values at all.
    ss = np.bincount(codes, weights=deviation * deviation, minlength=n_groups).astype(np.float64)
    ss[n == 0] = np.nan
    low = np.full(n_groups, np.nan)
    high = np.full(n_groups, np.nan)
    if values.size:
        if codes.size > 1 and np.any(codes[1:] < codes[:-1]):
            order = np.argsort(codes, kind="stable")
            codes, values = codes[order], values[order]
        starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
        present = codes[starts]
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

    ``frame[subgroup]`` must be a Categorical whose category order is the time
    order; empty categories are dropped. A factor appears in the table only if it
    takes a single value within every subgroup.

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
    labels = frame[subgroup]
    codes = labels.cat.codes.to_numpy()
    categories = labels.cat.categories
    present = np.bincount(codes, minlength=len(categories)) > 0
    if not present.all():  # cheaper than remove_unused_categories, which sorts
        codes = (np.cumsum(present) - 1)[codes]
        categories = categories[present]
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
        level_codes = frame[factor].cat.codes.to_numpy().astype(np.int64)
        first = np.full(k, -1, dtype=np.int64)
        first[codes[::-1]] = level_codes[::-1]
        if np.all(level_codes == first[codes]):
            table[factor] = pd.Categorical.from_codes(
                first, categories=frame[factor].cat.categories
            )
    return table

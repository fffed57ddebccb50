"""The series whose change shape is fitted, taken from the study frame.

* :func:`stream_contrast`: one level of a factor (a nozzle, a crew) against the other
  levels, block by block: the level's mean minus the other levels' mean in the same
  block. The block is the subgroup when the factor varies inside subgroups (a nozzle in
  an hourly round of several nozzles): the difference then carries nothing that the
  subgroup shares, the wandering process level and the crew's scale included. A factor
  constant within subgroups (the crew of an hourly round) is compared within a coarser
  block of time that holds several of its levels (the day, when crews rotate by shift).
* :func:`subgroup_means`: the process, one mean per subgroup.
* :func:`level_share`: the level's share of each subgroup's values, which weighs how much
  of a stream's change reaches the subgroup means;
* :func:`explains`: whether a stream's fitted change accounts for a change of the process.

Blocks are in time order: by their first time when a time column is given, else in the
order of the block column (the Study's subgroup column is ordered in time).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.coding import category_codes
from qcexplore.data.validate import finite_array, finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.shape import ShapeFit, change_shape
from qcexplore.stats.subgroups import group_codes, group_moments


@dataclass(frozen=True, eq=False)
class Series:
    """One point per block in time order: ``values``, ``times`` (the block's first time, or
    its position among all blocks without a time column), ``weights`` (relative precision:
    the count of a mean, ``1 / (1/n_level + 1/n_other)`` of a difference) and the blocks'
    ``labels``."""

    values: np.ndarray
    times: np.ndarray
    weights: np.ndarray
    labels: pd.Index


def _blocks(
    frame: pd.DataFrame, block: str, time: str | None
) -> tuple[np.ndarray, pd.Index, np.ndarray]:
    """Block codes ``0..k-1`` in time order, the blocks' labels and their times."""
    codes, labels = group_codes(frame, block, "block")
    k = len(labels)
    if time is None:
        return codes, labels, np.arange(k)
    require_columns(frame, [time], "time")
    if pd.api.types.is_datetime64_any_dtype(frame[time].dtype):
        stamps = frame[time]
        if stamps.isna().any():
            first = int(np.flatnonzero(stamps.isna().to_numpy())[0]) + 1
            raise QCDataError(f"Column {time!r} given as time: missing times (row {first}).")
        starts = stamps.groupby(codes).min().to_numpy()
    else:
        starts = pd.Series(finite_column(frame, time, "time")).groupby(codes).min().to_numpy()
    order = np.argsort(starts, kind="stable")
    rank = np.empty(k, dtype=np.intp)
    rank[order] = np.arange(k)
    return rank[codes], labels[order], starts[order]


def _is_level(frame: pd.DataFrame, factor: str, level: object) -> np.ndarray:
    """Rows of the level, matched by its label as text (nozzle ``4`` and ``"4"`` agree)."""
    require_columns(frame, [factor], "factor")
    codes, labels = category_codes(frame[factor])
    match = np.flatnonzero(labels.astype(str) == str(level))
    if match.size == 0:
        shown = ", ".join(map(str, labels[:12]))
        raise QCDataError(f"Factor {factor!r} has no level {level!r}; its levels: {shown}.")
    return np.isin(codes, match)


def stream_contrast(
    frame: pd.DataFrame,
    *,
    value: str,
    factor: str,
    level: object,
    block: str,
    time: str | None = None,
) -> Series:
    """One level's mean minus the other levels' mean in each block holding both.

    Parameters
    ----------
    frame : the study frame
    value, factor : column names
    level : the level, matched by its label as text
    block : the subgroup column when the factor varies inside subgroups; else a column of
        coarser blocks of time that each hold several levels (for instance the day)
    time : the time column (the slope of a drift is then per day)

    Examples
    --------
    >>> f = pd.DataFrame({"sg": [1, 1, 2, 2], "noz": ["a", "b", "a", "b"],
    ...                   "g": [10.0, 9.0, 12.0, 10.0]})
    >>> stream_contrast(f, value="g", factor="noz", level="a", block="sg").values.tolist()
    [1.0, 2.0]
    """
    values = finite_column(frame, value, "value")
    codes, labels, times = _blocks(frame, block, time)
    k = len(labels)
    mine = _is_level(frame, factor, level)
    inside = group_moments(values[mine], codes[mine], k)
    outside = group_moments(values[~mine], codes[~mine], k)
    both = (inside.n > 0) & (outside.n > 0)
    if not both.any():
        raise QCDataError(
            f"Level {level!r} of {factor!r} never shares a {block!r} block with another "
            f"level; compare it within a coarser block of time (for instance the day)."
        )
    return Series(
        values=(inside.mean - outside.mean)[both],
        times=times[both],
        weights=1.0 / (1.0 / inside.n[both] + 1.0 / outside.n[both]),
        labels=labels[both],
    )


def subgroup_means(
    frame: pd.DataFrame, *, value: str, subgroup: str, time: str | None = None
) -> Series:
    """The process: the mean of each subgroup, weighted by its count.

    Examples
    --------
    >>> f = pd.DataFrame({"sg": [1, 1, 2], "g": [10.0, 12.0, 9.0]})
    >>> subgroup_means(f, value="g", subgroup="sg").values.tolist()
    [11.0, 9.0]
    """
    values = finite_column(frame, value, "value")
    codes, labels, times = _blocks(frame, subgroup, time)
    moments = group_moments(values, codes, len(labels))
    return Series(values=moments.mean, times=times, weights=moments.n.astype(float), labels=labels)


def level_share(
    frame: pd.DataFrame, *, subgroup: str, factor: str, level: object, time: str | None = None
) -> np.ndarray:
    """The level's share of each subgroup's values, in the order of :func:`subgroup_means`.

    Examples
    --------
    >>> f = pd.DataFrame({"sg": [1, 1, 2, 2], "noz": ["a", "b", "b", "b"]})
    >>> level_share(f, subgroup="sg", factor="noz", level="a").tolist()
    [0.5, 0.0]
    """
    codes, labels, _ = _blocks(frame, subgroup, time)
    mine = _is_level(frame, factor, level)
    k = len(labels)
    return np.bincount(codes[mine], minlength=k) / np.bincount(codes, minlength=k)


@dataclass(frozen=True, eq=False)
class Explanation:
    """Whether a stream's change accounts for the process's change.

    ``process`` is the process's own fit, ``remaining`` the same test on the subgroup means
    less ``removed`` (each subgroup's share of the stream times the stream's fitted
    difference at that subgroup's time). ``explained``: the process changed, and without
    the stream it does not.
    """

    process: ShapeFit
    remaining: ShapeFit
    removed: np.ndarray
    explained: bool


def explains(process: ShapeFit, stream: ShapeFit, share: object) -> Explanation:
    """Remove a stream's fitted difference from the subgroup means and test the process again.

    A subgroup mean is the other levels' mean plus the stream's share of the subgroup times
    the stream's difference from them, so subtracting ``share * difference`` leaves the
    process as if the stream ran like the others. A process step or drift that is gone
    after that is the stream's change seen in the averages, not a finding of its own.

    Parameters
    ----------
    process : ``change_shape(..., of="process")`` of the subgroup means
    stream : ``change_shape(...)`` of the stream's difference, on the same time axis
    share : the stream's share of each subgroup's values
        (:func:`qcexplore.stats.streams.level_share`)

    Examples
    --------
    >>> t = np.arange(90.0)
    >>> noise = np.random.default_rng(2).normal(0.0, 0.3, 90)
    >>> own = change_shape(np.maximum(0.0, t - 40.0) * 0.2 + noise, t)
    >>> means = change_shape(0.25 * np.maximum(0.0, t - 40.0) * 0.2 + noise / 4, t, of="process")
    >>> means.shape, explains(means, own, np.full(90, 0.25)).explained
    ('drift', True)
    """
    if process.of != "process" or stream.of != "stream":
        raise QCDataError(
            "explains: give the process fit (of='process') first, then the stream's fit."
        )
    timed = {fit.slope_unit == "day" for fit in (process, stream)}
    if len(timed) > 1 or "point" in (process.slope_unit, stream.slope_unit):
        raise QCDataError(
            "explains: fit the process and the stream on the same time axis (both with "
            "timestamps, or both with numeric times such as subgroup positions)."
        )
    weight = finite_array(share, "explains share")
    if weight.size != process.values.size or np.any((weight < 0) | (weight > 1)):
        raise QCDataError(
            f"explains: give {process.values.size} shares between 0 and 1, one per subgroup."
        )
    removed = weight * stream.value_at(process.times)
    remaining = change_shape(
        process.values - removed,
        process.times,
        process.weights,
        of="process",
        min_points=process.min_points,
    )
    removed.setflags(write=False)
    return Explanation(
        process=process,
        remaining=remaining,
        removed=removed,
        explained=process.changed and not remaining.changed,
    )

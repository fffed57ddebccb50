"""Where each row goes: the points of a chart, their segments, and per-segment reductions.

The rows are reduced once to points over integer point codes: the subgroups, or the subgroup
x stratum cells when a chart is split ``by`` a factor. A segment is one set of limits: the
whole chart, or each stratum with ``limits="per_stratum"``. Every estimate is a reduction
over segment codes with ``np.bincount``; nothing loops over points or subgroups.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.validate import require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import group_codes


@dataclass(frozen=True)
class Points:
    """Where each row goes: point codes and the segment (limit set) of each point."""

    row_point: np.ndarray  # per row: its point
    sub: np.ndarray  # per point: subgroup code
    strat: np.ndarray | None  # per point: stratum code (None without ``by``)
    seg: np.ndarray  # per point: segment code (stratum when per_stratum, else 0)
    n_seg: int
    sub_labels: pd.Index
    strat_labels: pd.Index | None

    @property
    def segments(self) -> np.ndarray | None:
        """Segment codes for the run rules: None when all points form one sequence."""
        return self.seg if self.n_seg > 1 else None


def point_codes(frame: pd.DataFrame, subgroup: str, by: str | None, per_stratum: bool) -> Points:
    """The points of a chart of ``subgroup`` (in time order), split ``by`` a factor."""
    sub_codes, sub_labels = group_codes(frame, subgroup, "subgroup")
    n_sub = len(sub_labels)
    if by is None:
        zeros = np.zeros(n_sub, np.intp)
        return Points(sub_codes, np.arange(n_sub), None, zeros, 1, sub_labels, None)
    strat_codes, strat_labels = group_codes(frame, by, "by")
    n_levels = len(strat_labels)
    cells, row_point = np.unique(sub_codes * n_levels + strat_codes, return_inverse=True)
    strat = cells % n_levels
    seg = strat if per_stratum else np.zeros(cells.size, np.intp)
    n_seg = n_levels if per_stratum else 1
    return Points(row_point, cells // n_levels, strat, seg, n_seg, sub_labels, strat_labels)


def per_size(func: Callable[[int], float], n: np.ndarray) -> np.ndarray:
    """``func(n_i)`` for every n_i >= 2 (NaN below), one call per distinct size."""
    n = np.asarray(n)
    if n.dtype.kind in "iu":  # counts of rows: already whole and finite
        whole = n.astype(np.int64, copy=False)
    else:
        whole = np.where(np.isfinite(n), n, 0).astype(np.int64)
    sizes = np.flatnonzero(np.bincount(np.maximum(whole, 0)))
    sizes = sizes[sizes >= 2]
    table = np.full(int(whole.max(initial=1)) + 1, np.nan)
    table[sizes] = [func(int(s)) for s in sizes]
    return table[whole]


def previous(seg: np.ndarray) -> np.ndarray:
    """Index of the previous point in the same segment (-1 for a segment's first point)."""
    if seg.size == 0 or not seg.any():
        return np.arange(seg.size, dtype=np.intp) - 1
    order = np.argsort(seg, kind="stable")
    ordered = seg[order]
    same = np.r_[False, ordered[1:] == ordered[:-1]]
    prev = np.full(seg.size, -1, dtype=np.intp)
    prev[order[same]] = order[np.flatnonzero(same) - 1]
    return prev


def moving_range(stat: np.ndarray, prev: np.ndarray) -> np.ndarray:
    out = np.full(stat.size, np.nan)
    has = prev >= 0
    out[has] = np.abs(stat[has] - stat[prev[has]])
    return out


def pair_used(used: np.ndarray, prev: np.ndarray) -> np.ndarray:
    """Moving ranges whose two points are both used for the estimate."""
    ok = used & (prev >= 0)
    ok[ok] &= used[prev[ok]]
    return ok


def seg_mean(terms: np.ndarray, weights: np.ndarray, seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Weighted mean of ``terms`` per segment (NaN where a segment has no weight)."""
    missing = np.isnan(terms)
    weights = np.where(missing, 0.0, weights)
    total = np.bincount(seg, weights, n_seg)
    # As np.nan_to_num (NaN to 0, infinities to the largest finite numbers), in two passes.
    big = np.finfo(np.float64).max
    finite = np.clip(np.where(missing, 0.0, terms), -big, big)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.bincount(seg, weights * finite, n_seg) / total


def typical(x: np.ndarray, seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Most frequent value per segment (the smallest among ties); NaN for an empty segment."""
    out = np.full(n_seg, np.nan)
    if x.size == 0:
        return out
    if np.all(x == np.round(x)) and 0 <= x.min() and (x.max() + 1) * n_seg <= 10 * x.size + 1000:
        top = int(x.max()) + 1  # small whole numbers (subgroup sizes): count them directly
        table = np.bincount(seg * top + x.astype(np.int64), minlength=n_seg * top)
        table = table.reshape(n_seg, top)
        has = table.any(axis=1)
        out[has] = table[has].argmax(axis=1)
        return out
    order = np.lexsort((x, seg))
    xs, ss = x[order], seg[order]
    starts = np.flatnonzero(np.r_[True, (xs[1:] != xs[:-1]) | (ss[1:] != ss[:-1])])
    runs = np.diff(np.r_[starts, xs.size])
    run_seg, run_x = ss[starts], xs[starts]
    pick = np.lexsort((run_x, -runs, run_seg))
    first = np.r_[True, run_seg[pick][1:] != run_seg[pick][:-1]]
    out[run_seg[pick][first]] = run_x[pick][first]
    return out


def typical_size(n: np.ndarray) -> float:
    """The most frequent of the sizes ``n`` over the whole chart."""
    return float(typical(n, np.zeros(n.size, np.intp), 1)[0])


def _stratum_name(points: Points, s: int) -> str:
    if points.strat_labels is None or points.n_seg == 1:
        return "the chart"
    return f"stratum {points.strat_labels[s]!r}"


def require(ok: np.ndarray, points: Points, what: str) -> None:
    """Raise, naming the segments where ``ok`` (one flag per segment) fails."""
    bad = np.flatnonzero(~np.asarray(ok))
    if bad.size:
        where = ", ".join(_stratum_name(points, int(s)) for s in bad[:5])
        raise QCDataError(f"{where}: {what}")


def by_segment(seg: np.ndarray, n_seg: int, func: Callable[..., tuple], *arrays: np.ndarray):
    """Apply ``func`` to each segment's points in order (a loop over strata, not points)."""
    if n_seg == 1:
        return func(*arrays)
    outs: tuple[np.ndarray, ...] = ()
    for s in range(n_seg):
        idx = np.flatnonzero(seg == s)
        if idx.size == 0:
            continue
        part = func(*(a[idx] for a in arrays))
        if not outs:
            outs = tuple(np.empty(seg.size, dtype=p.dtype) for p in part)
        for out, p in zip(outs, part, strict=True):
            out[idx] = p
    return outs


def exclude_mask(exclude: Sequence[Hashable], points: Points) -> tuple[np.ndarray, tuple]:
    """Which points the caller leaves out of the estimate, and their labels as given."""
    labels = [exclude] if isinstance(exclude, (str, bytes)) else list(exclude)
    if not labels:
        return np.zeros(points.sub.size, bool), ()
    codes = points.sub_labels.get_indexer(pd.Index(labels))
    unknown = [lab for lab, c in zip(labels, codes, strict=True) if c < 0]
    if unknown:
        raise QCDataError(
            f"exclude: unknown subgroup label(s) {unknown[:5]!r}; use labels of the subgroup "
            f"column, e.g. {list(points.sub_labels[:3])!r}."
        )
    chosen = np.zeros(len(points.sub_labels), bool)
    chosen[codes] = True
    return chosen[points.sub], tuple(labels)


def point_labels(mask: np.ndarray, points: Points) -> tuple:
    """Labels of the points in ``mask``: subgroups, or (subgroup, stratum) pairs with ``by``."""
    subs = points.sub_labels[points.sub[mask]].tolist()
    if points.strat is None or points.strat_labels is None:
        return tuple(subs)
    return tuple(zip(subs, points.strat_labels[points.strat[mask]].tolist(), strict=True))


def starts(frame: pd.DataFrame, time: str, points: Points) -> pd.Series:
    """The first time of each point's rows."""
    require_columns(frame, [time], "time")
    col = frame[time]
    if not (pd.api.types.is_datetime64_any_dtype(col) or pd.api.types.is_numeric_dtype(col)):
        raise QCDataError(f"time={time!r}: expected timestamps or numbers, got {col.dtype}.")
    return col.groupby(points.row_point, sort=True).min().reset_index(drop=True)

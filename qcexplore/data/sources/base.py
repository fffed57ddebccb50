"""What every Source answers, and the small frozen types its answers come in.

A Source is a table that stays where it lives (in memory, in files, in a database or on a
cluster). The Study asks it for the few reductions every analysis is made of: moments per
cell, levels, counts, histogram counts, a seeded sample and a few rows to look at. Each
engine computes them where the data are and sends back tables as small as the answer.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np
import pandas as pd

from qcexplore.data.coding import shorten as shown
from qcexplore.errors import QCDataError

#: The kinds of column a Source reports (the engine's own type names vary).
KINDS = ("number", "text", "time", "bool", "other")

#: The statistic columns of :attr:`CellMoments.cells`, after the grouping columns.
MOMENT_COLUMNS = ("n", "sum", "sumsq", "min", "max")


@dataclass(frozen=True)
class Between:
    """A half-open range for a filter: ``low <= x < high``; either end may be None (open).

    Examples
    --------
    >>> Between(1, None)
    Between(low=1, high=None)
    """

    low: Any = None
    high: Any = None


#: A filter: column -> one level (None: missing), a list of levels, or a Between. Entries
#: are ANDed. Values are passed to engines as parameters, never pasted into query text.
Where = Mapping[str, Any]


@dataclass(frozen=True, eq=False)
class CellMoments:
    """Moments of one value column per cell of a grouping, in the shifted form.

    ``cells`` holds the grouping columns, then ``n`` (finite values), ``sum`` (of
    ``x - centre``), ``sumsq`` (of ``(x - centre)**2``), ``min``, ``max`` and, when a time
    column was given, ``first`` (its smallest value). One ``centre`` per column keeps the
    sums of squares exact when values sit far from zero, and lets cells be added up
    exactly (:meth:`merge`). Cells without a finite value are absent. Rows are sorted by
    the grouping columns (missing labels last).

    Examples
    --------
    >>> cells = pd.DataFrame({"crew": ["a", "b"], "n": [2, 1], "sum": [1.0, 0.0],
    ...                       "sumsq": [1.0, 0.0], "min": [10.0, 10.0], "max": [11.0, 10.0]})
    >>> m = CellMoments(value="w", by=("crew",), centre=10.0, cells=cells)
    >>> m.mean.tolist(), m.ss.tolist()
    ([10.5, 10.0], [0.5, 0.0])
    >>> m.merge(()).mean.tolist()
    [10.333333333333334]
    """

    value: str
    by: tuple[str, ...]
    centre: float
    cells: pd.DataFrame
    time: str | None = None

    @property
    def n(self) -> np.ndarray:
        return self.cells["n"].to_numpy(dtype=np.int64)

    @property
    def mean(self) -> np.ndarray:
        """Cell means: the centre plus the mean deviation from it."""
        return self.centre + self.cells["sum"].to_numpy(dtype=np.float64) / self.n

    @property
    def ss(self) -> np.ndarray:
        """Sums of squared deviations from each cell's mean (never below zero)."""
        total = self.cells["sum"].to_numpy(dtype=np.float64)
        squares = self.cells["sumsq"].to_numpy(dtype=np.float64)
        return np.maximum(squares - total * total / self.n, 0.0)

    def merge(self, by: Sequence[str]) -> CellMoments:
        """The same moments over a coarser grouping (a subset of ``by``): sums add up."""
        by = tuple(by)
        unknown = [name for name in by if name not in self.by]
        if unknown:
            raise QCDataError(
                f"Cannot merge cells grouped by {list(self.by)} into {list(by)}: "
                f"{shown(unknown[0])} is not one of the grouping columns."
            )
        rules = {"n": "sum", "sum": "sum", "sumsq": "sum", "min": "min", "max": "max"}
        if "first" in self.cells.columns:
            rules["first"] = "min"
        if by:
            grouped = self.cells.groupby(list(by), dropna=False, sort=False).agg(rules)
            cells = grouped.reset_index()
        else:
            cells = pd.DataFrame({k: [self.cells[k].agg(rule)] for k, rule in rules.items()})
        return CellMoments(self.value, by, self.centre, tidy_cells(cells, by), self.time)


def tidy_cells(cells: pd.DataFrame, by: Sequence[str]) -> pd.DataFrame:
    """Cells sorted by their labels (missing last) and numbered 0..k-1: one order for all
    engines, so their answers compare row by row."""
    if by and len(cells):
        cells = cells.sort_values(list(by), na_position="last", kind="stable")
    return cells.reset_index(drop=True)


def allocate(sizes: np.ndarray, total: int) -> np.ndarray:
    """How many of ``total`` draws fall to each stratum: proportional to ``sizes``, the
    rounding left over given by largest remainder (ties to the earlier stratum), never more
    than a stratum holds.

    Examples
    --------
    >>> allocate(np.array([50, 30, 20]), 10).tolist()
    [5, 3, 2]
    >>> allocate(np.array([1, 1, 1]), 2).tolist()
    [1, 1, 0]
    """
    sizes = np.asarray(sizes, dtype=np.int64)
    available = int(sizes.sum())
    total = min(int(total), available)
    if available == 0:
        return np.zeros_like(sizes)
    share = sizes * (total / available)
    taken = np.minimum(np.floor(share).astype(np.int64), sizes)
    left = total - int(taken.sum())
    order = np.argsort(-(share - taken), kind="stable")
    room = order[taken[order] < sizes[order]]
    taken[room[:left]] += 1
    return taken


def require_size(size: object) -> int:
    if isinstance(size, (bool, np.bool_)) or not isinstance(size, (int, np.integer)) or size < 0:
        raise QCDataError(f"size={shown(size)} is not a number of rows: give a whole number >= 0.")
    return int(size)


def require_known(columns: Sequence[str], known: Mapping[str, str], role: str) -> None:
    """Raise if a column named as ``role`` is not a column of the Source."""
    missing = [c for c in columns if c not in known]
    if missing:
        listed = ", ".join(shown(c) for c in list(known)[:20])
        raise QCDataError(
            f"Column {shown(missing[0])} given as {role} not found; the source has: {listed}."
        )


def histogram_scale(low: float, high: float, bins: int) -> float:
    """Bins per unit of the value: every engine bins ``floor((x - low) * scale)`` with this
    one number, so they agree to the last value on an edge."""
    if not (np.isfinite(low) and np.isfinite(high) and high > low) or bins < 1:
        raise QCDataError(
            f"A histogram needs low < high (finite) and at least one bin; got low={low!r}, "
            f"high={high!r}, bins={bins!r}."
        )
    return bins / (high - low)


@runtime_checkable
class Source(Protocol):
    """A table that answers the reductions of an analysis where it lives.

    Every method takes column names; ``where`` filters rows (see :data:`Where`). Values are
    used only where finite (missing, NaN and infinite values are left out of moments and
    histograms, and counted by :meth:`count`).
    """

    @property
    def columns(self) -> dict[str, str]:
        """Column names and their kinds (one of :data:`KINDS`), in the table's order."""
        ...

    @property
    def n_rows(self) -> int:
        """Number of rows (computed once)."""
        ...

    @property
    def fingerprint(self) -> str:
        """A short text that changes when the data or the query change."""
        ...

    @property
    def description(self) -> dict[str, str]:
        """Where the data are (path, URL without secrets, table or query): :func:`reopen`
        makes the same Source from it in another process."""
        ...

    def centre(self, value: str) -> float:
        """The centring constant of a value column (one of its finite values), fixed for the
        life of the Source so that moments of any grouping add up exactly."""
        ...

    def moments(
        self, value: str, by: Sequence[str] = (), *, time: str | None = None,
        where: Where | None = None,
    ) -> CellMoments:  # fmt: skip
        """Moments of ``value`` per cell of ``by`` (see :class:`CellMoments`)."""
        ...

    def levels(self, column: str, *, where: Where | None = None) -> pd.Series:
        """Rows per level of a column (the index; missing last), sorted by level."""
        ...

    def count(self, where: Where | None = None, *, finite: str | None = None) -> int:
        """Rows under a filter; with ``finite=value``, only those whose value is finite."""
        ...

    def histogram(
        self, value: str, low: float, high: float, bins: int, *, where: Where | None = None
    ) -> np.ndarray:
        """Counts of finite values in ``bins`` equal bins from ``low`` to ``high`` (the last
        one closed; values outside are not counted)."""
        ...

    def sample(
        self, size: int, *, by: Sequence[str] = (), seed: int = 0, where: Where | None = None
    ) -> pd.DataFrame:
        """``size`` rows (all when fewer), allotted to the cells of ``by`` in proportion to
        their rows (largest remainder), chosen at random within each cell by ``seed``: the
        same arguments give the same rows."""
        ...

    def rows(
        self, where: Where | None = None, *, order: Sequence[str] = (), start: int = 0,
        limit: int = 1000,
    ) -> pd.DataFrame:  # fmt: skip
        """Rows for drill-down: those under ``where``, ``start`` to ``start + limit`` in the
        order of ``order`` (the table's own order where the engine keeps one)."""
        ...

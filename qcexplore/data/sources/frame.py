"""A table in memory as a Source: the reductions by factorize and bincount, no loop over cells."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from qcexplore.data.sources.base import (
    MOMENT_COLUMNS,
    Between,
    CellMoments,
    Where,
    allocate,
    histogram_scale,
    require_known,
    require_size,
    tidy_cells,
)
from qcexplore.data.validate import require_frame, require_text_names
from qcexplore.errors import QCDataError


def kind_of(dtype: Any) -> str:
    """The Source kind of a pandas dtype."""
    if pd.api.types.is_bool_dtype(dtype):
        return "bool"
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype):
        return "number"
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return "time"
    if pd.api.types.is_object_dtype(dtype) or pd.api.types.is_string_dtype(dtype):
        return "text"
    if isinstance(dtype, pd.CategoricalDtype):
        return "text"
    return "other"


def _codes(columns: list[pd.Series], rows: int) -> tuple[np.ndarray, int]:
    """One code per row for the combination of the columns' labels (missing is a label),
    and the number of codes; no columns: one cell of all ``rows``."""
    if not columns:
        return np.zeros(rows, dtype=np.intp), int(rows > 0)
    codes, levels = pd.factorize(columns[0], use_na_sentinel=False)
    count = len(levels)
    for column in columns[1:]:
        own, levels = pd.factorize(column, use_na_sentinel=False)
        # Re-factorized at each step, so the combined codes never outgrow the row count.
        codes, present = pd.factorize(codes.astype(np.int64) * len(levels) + own)
        count = len(present)
    return codes.astype(np.intp), count


def _first_rows(codes: np.ndarray, count: int) -> np.ndarray:
    first = np.empty(count, dtype=np.intp)
    first[codes[::-1]] = np.arange(codes.size - 1, -1, -1)
    return first


def _smallest(values: np.ndarray, codes: np.ndarray, count: int) -> np.ndarray:
    out = np.full(count, np.inf)
    np.minimum.at(out, codes, values)
    return out


class FrameSource:
    """A pandas table in memory as a :class:`~qcexplore.data.sources.base.Source`.

    Examples
    --------
    >>> f = pd.DataFrame({"crew": ["a", "a", "b"], "w": [500.0, 502.0, 501.0]})
    >>> m = FrameSource(f).moments("w", ["crew"])
    >>> m.mean.tolist(), m.ss.tolist()
    ([501.0, 501.0], [2.0, 0.0])
    """

    def __init__(self, frame: pd.DataFrame) -> None:
        self._frame = require_text_names(require_frame(frame)).reset_index(drop=True)
        self._centres: dict[str, float] = {}

    def __repr__(self) -> str:
        return f"FrameSource({len(self._frame)} rows x {self._frame.shape[1]} columns)"

    @property
    def frame(self) -> pd.DataFrame:
        return self._frame

    @cached_property
    def columns(self) -> dict[str, str]:
        return {str(name): kind_of(dtype) for name, dtype in self._frame.dtypes.items()}

    @property
    def n_rows(self) -> int:
        return len(self._frame)

    @cached_property
    def fingerprint(self) -> str:
        digest = hashlib.sha256(repr(list(self._frame.dtypes.items())).encode())
        digest.update(pd.util.hash_pandas_object(self._frame, index=False).to_numpy().tobytes())
        return digest.hexdigest()[:16]

    @property
    def description(self) -> dict[str, str]:
        return {"engine": "memory", "rows": str(self.n_rows)}

    # ---- rows under a filter ---------------------------------------------------------------
    def _columns(self, names: Sequence[str], rows: np.ndarray) -> list[pd.Series]:
        """The columns at ``rows`` (positions), without a copy when that is every row."""
        if rows.size == len(self._frame):
            return [self._frame[name] for name in names]
        return [self._frame[name].iloc[rows] for name in names]

    def _mask(self, where: Where | None) -> np.ndarray:
        keep = np.ones(len(self._frame), dtype=bool)
        if not where:
            return keep
        require_known(list(where), self.columns, "a filter")
        for name, wanted in where.items():
            column = self._frame[name]
            if isinstance(wanted, Between):
                if wanted.low is not None:
                    keep &= (column >= wanted.low).to_numpy(dtype=bool, na_value=False)
                if wanted.high is not None:
                    keep &= (column < wanted.high).to_numpy(dtype=bool, na_value=False)
            elif isinstance(wanted, (list, tuple, set, frozenset)):
                levels = [w for w in wanted if w is not None]
                hit = column.isin(levels).to_numpy(dtype=bool)
                keep &= hit | column.isna().to_numpy() if None in wanted else hit
            elif wanted is None:
                keep &= column.isna().to_numpy()
            else:
                keep &= (column == wanted).to_numpy(dtype=bool, na_value=False)
        return keep

    def _values(self, value: str) -> tuple[np.ndarray, np.ndarray]:
        require_known([value], self.columns, "value")
        if self.columns[value] != "number":
            raise QCDataError(
                f"Column {value!r} holds {self.columns[value]}, not numbers; choose the column "
                "with the measured values."
            )
        x = self._frame[value].to_numpy(dtype=np.float64, na_value=np.nan)
        return x, np.isfinite(x)

    def centre(self, value: str) -> float:
        if value not in self._centres:
            x, finite = self._values(value)
            if not finite.any():
                raise QCDataError(f"Column {value!r} has no finite values.")
            self._centres[value] = float(x[np.argmax(finite)])
        return self._centres[value]

    def moments(
        self,
        value: str,
        by: Sequence[str] = (),
        *,
        time: str | None = None,
        where: Where | None = None,
    ) -> CellMoments:
        by = tuple(by)
        require_known([*by, *([time] if time else [])], self.columns, "a grouping")
        x, finite = self._values(value)
        centre = self.centre(value)
        rows = np.flatnonzero(finite & self._mask(where))
        codes, count = _codes(self._columns(by, rows), rows.size)
        deviation = x[rows] - centre
        stats = {
            "n": np.bincount(codes, minlength=count).astype(np.int64),
            "sum": np.bincount(codes, deviation, minlength=count),
            "sumsq": np.bincount(codes, deviation * deviation, minlength=count),
            "min": _smallest(x[rows], codes, count),
            "max": -_smallest(-x[rows], codes, count),
        }
        labels = rows[_first_rows(codes, count)]
        cells = self._frame[list(by)].iloc[labels].reset_index(drop=True)
        for name in MOMENT_COLUMNS:
            cells[name] = stats[name]
        if time is not None:
            cells["first"] = self._first_times(self._columns([time], rows)[0], codes, count)
        return CellMoments(value, by, centre, tidy_cells(cells, by), time)

    @staticmethod
    def _first_times(times: pd.Series, codes: np.ndarray, count: int) -> pd.Series:
        if pd.api.types.is_datetime64_any_dtype(times.dtype):
            stamps = times.to_numpy(dtype="datetime64[ns]").view(np.int64)
            late = np.iinfo(np.int64).max
            stamps = np.where(stamps == np.iinfo(np.int64).min, late, stamps)  # NaT last
            first = np.full(count, late)
            np.minimum.at(first, codes, stamps)
            first = np.where(first == late, np.iinfo(np.int64).min, first)
            return pd.Series(first.view("datetime64[ns]"))
        order = times.to_numpy(dtype=np.float64, na_value=np.nan)
        first = _smallest(np.where(np.isnan(order), np.inf, order), codes, count)
        return pd.Series(np.where(np.isinf(first), np.nan, first))

    def levels(self, column: str, *, where: Where | None = None) -> pd.Series:
        require_known([column], self.columns, "a factor")
        part = self._frame.loc[self._mask(where), column]
        counts = part.value_counts(dropna=False, sort=False)
        counts = counts[counts > 0].sort_index(na_position="last").astype(np.int64)
        return counts.rename("n").rename_axis(column)

    def count(self, where: Where | None = None, *, finite: str | None = None) -> int:
        keep = self._mask(where)
        if finite is not None:
            keep &= self._values(finite)[1]
        return int(keep.sum())

    def histogram(
        self, value: str, low: float, high: float, bins: int, *, where: Where | None = None
    ) -> np.ndarray:
        scale = histogram_scale(low, high, bins)
        x, finite = self._values(value)
        x = x[finite & self._mask(where)]
        x = x[(x >= low) & (x <= high)]
        index = np.minimum(np.floor((x - low) * scale).astype(np.int64), bins - 1)
        return np.bincount(index, minlength=bins).astype(np.int64)

    def sample(
        self, size: int, *, by: Sequence[str] = (), seed: int = 0, where: Where | None = None
    ) -> pd.DataFrame:
        size = require_size(size)
        require_known(list(by), self.columns, "a stratum")
        rows = np.flatnonzero(self._mask(where))
        codes, count = _codes(self._columns(by, rows), rows.size)
        sizes = np.bincount(codes, minlength=count)
        take = allocate(sizes, size)
        key = np.random.default_rng(seed).random(rows.size)
        order = np.lexsort((key, codes))
        starts = np.cumsum(sizes) - sizes
        rank = np.empty(rows.size, dtype=np.intp)
        rank[order] = np.arange(rows.size) - starts[codes[order]]
        return self._frame.iloc[rows[rank < take[codes]]].reset_index(drop=True)

    def rows(
        self,
        where: Where | None = None,
        *,
        order: Sequence[str] = (),
        start: int = 0,
        limit: int = 1000,
    ) -> pd.DataFrame:
        require_known(list(order), self.columns, "an order")
        part = self._frame.loc[self._mask(where)]
        if order:
            part = part.sort_values(list(order), kind="stable", na_position="last")
        return part.iloc[start : start + limit].reset_index(drop=True)

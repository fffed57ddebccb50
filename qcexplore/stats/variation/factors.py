"""The factors of a variation study as integer codes: what every part of the analysis reads."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import group_codes


@dataclass(frozen=True)
class Factor:
    """A factor (or the subgroup) as one code per row, or per subgroup, and its levels."""

    name: str
    codes: np.ndarray
    levels: pd.Index

    @property
    def n_levels(self) -> int:
        return len(self.levels)


def factor(frame: pd.DataFrame, name: str, role: str = "factor") -> Factor:
    return Factor(name, *group_codes(frame, name, role))


def prepare(
    frame: pd.DataFrame, value: str, subgroup: str, factors: Sequence[str]
) -> tuple[np.ndarray, Factor, list[Factor]]:
    """The values, the subgroup and the factors (other than the subgroup) of a study."""
    if isinstance(factors, str):
        factors = (factors,)
    require_columns(frame, [subgroup, *factors], "subgroup/factor")
    if len(frame) < 2:
        raise QCDataError(f"need at least two rows of {value!r}; got {len(frame)}.")
    y = finite_column(frame, value, "value")
    return (
        y,
        factor(frame, subgroup, "subgroup"),
        [factor(frame, f) for f in factors if f != subgroup],
    )


def crosstab(a: Factor, b: Factor, weights: np.ndarray | None = None) -> np.ndarray:
    """Counts (or summed ``weights``) of each pair of levels, ``a`` in rows, ``b`` in columns."""
    counts = np.bincount(
        a.codes * b.n_levels + b.codes, weights=weights, minlength=a.n_levels * b.n_levels
    )
    return counts.reshape(a.n_levels, b.n_levels)


def cell_codes(start: np.ndarray, factors: list[Factor]) -> np.ndarray:
    """Codes ``0 .. cells - 1`` of the cells that ``start`` (a code per row) and the levels of
    ``factors`` make together."""
    cell = start.astype(np.int64)
    for f in factors:
        cell = cell * f.n_levels + f.codes
    return np.unique(cell, return_inverse=True)[1]

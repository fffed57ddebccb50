"""The one place where input is checked: every problem becomes a QCDataError.

Messages name the column, the first offending rows (as 1-based row numbers of the
table the user gave) and what to do. Cells and names quoted in a message are cut to
about 60 characters, with their length, so a huge cell never floods a terminal.

Text cells are read in :mod:`qcexplore.data.numbers` (decimal comma or point) and
:mod:`qcexplore.data.dates` (day-first, month-first or year-first dates; the time line).
"""

from __future__ import annotations

from collections.abc import Hashable, Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.coding import is_real_number
from qcexplore.data.coding import shorten as shown
from qcexplore.errors import QCDataError

_SHOWN_ROWS = 5

#: Cells that mean "no value" (pandas' own list for CSV files, so frames and files agree).
MISSING_TEXT = frozenset(
    {"", "nan", "NaN", "-nan", "-NaN", "NA", "N/A", "n/a", "#N/A", "NULL", "null", "None", "<NA>"}
)


def row_list(positions: Iterable[int]) -> str:
    """The first few 1-based row numbers, for messages.

    Examples
    --------
    >>> row_list([0, 4])
    'rows 1, 5'
    """
    rows = [int(p) + 1 for p in positions]
    listed = ", ".join(map(str, rows[:_SHOWN_ROWS]))
    more = f" and {len(rows) - _SHOWN_ROWS} more" if len(rows) > _SHOWN_ROWS else ""
    return f"row{'s' if len(rows) > 1 else ''} {listed}{more}"


def cell_examples(cells: np.ndarray, positions: np.ndarray, count: int = 3) -> str:
    return ", ".join(shown(cells[int(i)]) for i in positions[:count])


# ---- tables and column names ----------------------------------------------------------------
def require_frame(frame: object) -> pd.DataFrame:
    """Check that ``frame`` is a pandas DataFrame with unique column names and some rows.

    Examples
    --------
    >>> require_frame(pd.DataFrame({"w": [1.0]})).shape
    (1, 1)
    >>> require_frame([1.0])  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Expected a table (pandas DataFrame), got list; ...
    """
    if not isinstance(frame, pd.DataFrame):
        raise QCDataError(
            f"Expected a table (pandas DataFrame), got {type(frame).__name__}; "
            "read files with qx.read(path) first."
        )
    duplicated = frame.columns[frame.columns.duplicated()].unique().tolist()
    if duplicated:
        raise QCDataError(
            f"Duplicate column names {shown(duplicated)}: rename the columns so each name is "
            "used once."
        )
    if len(frame) == 0:
        raise QCDataError("The table has no rows: check the file or the filter that made it.")
    return frame


def require_text_names(frame: pd.DataFrame) -> pd.DataFrame:
    """Check that every column name is text, as the Study's roles, tables and figures need.

    A table made from an array has the numbers 0, 1, 2, ... as names; it is refused with
    the way to name the columns rather than failing later in a join or a widget.

    Examples
    --------
    >>> require_text_names(pd.DataFrame({"w": [1.0]})).columns.tolist()
    ['w']
    >>> require_text_names(pd.DataFrame([[1.0, 2.0]]))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column names must be text; this table has 0, 1 ...
    """
    odd = [name for name in frame.columns if not isinstance(name, str)]
    if odd:
        listed = ", ".join(shown(name) for name in odd[:5])
        raise QCDataError(
            f"Column names must be text; this table has {listed} (a table made from an array "
            "has numbers as names). Name the columns, e.g. frame.columns = ['weight', 'crew', "
            "...], or frame = frame.rename(columns=str)."
        )
    return frame


def column_name(name: object, role: str, *, optional: bool = False) -> Hashable:
    """One column name (text or a whole number), or a QCDataError naming the argument.

    Examples
    --------
    >>> column_name("w", "value")
    'w'
    >>> column_name(["w"], "value")
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: value=['w'] is not one column name: give the name as text, \
e.g. value='weight'.
    """
    if name is None and optional:
        return None
    whole_number = is_real_number(name) and float(name).is_integer()
    if isinstance(name, str) or whole_number:
        return name
    raise QCDataError(
        f"{role}={shown(name)} is not one column name: give the name as text, e.g. {role}='weight'."
    )


def column_names(names: object, role: str) -> tuple[Hashable, ...]:
    """A list of column names as a tuple; a lone string is refused, not split into letters.

    Examples
    --------
    >>> column_names(["crew", "nozzle"], "factors")
    ('crew', 'nozzle')
    >>> column_names("crew", "factors")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: factors must be a list of column names, got the string ...
    """
    if names is None:
        return ()
    if isinstance(names, str):
        raise QCDataError(
            f"{role} must be a list of column names, got the string {shown(names)}; "
            f"write {role}=[{shown(names)}]."
        )
    if isinstance(names, (bytes, Mapping)) or not isinstance(names, Iterable):
        raise QCDataError(
            f"{role}={shown(names)} is not a list of column names; write e.g. "
            f"{role}=['crew', 'nozzle']."
        )
    return tuple(column_name(name, f"an entry of {role}") for name in names)


def require_columns(frame: pd.DataFrame, columns: Sequence[object], role: str) -> None:
    """Raise if any of ``columns`` is missing, listing what is there.

    Examples
    --------
    >>> require_columns(pd.DataFrame({"w": [1.0]}), ["w"], "value")
    >>> require_columns(pd.DataFrame({"w": [1.0]}), ["crew"], "factor")
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column 'crew' given as factor not found; the table has: 'w'.
    """
    for column in columns:
        column_name(column, role)
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        available = ", ".join(shown(c) for c in list(frame.columns)[:20])
        more = f" and {frame.shape[1] - 20} more" if frame.shape[1] > 20 else ""
        raise QCDataError(
            f"Column{'s' if len(missing) > 1 else ''} {', '.join(shown(c) for c in missing[:5])} "
            f"given as {role} not found; the table has: {available}{more}."
        )


def check_role_names(
    value: object,
    subgroup: object,
    time: object,
    factors: Sequence[Hashable],
    measured_by: Sequence[Hashable],
) -> None:
    """Catch contradictory or malformed role assignments before any data are touched.

    Examples
    --------
    >>> check_role_names("w", "round", None, ("crew",), ("crew",))
    >>> check_role_names("w", None, None, ("w",), ())  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column 'w' is the value and cannot also be ...
    """
    column_name(value, "value")
    column_name(subgroup, "subgroup", optional=True)
    column_name(time, "time", optional=True)
    for name in (*factors, *measured_by):
        column_name(name, "a factor")
    if value in factors or value == subgroup or value == time:
        raise QCDataError(
            f"Column {shown(value)} is the value and cannot also be the subgroup, time or a factor."
        )
    repeated = sorted({shown(f) for f in factors if list(factors).count(f) > 1})
    if repeated:
        raise QCDataError(
            f"Factors {', '.join(repeated)} are listed more than once; list each once."
        )


@dataclass(frozen=True)
class DroppedRows:
    """Rows left out of the analysis and why (1-based row numbers of the input).

    Examples
    --------
    >>> DroppedRows(missing=(3,), infinite=(7,)).describe()
    '1 missing value(s) (row 3); 1 infinite value(s) (row 7) left out'
    """

    missing: tuple[int, ...] = ()
    infinite: tuple[int, ...] = ()

    @property
    def count(self) -> int:
        return len(self.missing) + len(self.infinite)

    def describe(self) -> str:
        parts = []
        if self.missing:
            parts.append(
                f"{len(self.missing)} missing value(s) ({row_list(np.array(self.missing) - 1)})"
            )
        if self.infinite:
            parts.append(
                f"{len(self.infinite)} infinite value(s) ({row_list(np.array(self.infinite) - 1)})"
            )
        return "; ".join(parts) + " left out" if parts else "no rows left out"


def finite_mask(values: pd.Series) -> tuple[np.ndarray, DroppedRows]:
    """Which values can be used, and which rows were dropped for which reason.

    Examples
    --------
    >>> keep, dropped = finite_mask(pd.Series([1.0, np.nan, np.inf]))
    >>> keep.tolist(), dropped.count
    ([True, False, False], 2)
    """
    array = values.to_numpy(dtype=np.float64)
    missing = np.isnan(array)
    infinite = np.isinf(array)
    dropped = DroppedRows(
        missing=tuple(int(i) + 1 for i in np.flatnonzero(missing)),
        infinite=tuple(int(i) + 1 for i in np.flatnonzero(infinite)),
    )
    return ~(missing | infinite), dropped


def as_factor(series: pd.Series) -> pd.Series:
    """A categorical column; missing values become the level ``"(missing)"``.

    Levels keep their natural order (numbers numerically, text as first seen in
    sorted order) so that the same data always give the same colours and tables.

    Examples
    --------
    >>> as_factor(pd.Series(["B", None, "A"], dtype=object)).cat.categories.tolist()
    ['A', 'B', '(missing)']
    """
    if isinstance(series.dtype, pd.CategoricalDtype):
        cat = series
    else:
        try:
            cat = series.astype("category")
        except TypeError:  # unhashable cells (lists, dicts) cannot be levels
            raise QCDataError(
                f"Column {shown(series.name)} holds cells that cannot be used as labels (such as "
                "lists); give it plain text or numbers."
            ) from None
    if cat.isna().any():
        cat = cat.cat.add_categories(["(missing)"]).fillna("(missing)")
    return cat.cat.remove_unused_categories()


def is_missing_cell(cell: object) -> bool:
    if cell is None or cell is pd.NA or cell is pd.NaT:
        return True
    return isinstance(cell, float) and np.isnan(cell)


def cell_float(cell: object) -> float:
    try:
        return float(cell)  # type: ignore[arg-type]
    except OverflowError:  # a Python integer beyond the float range
        return np.inf if cell > 0 else -np.inf  # type: ignore[operator]


def _not_numbers(cells: np.ndarray) -> np.ndarray:
    """Positions of cells that are neither a real number nor missing (text, true/false, ...)."""
    return np.flatnonzero(
        [not is_missing_cell(v) and not is_real_number(v, finite=False) for v in cells]
    )


def finite_array(values: object, what: str) -> np.ndarray:
    """Numbers handed over as an array (not a table's column) as float64, checked as
    :func:`finite_column` checks a column; ``what`` names them in messages.

    Examples
    --------
    >>> finite_array([1, 2.5], "weights")
    array([1. , 2.5])
    """
    return finite_column(pd.DataFrame({what: pd.Series(np.asarray(values).ravel())}), what, what)


def finite_column(frame: pd.DataFrame, column: str, role: str) -> np.ndarray:
    """A numeric column as a float64 array, or a QCDataError naming what is wrong.

    The column must exist, hold numbers (not true/false, not text) and have no missing
    or infinite values. Rows in messages are 1-based positions in ``frame`` (the
    Study's frame keeps the order of the table the user gave, so its positions are
    the user's rows).

    Parameters
    ----------
    frame : the table
    column : name of the column
    role : what the column is used as (``"value"``, ``"size"``, ...), named in messages

    Returns
    -------
    numpy.ndarray
        The column as float64, one entry per row.

    Examples
    --------
    >>> finite_column(pd.DataFrame({"w": [500, 501.5]}), "w", "value")
    array([500. , 501.5])
    >>> finite_column(pd.DataFrame({"w": [500.0, np.nan]}), "w", "value")
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column 'w' given as value: missing or infinite values in \
row 2; drop or fill those rows first.
    """
    require_columns(frame, [column], role)
    subject = f"Column {column!r} given as {role}"
    values = frame[column]
    dtype = values.dtype
    if pd.api.types.is_bool_dtype(dtype):
        raise QCDataError(
            f"{subject}: true/false values, not measurements; "
            "choose the column with the measured values."
        )
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype):
        array = values.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        cells = values.to_numpy(dtype=object)
        odd = _not_numbers(cells)
        if odd.size:
            raise QCDataError(
                f"{subject}: cells that are not numbers ({cell_examples(cells, odd)}) in "
                f"{row_list(odd)}; convert them to numbers first (for instance with "
                "pd.to_numeric, or read files with qx.read)."
            )
        array = np.array(
            [np.nan if is_missing_cell(v) else cell_float(v) for v in cells], dtype=np.float64
        )
    bad = np.flatnonzero(~np.isfinite(array))
    if bad.size:
        raise QCDataError(
            f"{subject}: missing or infinite values in {row_list(bad)}; "
            "drop or fill those rows first."
        )
    return array

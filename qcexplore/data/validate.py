"""The one place where input is checked: every problem becomes a QCDataError.

Messages name the column, the first offending rows (as 1-based row numbers of the
table the user gave) and what to do.
"""

from __future__ import annotations

import numbers
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.errors import QCDataError

_SHOWN_ROWS = 5
_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d{1,3}(?:[.\s']\d{3})*,\d+\s*$|^\s*[-+]?\d+,\d+\s*$")


def row_list(positions: Iterable[int]) -> str:
    """The first few 1-based row numbers, for messages.

    Examples
    --------
    >>> row_list([0, 4])
    'rows 1, 5'
    """
    rows = [int(p) + 1 for p in positions]
    shown = ", ".join(map(str, rows[:_SHOWN_ROWS]))
    more = f" and {len(rows) - _SHOWN_ROWS} more" if len(rows) > _SHOWN_ROWS else ""
    return f"row{'s' if len(rows) > 1 else ''} {shown}{more}"


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
            f"Duplicate column names {duplicated}: rename the columns so each name is used once."
        )
    if len(frame) == 0:
        raise QCDataError("The table has no rows: check the file or the filter that made it.")
    return frame


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
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        available = ", ".join(map(repr, list(frame.columns)[:20]))
        raise QCDataError(
            f"Column{'s' if len(missing) > 1 else ''} {', '.join(map(repr, missing))} "
            f"given as {role} not found; the table has: {available}."
        )


def _parse_text_numbers(text: pd.Series) -> pd.Series:
    """Numbers written as text, with a decimal point or a decimal comma."""
    stripped = text.str.strip()
    comma = stripped.str.match(_DECIMAL_COMMA).fillna(False).astype(bool)
    converted = stripped.where(
        ~comma, stripped.str.replace(r"[.\s']", "", regex=True).str.replace(",", ".")
    )
    return pd.to_numeric(converted, errors="coerce")


def numeric_values(frame: pd.DataFrame, column: str) -> pd.Series:
    """The column as float64; text numbers and decimal commas converted.

    Cells that hold something other than a number, a blank or a missing value
    raise a QCDataError listing their rows. Missing and infinite values stay in
    the result as NaN/inf for the caller to count and drop.

    Examples
    --------
    >>> f = pd.DataFrame({"w": ["500,5", " 1.499,8", "", "501"]})
    >>> numeric_values(f, "w").tolist()
    [500.5, 1499.8, nan, 501.0]
    """
    series = frame[column]
    if pd.api.types.is_bool_dtype(series.dtype):
        raise QCDataError(
            f"Column {column!r} holds true/false values, not measurements; "
            "choose the column with the measured values."
        )
    if pd.api.types.is_numeric_dtype(series.dtype):
        return series.astype(np.float64)
    if isinstance(series.dtype, pd.CategoricalDtype):
        series = series.astype(object)
    text = series.astype("string")
    blank = text.isna() | (text.str.strip() == "")
    parsed = _parse_text_numbers(text.fillna(""))
    parsed = parsed.where(~blank)
    unreadable = np.flatnonzero((parsed.isna() & ~blank).to_numpy())
    if unreadable.size:
        examples = ", ".join(repr(str(series.iloc[i])) for i in unreadable[:3])
        raise QCDataError(
            f"Column {column!r} has cells that are not numbers ({examples}) in "
            f"{row_list(unreadable)}; correct or blank them in the source."
        )
    return parsed.astype(np.float64)


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
                f"Column {series.name!r} holds cells that cannot be used as labels (such as "
                "lists); give it plain text or numbers."
            ) from None
    if cat.isna().any():
        cat = cat.cat.add_categories(["(missing)"]).fillna("(missing)")
    return cat.cat.remove_unused_categories()


def parse_times(series: pd.Series, column: str) -> pd.Series:
    """Timestamps (with or without time zone) or a numeric order column.

    Messages name rows by the series' index, which the Study keeps as the 0-based
    positions of the table the user gave.

    Examples
    --------
    >>> parse_times(pd.Series(["2026-03-29 01:30", "2026-03-29 03:30"]), "t").dt.hour.tolist()
    [1, 3]
    """
    if pd.api.types.is_datetime64_any_dtype(series.dtype):
        parsed = series
    elif pd.api.types.is_numeric_dtype(series.dtype) and not pd.api.types.is_bool_dtype(
        series.dtype
    ):
        parsed = series.astype(np.float64)
    else:
        text = series.astype("string")
        try:
            parsed = pd.to_datetime(text, errors="coerce", format="mixed")
        except (ValueError, TypeError) as error:
            # Mixed time zones in one column cannot share one dtype.
            parsed = pd.to_datetime(text, errors="coerce", format="mixed", utc=True)
            if parsed.isna().all():
                raise QCDataError(
                    f"Column {column!r} could not be read as times ({error}); "
                    "write them as ISO dates like 2026-03-29 06:15, one time zone per column."
                ) from None
        bad = np.flatnonzero((parsed.isna() & text.notna() & (text.str.strip() != "")).to_numpy())
        if bad.size:
            examples = ", ".join(repr(str(series.iloc[i])) for i in bad[:3])
            raise QCDataError(
                f"Column {column!r} has cells that are not times ({examples}) in "
                f"{row_list(series.index[bad])}; write them as ISO dates like 2026-03-29 06:15."
            )
    missing = np.flatnonzero(pd.isna(parsed).to_numpy())
    if missing.size:
        raise QCDataError(
            f"Column {column!r} has missing times in {row_list(series.index[missing])}; "
            "fill them in or leave the time column out."
        )
    return parsed


def column_names(names: Sequence[str] | str | None, role: str) -> tuple[str, ...]:
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
            f"{role} must be a list of column names, got the string {names!r}; "
            f"write {role}=[{names!r}]."
        )
    return tuple(names)


def check_role_names(
    value: str,
    subgroup: str | None,
    time: str | None,
    factors: Sequence[str],
    measured_by: Sequence[str],
) -> None:
    """Catch contradictory role assignments before any data are touched.

    Examples
    --------
    >>> check_role_names("w", "round", None, ("crew",), ("crew",))
    >>> check_role_names("w", None, None, ("w",), ())  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column 'w' is the value and cannot also be ...
    """
    if value in factors or value == subgroup or value == time:
        raise QCDataError(
            f"Column {value!r} is the value and cannot also be the subgroup, time or a factor."
        )
    repeated = sorted({f for f in factors if list(factors).count(f) > 1})
    if repeated:
        raise QCDataError(f"Factors {repeated} are listed more than once; list each once.")


def _is_missing(cell: object) -> bool:
    return cell is None or cell is pd.NA or cell is pd.NaT


def _not_numbers(cells: np.ndarray) -> np.ndarray:
    """Positions of cells that are neither a real number nor missing (text, true/false, ...)."""
    return np.flatnonzero(
        [
            not _is_missing(v)
            and (isinstance(v, (bool, np.bool_)) or not isinstance(v, numbers.Real))
            for v in cells
        ]
    )


def _cell_float(cell: object) -> float:
    if _is_missing(cell):
        return np.nan
    try:
        return float(cell)
    except OverflowError:  # a Python integer beyond the float range
        return np.inf


def _finite(values: pd.Series | np.ndarray, subject: str) -> np.ndarray:
    """Shared body of finite_column and finite_array; ``subject`` starts every message."""
    dtype = values.dtype
    if pd.api.types.is_bool_dtype(dtype):
        raise QCDataError(
            f"{subject}: true/false values, not measurements; "
            "choose the column with the measured values."
        )
    if not (pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype)):
        cells = np.asarray(values, dtype=object).ravel()
        odd = _not_numbers(cells)
        if odd.size:
            examples = ", ".join(repr(cells[i]) for i in odd[:3])
            raise QCDataError(
                f"{subject}: cells that are not numbers ({examples}) in {row_list(odd)}; convert "
                "them to numbers first (for instance with pd.to_numeric, or read files with "
                "qx.read)."
            )
        values = np.array([_cell_float(v) for v in cells], dtype=np.float64)
    if isinstance(values, pd.Series):
        array = values.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        array = np.asarray(values, dtype=np.float64).ravel()
    bad = np.flatnonzero(~np.isfinite(array))
    if bad.size:
        raise QCDataError(
            f"{subject}: missing or infinite values in {row_list(bad)}; "
            "drop or fill those rows first."
        )
    return array


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
    return _finite(frame[column], f"Column {column!r} given as {role}")


def finite_array(values: object, role: str) -> np.ndarray:
    """Numbers passed as an array or list, as a flat float64 array, or a QCDataError.

    The same checks as :func:`finite_column` for functions that take values rather
    than a table: numbers only (no true/false, no text) and all finite. Rows in
    messages are 1-based positions in ``values``.

    Parameters
    ----------
    values : array, list or Series of numbers
    role : what the values are (for instance ``"capability values"``), named in messages

    Returns
    -------
    numpy.ndarray
        The values as a 1-d float64 array.

    Examples
    --------
    >>> finite_array([1, 2.5], "capability values")
    array([1. , 2.5])
    >>> finite_array([1.0, "a"], "capability values")
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: capability values: cells that are not numbers ('a') in row 2; \
convert them to numbers first (for instance with pd.to_numeric, or read files with qx.read).
    """
    if not isinstance(values, (pd.Series, np.ndarray)):
        # As objects each cell keeps its own type: [1.0, "a"] or [True, 1] would be cast.
        values = _object_array(values)
    return _finite(values, role)


def _object_array(values: object) -> np.ndarray:
    """A flat object array of the given cells (a scalar is one cell)."""
    if isinstance(values, (str, bytes)) or not np.iterable(values):
        values = [values]
    cells = np.empty(len(values), dtype=object)
    cells[:] = list(values)
    return cells

"""Numbers written as text: a decimal comma or point, thousands marks, read once for everyone.

``qx.read`` uses it on files and the Study on text columns of a table in memory, so both read
the same cell the same way; a cell that nothing settles is refused with its rows, never read
a thousand times too large or small.
"""

from __future__ import annotations

import re
from collections.abc import Hashable, Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from pandas.api.extensions import ExtensionDtype

from qcexplore.data.coding import is_real_number
from qcexplore.data.coding import shorten as shown
from qcexplore.data.validate import (
    MISSING_TEXT,
    cell_examples,
    cell_float,
    is_missing_cell,
    row_list,
)
from qcexplore.errors import QCDataError

# ---- numbers written as text -----------------------------------------------------------------
_SIGN = r"[+-]?"
_EXP = r"(?:[eE][+-]?\d+)?"
_GAPS = " \u00a0\u202f'\u2019"  # spaces and apostrophes between groups of three digits
_GAP = f"[{_GAPS}]"
_LEAD = r"[1-9]\d{0,2}"  # the first group of a grouped number never starts with 0
_PLAIN = rf"{_SIGN}(?:\d+{_EXP}|[iI][nN][fF](?:[iI][nN][iI][tT][yY])?)"
_GROUPED = rf"{_SIGN}{_LEAD}(?:{_GAP}\d{{3}})+"
# 1.234 and 1,234: a decimal mark, or a thousands mark, as the column or the file shows
_POINT_OR_THOUSANDS = rf"{_SIGN}{_LEAD}\.\d{{3}}"
_COMMA_OR_THOUSANDS = rf"{_SIGN}{_LEAD},\d{{3}}"
_POINT = (
    rf"{_SIGN}(?:(?:\d*\.\d+|\d+\.){_EXP}|{_LEAD}(?:,\d{{3}})+\.\d*|{_LEAD}(?:{_GAP}\d{{3}})+\.\d+"
    rf"|{_LEAD}(?:,\d{{3}}){{2,}})"
)
_COMMA = (
    rf"{_SIGN}(?:(?:\d*,\d+|\d+,){_EXP}|{_LEAD}(?:\.\d{{3}})+,\d*|{_LEAD}(?:{_GAP}\d{{3}})+,\d+"
    rf"|{_LEAD}(?:\.\d{{3}}){{2,}})"
)
# One pattern, tried in this order; the name of the alternative that fits is the cell's kind.
_NUMBER_KINDS = re.compile(
    "|".join(
        f"(?P<{kind}>{pattern})"
        for kind, pattern in (
            ("point_or_thousands", _POINT_OR_THOUSANDS),
            ("comma_or_thousands", _COMMA_OR_THOUSANDS),
            ("whole", rf"{_SIGN}\d+"),
            ("plain", _PLAIN),
            ("grouped", _GROUPED),
            ("point", _POINT),
            ("comma", _COMMA),
        )
    )
)
_GAP_MARKS = str.maketrans("", "", _GAPS)


@dataclass(frozen=True)
class NumberText:
    """How a column of cells reads as numbers.

    ``values`` holds NaN for blank cells and for cells that are not numbers;
    ``unreadable`` are the positions of the latter, ``unsettled`` those of cells such
    as ``1.234`` in a column that uses both decimal marks (1.234 or 1234?).
    ``decimal`` maps each decimal mark used to the positions of the cells written with
    it, ``evidence`` lists the marks that some cell can only have used as a decimal
    mark, ``thousands`` the thousands marks met, and ``whole`` says that every cell is a
    whole number written without a decimal mark (and none is blank).
    """

    values: np.ndarray
    blank: np.ndarray
    unreadable: np.ndarray
    unsettled: np.ndarray
    decimal: Mapping[str, np.ndarray] = field(default_factory=dict)
    evidence: tuple[str, ...] = ()
    thousands: tuple[str, ...] = ()
    whole: bool = False

    @property
    def readable(self) -> bool:
        """Every cell is a number or blank, and no decimal mark is in doubt."""
        return not self.unreadable.size and not self.unsettled.size

    def mixed_marks(self) -> str | None:
        """A note when the column uses both decimal marks, else None."""
        if len(self.decimal) < 2:
            return None
        return (
            f"mixes decimal comma ({row_list(self.decimal[','])}) and decimal point "
            f"({row_list(self.decimal['.'])}); each cell was read by the only mark it can have"
        )


def read_number_text(
    text: pd.Series, *, decimal: str | None = None, default: str | None = None
) -> NumberText:
    """Numbers written as text, with a decimal comma or point and optional thousands marks.

    A cell whose mark can only be a decimal mark (``2,5``, ``2.75``, ``1.234,5``) is read
    by it. A cell such as ``1.234`` or ``1,234`` (one mark, then three digits) is read by,
    in this order: ``decimal`` (what the user said), the mark the column's other cells
    use, or ``default`` (what the rest of the file uses). When nothing settles such a
    cell, or the column uses both marks, it is left unsettled: never read a thousand
    times too large or too small.

    Parameters
    ----------
    text : the cells (text; missing values allowed)
    decimal : ``","`` or ``"."`` when the user named the decimal mark
    default : ``","`` or ``"."``, the mark the rest of the file uses

    Examples
    --------
    >>> read_number_text(pd.Series(["500,5", "1.499,8", "1.234", "", "2"])).values.tolist()
    [500.5, 1499.8, 1234.0, nan, 2.0]
    >>> read_number_text(pd.Series(["2,5", "2.5", "1.234"])).unsettled.tolist()
    [2]
    >>> read_number_text(pd.Series(["1.250", "2.375"])).unsettled.tolist()
    [0, 1]
    >>> read_number_text(pd.Series(["1.250", "2.375"]), default=".").values.tolist()
    [1.25, 2.375]
    """
    # Each distinct cell once: measured values repeat at the gauge's resolution.
    codes, uniques = pd.factorize(text.to_numpy(dtype=object), use_na_sentinel=True)
    cells = [str(u).strip() for u in uniques]
    kinds = [None if c in MISSING_TEXT else _number_kind(c) for c in cells]
    present = {k for k in kinds if k}
    in_column = tuple(mark for mark, kind in ((".", "point"), (",", "comma")) if kind in present)
    settle: str | None
    if decimal is not None:
        settle = decimal
    elif in_column:
        settle = in_column[0] if len(in_column) == 1 else None
    else:
        settle = default
    readings = [_number_reading(c, k, settle) for c, k in zip(cells, kinds, strict=True)]
    unique_values = np.array([r[0] for r in readings] + [np.nan], dtype=np.float64)
    unique_marks = np.array([r[1] for r in readings] + ["blank"], dtype=object)
    mark = unique_marks[codes]  # code -1 takes the last entry: blank
    blank = mark == "blank"
    marks_used = {m: np.flatnonzero(mark == m) for m in (",", ".") if (mark == m).any()}
    thousands = sorted({mark for _, _, marks in readings for mark in marks})
    # Whole numbers written without a decimal mark or exponent, none blank: an integer column.
    whole = not blank.any() and all(
        k != "plain" and used == "" for k, (_, used, _) in zip(kinds, readings, strict=True) if k
    )
    return NumberText(
        values=unique_values[codes],
        blank=blank,
        unreadable=np.flatnonzero(mark == "unreadable"),
        unsettled=np.flatnonzero(mark == "unsettled"),
        decimal=marks_used,
        evidence=in_column,
        thousands=tuple(thousands),
        whole=whole,
    )


def _number_kind(cell: str) -> str:
    match = _NUMBER_KINDS.fullmatch(cell)
    return match.lastgroup if match else "unreadable"  # type: ignore[return-value]


def _number_reading(cell: str, kind: str | None, settle: str | None) -> tuple[float, str, str]:
    """One distinct cell: its value, the decimal mark it used ('' for none, or 'blank',
    'unreadable', 'unsettled') and the thousands marks it used."""
    if kind is None:
        return np.nan, "blank", ""
    if kind == "unreadable":
        return np.nan, "unreadable", ""
    if kind in ("point_or_thousands", "comma_or_thousands"):
        if settle is None:
            return np.nan, "unsettled", ""
        kind = "point" if settle == "." else "comma"
    if kind == "comma":
        decimal_mark, group_marks = ",", "."
    else:
        decimal_mark, group_marks = ".", ","
    body = cell.translate(_GAP_MARKS)
    groups = group_marks if group_marks in body else ""
    body = body.replace(group_marks, "").replace(",", ".")
    used = decimal_mark if "." in body else ""
    gaps = " " if len(body) != len(cell.replace(group_marks, "")) else ""
    try:
        value = float(body)
    except (ValueError, OverflowError):
        return np.nan, "unreadable", ""
    return value, used, groups + gaps


def is_measurement_dtype(dtype: np.dtype | ExtensionDtype) -> bool:
    """Whether a column's dtype holds real numbers (not true/false, not complex).

    Examples
    --------
    >>> is_measurement_dtype(np.dtype("int64")), is_measurement_dtype(np.dtype("bool"))
    (True, False)
    """
    return bool(
        pd.api.types.is_numeric_dtype(dtype)
        and not pd.api.types.is_bool_dtype(dtype)
        and not pd.api.types.is_complex_dtype(dtype)
    )


def number_cells(series: pd.Series) -> NumberText:
    """Any column's cells as numbers: numbers pass, text is read by :func:`read_number_text`.

    True/false cells, lists, timestamps and the like are unreadable, whatever their
    column's dtype.

    Examples
    --------
    >>> number_cells(pd.Series([1.5, "2,5", None, True], dtype=object)).values.tolist()
    [1.5, 2.5, nan, nan]
    >>> number_cells(pd.Series([1.5, "2,5", None, True], dtype=object)).unreadable.tolist()
    [3]
    """
    dtype = series.dtype
    nothing = np.array([], dtype=np.intp)
    if pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_complex_dtype(dtype):
        return NumberText(
            np.full(len(series), np.nan),
            np.zeros(len(series), bool),
            np.arange(len(series)),
            nothing,
        )
    if is_measurement_dtype(dtype):
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        return NumberText(values, np.isnan(values), nothing, nothing)
    if isinstance(dtype, pd.StringDtype):
        return read_number_text(series)
    cells = series.to_numpy(dtype=object)
    number = np.array([is_real_number(v, finite=False) for v in cells], dtype=bool)
    is_text = np.array([isinstance(v, str) for v in cells], dtype=bool)
    missing = ~number & ~is_text & np.array([is_missing_cell(v) for v in cells], dtype=bool)
    odd = ~number & ~is_text & ~missing
    read = read_number_text(pd.Series(cells, dtype=object).where(is_text, None))
    values = read.values.copy()
    values[number] = [cell_float(v) for v in cells[number]]
    values[odd] = np.nan
    return NumberText(
        values=values,
        blank=read.blank & ~number & ~odd,
        unreadable=np.union1d(read.unreadable, np.flatnonzero(odd)).astype(np.intp),
        unsettled=read.unsettled,
        decimal=read.decimal,
        evidence=read.evidence,
        thousands=read.thousands,
    )


def numeric_values(frame: pd.DataFrame, column: Hashable) -> pd.Series:
    """The column as float64; text numbers and decimal commas converted.

    Cells that hold something other than a number, a blank or a missing value
    raise a QCDataError listing their rows, and so does a cell whose decimal mark is in
    doubt (see :func:`read_number_text`). Missing and infinite values stay in the result
    as NaN/inf for the caller to count and drop.

    Examples
    --------
    >>> f = pd.DataFrame({"w": ["500,5", " 1.499,8", "", "501"]})
    >>> numeric_values(f, "w").tolist()
    [500.5, 1499.8, nan, 501.0]
    """
    series = frame[column]
    if pd.api.types.is_bool_dtype(series.dtype):
        raise QCDataError(
            f"Column {shown(column)} holds true/false values, not measurements; "
            "choose the column with the measured values."
        )
    read = number_cells(series)
    if read.unreadable.size:
        cells = series.to_numpy(dtype=object)  # boxed only to quote the bad cells
        examples = ", ".join(shown(str(cells[i])) for i in read.unreadable[:3])
        raise QCDataError(
            f"Column {shown(column)} has cells that are not numbers ({examples}) in "
            f"{row_list(read.unreadable)}; correct or blank them in the source."
        )
    if read.unsettled.size:
        raise QCDataError(unsettled_message(column, read, series.to_numpy(dtype=object)))
    return pd.Series(read.values, index=series.index, name=series.name)


def unsettled_message(column: object, read: NumberText, cells: np.ndarray) -> str:
    """The message for cells whose decimal mark is in doubt (see :func:`read_number_text`)."""
    doubt = f"{cell_examples(cells, read.unsettled)} in {row_list(read.unsettled)}"
    marks = "; ".join(
        f"{name} in {row_list(read.decimal[mark])}"
        for mark, name in ((",", "comma"), (".", "point"))
        if mark in read.decimal
    )
    why = (
        f"uses both decimal marks ({marks}), so {doubt} could be read either way"
        if marks
        else f"has numbers such as {doubt} whose mark could be a decimal or a thousands mark, "
        "and no other cell settles it"
    )
    return (
        f"Column {shown(column)} {why} (1.234 or 1234); pass decimal=',' or decimal='.' to "
        "qx.read, or write the column with one decimal mark in the source."
    )

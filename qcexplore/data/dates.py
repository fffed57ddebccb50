"""Dates and times written as text, and whether a time column is a time line.

The order of day and month is taken from the values (a number above 12 settles it; dotted
dates are day-first, common practice); what the values cannot settle is refused with the
argument to pass. Mixed zone-aware and naive times are refused with their rows.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Hashable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.coding import is_real_number
from qcexplore.data.coding import shorten as shown
from qcexplore.data.numbers import number_cells
from qcexplore.data.validate import (
    MISSING_TEXT,
    cell_examples,
    column_name,
    is_missing_cell,
    require_columns,
    row_list,
)
from qcexplore.errors import QCDataError

# ---- dates and times written as text ----------------------------------------------------------
_DATES = {
    "year first": r"(?P<year>\d{4})(?P<sep>[-/.])(?P<month>\d{1,2})(?P=sep)(?P<day>\d{1,2})",
    "numbers": r"(?P<one>\d{1,2})(?P<sep>[-/.])(?P<two>\d{1,2})(?P=sep)(?P<year>\d{4}|\d{2})",
    "day, month name": (
        r"(?P<day>\d{1,2})\.?[ /-]?(?P<name>[A-Za-z]{3,9})\.?,?[ /-]?\s*(?P<year>\d{4}|\d{2})"
    ),
    "month name, day": (
        r"(?P<name>[A-Za-z]{3,9})\.?[ /-]?(?P<day>\d{1,2})(?:st|nd|rd|th)?,?[ /-]\s*(?P<year>\d{4})"
    ),
}
_DATE_PATTERNS = {shape: re.compile(rf"\s*{date}\s*") for shape, date in _DATES.items()}
_CLOCK = re.compile(
    r"\s*T?\s*(?P<hour>\d{1,2}):(?P<minute>\d{2})(?::(?P<second>\d{2})(?:[.,](?P<fraction>\d{1,9}))?)?"
    r"\s*(?P<meridiem>[AaPp]\.?[Mm]\.?)?\s*(?P<zone>Z|UTC|[+-]\d{2}(?::?\d{2})?)?\s*"
)
_ISO = r"\s*\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d{1,9})?)?)?\s*"  # without a zone
_MONTHS = {
    name: number
    for number, names in enumerate(
        [
            ("jan", "january"), ("feb", "february"), ("mar", "march"), ("apr", "april"),
            ("may",), ("jun", "june"), ("jul", "july"), ("aug", "august"),
            ("sep", "sept", "september"), ("oct", "october"), ("nov", "november"),
            ("dec", "december"),
        ],
        start=1,
    )
    for name in names
}  # fmt: skip
DAY_FIRST, MONTH_FIRST = "day-first", "month-first"


def _how_to_settle(column: object) -> str:
    return (
        "pass dayfirst=True (31/12/2026) or dayfirst=False (12/31/2026) to qx.read, or a "
        "date_format such as '%d/%m/%Y'; for a table in memory convert the column first, e.g. "
        f"frame[{shown(column)}] = pd.to_datetime(frame[{shown(column)}], dayfirst=True)."
    )


@dataclass(frozen=True)
class DateText:
    """How a column of text cells reads as dates and times.

    ``values`` are the timestamps (NaT where blank or unreadable), ``order`` says how the
    day was told from the month (``"year first"``, ``"day-first"``, ``"day-first
    (dotted)"``, ``"month-first"``, ``"month names"`` or the format given), ``problem``
    is the message for cells that cannot be read as one time line (None when all can) and
    ``issue`` the same in a few words.
    """

    values: pd.Series
    order: str
    problem: str | None = None
    issue: str | None = None


def _date_and_clock(cell: str) -> tuple[str, str]:
    """A cell split before its clock time (the blank or T before the first colon)."""
    colon = cell.find(":")
    if colon < 0:
        return cell, ""
    cut = max(cell.rfind(" ", 0, colon), cell.rfind("T", 0, colon), cell.rfind("\t", 0, colon))
    return (cell[:cut], cell[cut:]) if cut > 0 else (cell, "")


def _date_shape(date: str) -> tuple[str, dict[str, str]] | None:
    for shape, pattern in _DATE_PATTERNS.items():
        match = pattern.fullmatch(date)
        if match:
            return shape, match.groupdict("")  # every group of _DATES takes part in its match
    return None


def looks_like_dates(text: pd.Series, sample: int = 50) -> bool:
    """Whether the first non-blank cells all look like dates (a cheap test before reading).

    Examples
    --------
    >>> looks_like_dates(pd.Series(["30.03.2024", "31.03.2024 06:15"]))
    True
    >>> looks_like_dates(pd.Series(["A", "30.03.2024"]))
    False
    """
    cells = [str(c) for c in text.dropna().head(4 * sample) if str(c).strip() not in MISSING_TEXT]
    return bool(cells) and all(_parts_of(c) is not None for c in cells[:sample])


def _parts_of(cell: str) -> tuple[str, dict[str, str], dict[str, str | None]] | None:
    """The shape of a cell's date, its date parts and its clock parts; None if no date."""
    date, clock = _date_and_clock(cell)
    shape = _date_shape(date)
    if shape is None:
        return None
    if not clock:
        return shape[0], shape[1], {}
    match = _CLOCK.fullmatch(clock)
    return (shape[0], shape[1], match.groupdict()) if match else None


def read_date_text(
    text: pd.Series,
    column: object,
    *,
    dayfirst: bool | None = None,
    date_format: str | None = None,
) -> DateText:
    """Dates and times written as text, with the day told from the month by the values.

    ISO dates (``2024-03-30 06:15``) are year first. Dotted dates (``30.03.2024``) are
    day-first (common practice where they are written). For slashes and dashes a first
    number above 12 shows day-first, a second number above 12 month-first; when no number
    above 12 settles it, or both kinds occur, a QCDataError names the column and the
    argument that settles it (``dayfirst=`` or ``date_format=``): the order is never
    guessed. Two-digit years follow POSIX ``%y`` (69-99 are 1969-1999, 00-68 are 20xx).
    Times with and without a time zone in one column are a ``problem``; times with
    different offsets are kept as instants in UTC.

    Messages name rows by ``text``'s index.

    Examples
    --------
    >>> days = read_date_text(pd.Series(["30/03/2024", "02/04/2024"]), "day")
    >>> days.order, days.values.dt.month.tolist()
    ('day-first', [3, 4])
    >>> read_date_text(pd.Series(["01/03/2024", "02/03/2024"]), "day")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column 'day' has dates such as '01/03/2024' that read both ...
    """
    cells = pd.Series(text.to_numpy(dtype=object), dtype=object).where(text.notna().to_numpy())
    codes, found = pd.factorize(cells, use_na_sentinel=True)
    uniques = pd.Series([str(u).strip() for u in found], dtype="string")
    blank = uniques.isin(MISSING_TEXT).to_numpy(dtype=bool)
    if date_format is not None:
        iso, order = uniques.to_numpy(dtype=object), f"format {date_format!r}"
        aware = np.array([bool(re.search(r"(?:Z|[+-]\d{2}:?\d{2})$", u)) for u in iso])
    elif (uniques.str.fullmatch(_ISO).fillna(False).to_numpy(dtype=bool) | blank).all():
        iso, order, aware = (
            uniques.to_numpy(dtype=object),
            "year first",
            np.zeros(len(uniques), bool),
        )
    else:
        iso, order, aware = _dates_as_iso(uniques.to_numpy(dtype=object), column, dayfirst)
    parsed = _timestamps(iso, date_format)
    present = codes >= 0
    present[present] = ~blank[codes[present]]
    values = pd.Series(
        parsed.array.take(codes, allow_fill=True), index=text.index, name=text.name
    ).where(present)
    shown_cells = cells.to_numpy(dtype=object)
    bad = np.flatnonzero(present & values.isna().to_numpy())
    if bad.size:
        clock_only = all(_CLOCK.fullmatch(str(shown_cells[i])) for i in bad[:20])
        hint = (
            "they are clock times without a date: join the date and the clock time into one "
            "column, e.g. frame['taken_at'] = frame['date'] + ' ' + frame['clock'], and give "
            "that as the time"
            if clock_only
            else "write them as dates such as 2026-03-29 06:15 (year first) or 29.03.2026 06:15"
        )
        return DateText(
            values,
            order,
            f"Column {shown(column)} has cells that are not times "
            f"({cell_examples(shown_cells, bad)}) in {row_list(text.index[bad])}; {hint}.",
            f"not times in {row_list(text.index[bad])}",
        )
    with_zone = present & aware[np.maximum(codes, 0)]
    if with_zone.any() and (present & ~with_zone).any():
        zoned, local = np.flatnonzero(with_zone), np.flatnonzero(present & ~with_zone)
        return DateText(
            values,
            order,
            f"Column {shown(column)} mixes times with a time zone "
            f"({cell_examples(shown_cells, zoned, 2)} in {row_list(text.index[zoned])}) and "
            f"without ({cell_examples(shown_cells, local, 2)} in {row_list(text.index[local])}), "
            "so their order is unknown; write every time with its offset (such as +02:00) or "
            "every time as local clock time.",
            "times with and without a time zone",
        )
    return DateText(values, order)


def _timestamps(text: np.ndarray, date_format: str | None) -> pd.Series:
    """Parsed text; offsets that differ are kept as instants in UTC."""
    cells = pd.Series(text, dtype=object)
    how = date_format or "ISO8601"
    try:
        return pd.to_datetime(cells, format=how, errors="coerce")
    except (ValueError, TypeError):  # several offsets, or offsets with local times
        return pd.to_datetime(cells, utc=True, format=how, errors="coerce")


def _dates_as_iso(
    uniques: np.ndarray, column: object, dayfirst: bool | None
) -> tuple[np.ndarray, str, np.ndarray]:
    """Each distinct cell as ISO text ('' where it is no date), the order used, and which
    cells carry a time zone."""
    # Split first: a long column has few distinct dates and few distinct clock times.
    split = [_date_and_clock(cell) for cell in uniques]
    dates = {date: _date_shape(date) for date in {d for d, _ in split}}
    clocks = {clock: _clock_iso(clock) for clock in {c for _, c in split}}
    order = _numbers_order(list(dates.values()), column, dayfirst)
    date_iso = {date: _date_iso(shape, order) if shape else None for date, shape in dates.items()}
    pairs = [(date_iso[d], clocks[c]) for d, c in split]
    iso = np.array(
        [date + clock[0] if date and clock is not None else "" for date, clock in pairs],
        dtype=object,
    )
    aware = np.array([clock is not None and clock[1] for _, clock in pairs], dtype=bool)
    shapes = {shape[0] for shape in dates.values() if shape}
    if "numbers" not in shapes:
        order = "year first" if "year first" in shapes or not shapes else "month names"
    return iso, order, aware


def _numbers_order(
    found: list[tuple[str, dict[str, str]] | None],
    column: object,
    dayfirst: bool | None,
) -> str:
    """Day-first or month-first for dates such as 30/03/2024, from the values or the user."""
    if dayfirst is not None:
        return DAY_FIRST if dayfirst else MONTH_FIRST
    numbers = [g for f in found if f and f[0] == "numbers" for g in [f[1]]]
    text = [f"{g['one']}{g['sep']}{g['two']}{g['sep']}{g['year']}" for g in numbers]
    day_first = [
        t for t, g in zip(text, numbers, strict=True) if int(g["one"]) > 12 >= int(g["two"])
    ]
    month_first = [
        t for t, g in zip(text, numbers, strict=True) if int(g["two"]) > 12 >= int(g["one"])
    ]
    dotted = all(g["sep"] == "." for g in numbers)
    if day_first and month_first:
        raise QCDataError(
            f"Column {shown(column)} mixes day-first dates ({shown(day_first[0])}) and "
            f"month-first dates ({shown(month_first[0])}); correct the source so the column "
            "uses one order, or pass dayfirst=True or dayfirst=False to qx.read to read the "
            "others as errors."
        )
    if month_first and dotted:
        raise QCDataError(
            f"Column {shown(column)} has dotted dates such as {shown(month_first[0])} that only "
            "read month-first, though dotted dates are day-first by custom; "
            + _how_to_settle(column)
        )
    if month_first:
        return MONTH_FIRST
    if day_first or not numbers:
        return DAY_FIRST
    if dotted:
        return f"{DAY_FIRST} (dotted)"
    raise QCDataError(
        f"Column {shown(column)} has dates such as {shown(min(text))} that read both day-first "
        "and month-first (no number above 12 settles it); " + _how_to_settle(column)
    )


def _date_iso(found: tuple[str, dict[str, str]], order: str) -> str | None:
    """A date's parts as ISO 8601 text (YYYY-MM-DD), or None when they cannot be one."""
    shape, g = found
    month: str | int | None
    if shape == "numbers":
        one, two = g["one"], g["two"]
        day, month = (one, two) if order.startswith(DAY_FIRST) else (two, one)
    elif shape == "year first":
        day, month = g["day"], g["month"]
    else:
        day, month = g["day"], _MONTHS.get(g["name"].lower())
    if month is None:
        return None
    year = int(g["year"])
    if len(g["year"]) == 2:
        year += 1900 if year >= 69 else 2000
    return f"{year:04d}-{int(month):02d}-{int(day):02d}"


def _clock_iso(clock: str) -> tuple[str, bool] | None:
    """A clock time as ISO 8601 text (THH:MM:SS with fraction and offset) and whether it
    carries a time zone; ('', False) for no clock, None when it cannot be one."""
    if not clock:
        return "", False
    match = _CLOCK.fullmatch(clock)
    if not match:
        return None
    g = match.groupdict()
    hour = int(g["hour"])
    meridiem = (g["meridiem"] or "").lower()[:1]
    if meridiem:
        if not 1 <= hour <= 12:
            return None
        hour = hour % 12 + (12 if meridiem == "p" else 0)
    zone = g["zone"] or ""
    if zone in ("Z", "UTC"):
        zone = "+00:00"
    elif zone and ":" not in zone:
        zone = f"{zone[:3]}:{zone[3:] or '00'}"
    fraction = f".{g['fraction']}" if g["fraction"] else ""
    return f"T{hour:02d}:{g['minute']}:{g['second'] or '00'}{fraction}{zone}", bool(zone)


# ---- times --------------------------------------------------------------------------------------
def parse_times(series: pd.Series, column: Hashable) -> pd.Series:
    """Timestamps (with or without time zone) or a numeric order column.

    Text is read by :func:`read_date_text` (the day told from the month by the values,
    never guessed); whole numbers that are dates written without separators are read
    as dates when year first (20260329) and refused otherwise (29032026 sorts wrongly as
    a number). Messages name rows by the series' index, which the Study keeps as the
    0-based positions of the table the user gave.

    Examples
    --------
    >>> parse_times(pd.Series(["2026-03-29 01:30", "2026-03-29 03:30"]), "t").dt.hour.tolist()
    [1, 3]
    >>> parse_times(pd.Series(["30.03.2026", "02.04.2026"]), "t").dt.month.tolist()
    [3, 4]
    """
    dtype = series.dtype
    if pd.api.types.is_datetime64_any_dtype(dtype):
        parsed = series
    elif pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_complex_dtype(dtype):
        raise QCDataError(
            f"Column {shown(column)} holds {dtype} values, not times; give timestamps or a "
            "running number as the time."
        )
    elif pd.api.types.is_numeric_dtype(dtype):
        parsed = _order_numbers(series, column)
    else:
        cells = series.to_numpy(dtype=object)
        if all(is_real_number(c, finite=False) or is_missing_cell(c) for c in cells):
            parsed = _order_numbers(
                pd.Series(number_cells(series).values, index=series.index), column
            )
        else:
            as_text = [c.isoformat() if isinstance(c, (dt.datetime, dt.date)) else c for c in cells]
            read = read_date_text(pd.Series(as_text, index=series.index, dtype=object), column)
            if read.problem:
                raise QCDataError(read.problem)
            parsed = read.values
    missing = np.flatnonzero(pd.isna(parsed).to_numpy())
    if missing.size:
        raise QCDataError(
            f"Column {shown(column)} has missing times in {row_list(series.index[missing])}; "
            "fill them in or leave the time column out."
        )
    return parsed


def _order_numbers(series: pd.Series, column: Hashable) -> pd.Series:
    """A numeric time column as float64, or as dates when its numbers are dates."""
    values = series.to_numpy(dtype=np.float64, na_value=np.nan)
    finite = values[np.isfinite(values)]
    if not finite.size or (finite != np.round(finite)).any():
        return pd.Series(values, index=series.index, name=series.name)
    if not ((finite >= 1_000_000) & (finite < 100_000_000)).all():
        return pd.Series(values, index=series.index, name=series.name)
    whole = finite.astype(np.int64)
    readings = {
        "%Y%m%d": (whole // 10_000, whole // 100 % 100, whole % 100),
        "%d%m%Y": (whole % 10_000, whole // 10_000 % 100, whole // 1_000_000),
        "%m%d%Y": (whole % 10_000, whole // 1_000_000, whole // 10_000 % 100),
    }
    valid = [form for form, parts in readings.items() if _valid_dates(*parts)]
    if valid and valid[0] == "%Y%m%d":  # year first sorts right as a number: a date
        text = pd.Series(values, index=series.index).map(
            lambda v: f"{int(v):08d}" if np.isfinite(v) else None
        )
        return pd.to_datetime(text, format="%Y%m%d", errors="coerce")
    if valid:
        choice = f" (they also read as {valid[-1]!r}: use the order the plant writes)"
        raise QCDataError(
            f"Column {shown(column)} holds numbers that are dates written without separators "
            f"(such as {int(finite[0])}); as numbers they sort in the wrong order. Convert them, "
            f"e.g. frame[{shown(column)}] = pd.to_datetime(frame[{shown(column)}].astype(str)"
            f".str.zfill(8), format={valid[0]!r}), or read the file with qx.read(path, "
            f"date_format={{{shown(column)}: {valid[0]!r}}}){choice if len(valid) > 1 else ''}."
        )
    return pd.Series(values, index=series.index, name=series.name)


def _valid_dates(year: np.ndarray, month: np.ndarray, day: np.ndarray) -> bool:
    if not ((year >= 1900) & (year <= 2100) & (month >= 1) & (month <= 12) & (day >= 1)).all():
        return False
    parts = pd.DataFrame({"year": year, "month": month, "day": day})
    return bool(pd.to_datetime(parts, errors="coerce").notna().all())


def check_time_line(frame: pd.DataFrame, time: Hashable, subgroup: Hashable | None = None) -> None:
    """Refuse an order column that starts again in blocks instead of running on.

    ``frame`` holds the parsed time column (see :func:`parse_times`) in the order of the
    table the user gave, its index the 0-based rows. A day-of-month column beside a month
    column (1..31, 1..30, ...), or a sample number that starts again in every lot, would
    be sorted into an interleaved order (May 1, June 1, May 2, ...); such a column is
    refused with how to make one time or keep the row order. A column is taken to start
    again when, after a step backwards, it returns to or below the first value of the
    block before and overlaps it; rows in no order at all (more than a third of them
    step backwards) are only sorted, unless another column changes exactly at each
    backward step. Timestamps with dates are a time line by themselves and pass.

    Examples
    --------
    >>> ok = pd.DataFrame({"t": [3.0, 1.0, 2.0, 4.0]})
    >>> check_time_line(ok, "t")
    >>> blocks = pd.DataFrame({"month": [5] * 3 + [6] * 3, "day": [1.0, 2, 3] * 2})
    >>> check_time_line(blocks, "day")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Column 'day' (the time) starts again at row 4 (each time ...
    """
    require_columns(frame, [time], "time")
    subgroup = column_name(subgroup, "subgroup", optional=True)
    times = frame[time]
    if pd.api.types.is_datetime64_any_dtype(times.dtype) or len(frame) < 2:
        return
    t = times.to_numpy(dtype=np.float64)
    starts = np.flatnonzero(t[1:] < t[:-1]) + 1
    if not starts.size:
        return
    bounds = np.r_[0, starts, len(t)]
    first, last = t[bounds[:-1]], t[bounds[1:] - 1]
    again = starts[(first[1:] <= first[:-1]) & (last[1:] >= first[:-1])]
    if not again.size:
        return
    block = _block_column(frame, starts, again, skip=time, prefer=subgroup)
    if block is None and starts.size + 1 > len(t) / 3:
        return
    if block is not None and block == subgroup:
        where = f" (in every subgroup: it numbers the samples within {shown(subgroup)})"
    elif block is not None:
        where = f" (each time {shown(block)} changes)"
    else:
        where = ""
    raise QCDataError(
        f"Column {shown(time)} (the time) starts again at {row_list(frame.index[again])}{where}: "
        "it counts within something larger, such as the day within a month, so sorting by it "
        "would interleave those blocks. Make one time from the columns, e.g. frame['date'] = "
        "pd.to_datetime(frame[['year', 'month', 'day']]), and give that as the time; to keep "
        f"the rows in the table's order, leave time= out; if {shown(time)} is one time line "
        "and the table is only sorted by another column, sort the table by it first."
    )


def _block_column(
    frame: pd.DataFrame,
    starts: np.ndarray,
    again: np.ndarray,
    *,
    skip: Hashable,
    prefer: Hashable | None,
) -> Hashable | None:
    """A column that changes only where the time steps back, and at every restart."""
    names = [prefer] if prefer is not None and prefer in frame.columns else []
    names += [c for c in frame.columns if c != skip and c != prefer]
    for name in names:
        try:
            codes, _ = pd.factorize(frame[name].to_numpy(dtype=object), use_na_sentinel=False)
        except TypeError:  # unhashable cells cannot mark blocks
            continue
        changes = np.flatnonzero(codes[1:] != codes[:-1]) + 1
        if np.isin(changes, starts).all() and np.isin(again, changes).all():
            return name
    return None

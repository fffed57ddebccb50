"""Reading tables from files and from in-memory table objects.

Text files are read the way plant PCs and spreadsheet exports write them: the encoding
from the byte-order mark (UTF-8, UTF-16, UTF-32) or else UTF-8, falling back to the
single-byte Windows encoding cp1252 (Western European) and then latin-1 for text that is
not UTF-8; the delimiter from the lines; a trailing delimiter on every row ignored; each
column's decimal mark, thousands marks and date order from its own cells. What was found
is kept in ``frame.attrs["qcexplore_read"]`` and worded in one line by
:func:`describe_reading`.
"""

from __future__ import annotations

import codecs
import io
import os
import re
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any, Literal, TypedDict

import numpy as np
import pandas as pd

from qcexplore.data.coding import is_real_number
from qcexplore.data.coding import shorten as shown
from qcexplore.data.dates import DateText, looks_like_dates, read_date_text
from qcexplore.data.numbers import NumberText, read_number_text, unsettled_message
from qcexplore.data.validate import row_list
from qcexplore.errors import QCDataError

#: The key of ``DataFrame.attrs`` that holds what :func:`read` found.
READ_ATTRS = "qcexplore_read"

_SNIFF_BYTES = 64 * 1024
_CHUNK_ROWS = 200_000
_PROGRESS_BYTES = 20 * 1024 * 1024  # smaller files load in about a second
_DELIMITERS = (";", "\t", ",", "|")  # preferred in this order when the lines fit several
_DELIMITER_NAMES = {";": "semicolon", "\t": "tab", ",": "comma", "|": "vertical bar"}
_BOMS = (  # the longest first: UTF-32's little-endian mark starts like UTF-16's
    (codecs.BOM_UTF32_LE, "utf-32"),
    (codecs.BOM_UTF32_BE, "utf-32"),
    (codecs.BOM_UTF8, "utf-8-sig"),
    (codecs.BOM_UTF16_LE, "utf-16"),
    (codecs.BOM_UTF16_BE, "utf-16"),
)
_TRUE_FALSE = {
    "True": True,
    "TRUE": True,
    "true": True,
    "False": False,
    "FALSE": False,
    "false": False,
}

#: Called with the fraction of a large file read so far (0..1).
Progress = Callable[[float], None]


def _encoding(path: Path, head: bytes, requested: str | None) -> tuple[str, str]:
    """The codec to read with and how to name it to people."""
    if requested is not None:
        try:
            codecs.lookup(requested)
        except LookupError:
            raise QCDataError(
                f"encoding={shown(requested)} is not a known text encoding; give e.g. "
                "'utf-8', 'cp1252' or 'utf-16', or leave it out to detect it."
            ) from None
        return requested, f"{requested} (as given)"
    for mark, codec in _BOMS:
        if head.startswith(mark):
            label = codec.replace("-sig", "").upper()
            return codec, f"{label} with byte-order mark"
    if b"\x00" in head:
        raise QCDataError(
            f"{path.name} holds zero bytes, so it is not a text table (or it is UTF-16 without "
            "a byte-order mark): save it as CSV (UTF-8) or Excel, or pass encoding='utf-16-le'."
        )
    if _decodes(path, "utf-8"):
        return "utf-8", "UTF-8"
    # latin-1 decodes any byte: the last resort where cp1252 leaves a byte undefined.
    codec = "cp1252" if _decodes(path, "cp1252") else "latin-1"
    return codec, f"{codec} (not valid UTF-8; read as single-byte Western European text)"


def _decodes(path: Path, encoding: str) -> bool:
    decoder = codecs.getincrementaldecoder(encoding)()
    with path.open("rb") as handle:
        try:
            while block := handle.read(1 << 20):
                decoder.decode(block)
            decoder.decode(b"", final=True)
        except UnicodeDecodeError:
            return False
    return True


def _sample_lines(path: Path, encoding: str) -> list[str]:
    with path.open("rb") as handle:
        raw = handle.read(_SNIFF_BYTES)
    text = codecs.getincrementaldecoder(encoding)(errors="replace").decode(raw)
    lines = text.lstrip("\ufeff").splitlines()
    if len(raw) == _SNIFF_BYTES and len(lines) > 1:
        lines = lines[:-1]  # the last line may be cut in the middle
    return [line for line in lines[:200] if line.strip()]


def _delimiter(lines: list[str], suffix: str) -> str:
    """The delimiter whose count on the header line most rows repeat."""
    if suffix == ".tsv":
        return "\t"
    unquoted = [re.sub(r'"[^"]*"', "", line) for line in lines[:100]]
    best, best_score = ",", 0.0
    for delimiter in _DELIMITERS:
        counts = [line.rstrip(delimiter).count(delimiter) for line in unquoted]
        if not counts[0]:
            continue
        score = sum(c == counts[0] for c in counts) / len(counts)
        if score > best_score:
            best, best_score = delimiter, score
    return best


class _CsvOptions(TypedDict):
    """The arguments of pd.read_csv that every delimited file is read with."""

    sep: str
    dtype: type[str]
    skipinitialspace: bool
    index_col: Literal[False]
    skiprows: int


def _read_delimited(
    path: Path,
    progress: Progress | None,
    encoding: str | None,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    with path.open("rb") as handle:
        head = handle.read(_SNIFF_BYTES)
    if not head.strip():
        raise QCDataError(f"{path.name} is empty: export the data again.")
    codec, encoding_label = _encoding(path, head, encoding)
    lines = _sample_lines(path, codec)
    if not lines:
        raise QCDataError(f"{path.name} is empty: export the data again.")
    skip = 0
    hint = re.fullmatch(r"\s*sep=(.)\s*", lines[0])  # a spreadsheet's "sep=;" first line
    if hint:
        delimiter, skip, lines = hint.group(1), 1, lines[1:]
        if not lines:
            raise QCDataError(f"{path.name} has no header line after 'sep=': export it again.")
    else:
        delimiter = _delimiter(lines, path.suffix.lower())
    options = _CsvOptions(
        sep=delimiter,
        dtype=str,
        skipinitialspace=True,
        index_col=False,  # a delimiter at the end of every row must not shift the columns
        skiprows=skip,
    )
    size = path.stat().st_size
    with path.open("rb") as handle:
        text = io.TextIOWrapper(handle, encoding=codec, newline="")
        if progress is None or size < _PROGRESS_BYTES:
            table = pd.read_csv(text, **options)
        else:
            parts = []
            for chunk in pd.read_csv(text, chunksize=_CHUNK_ROWS, **options):
                parts.append(chunk)
                progress(min(handle.tell() / size, 1.0))
            progress(1.0)
            table = pd.concat(parts, ignore_index=True)
    trailing = all(line.rstrip().endswith(delimiter) for line in lines[1:] or lines)
    last = table.columns[-1] if len(table.columns) else None
    if (
        trailing
        and isinstance(last, str)
        and last.startswith("Unnamed:")
        and table[last].isna().all()
    ):
        table = table.drop(columns=[last])
    found = {
        "encoding": encoding_label,
        "delimiter": delimiter,
        "trailing_delimiter": trailing,
    }
    return table, found


def _typed_columns(
    table: pd.DataFrame,
    found: dict[str, Any],
    *,
    decimal: str | None,
    dayfirst: bool | Mapping[str, bool] | None,
    date_format: str | Mapping[str, str] | None,
) -> pd.DataFrame:
    """Each text column as dates, numbers, true/false or text, as its cells show."""
    columns: dict[Any, pd.Series] = {}
    numbers: dict[Any, NumberText] = {}
    dates: dict[str, str] = {}
    notes: list[str] = []
    for name in table.columns:
        text = table[name]
        if text.isna().all():
            columns[name] = text.astype(np.float64)  # an empty column, as pandas reads it
            continue
        dated = _dates(text, name, dayfirst=dayfirst, date_format=date_format, notes=notes)
        if dated is not None:
            columns[name], dates[name] = dated.values, dated.order
            continue
        numbers[name] = read_number_text(text, decimal=decimal)
        columns[name] = text
    default = _file_decimal(numbers.values(), found["delimiter"], decimal)
    for name, reading in numbers.items():
        if default is not None and not reading.evidence and reading.unsettled.size:
            reading = numbers[name] = read_number_text(table[name], default=default)
        columns[name] = _converted(table[name], reading, name, notes)
    used = [r for name, r in numbers.items() if pd.api.types.is_numeric_dtype(columns[name])]
    marks = sorted({mark for r in used for mark in r.decimal})
    found.update(
        decimal=marks[0] if len(marks) == 1 else ("mixed" if marks else None),
        thousands="".join(sorted({mark for r in used for mark in r.thousands})) or None,
        dates=dates,
        notes=notes,
    )
    return pd.DataFrame(columns, index=table.index)


def _dates(
    text: pd.Series,
    name: Any,
    *,
    dayfirst: bool | Mapping[str, bool] | None,
    date_format: str | Mapping[str, str] | None,
    notes: list[str],
) -> DateText | None:
    """The column as dates when the user said so or its cells look like dates, else None."""
    first = dayfirst.get(name) if isinstance(dayfirst, Mapping) else dayfirst
    if isinstance(date_format, Mapping) and name in date_format:
        read = read_date_text(text, name, dayfirst=first, date_format=date_format[name])
        if read.problem:
            raise QCDataError(f"{read.problem} (date_format {shown(date_format[name])})")
        return read
    if isinstance(date_format, str):
        read = read_date_text(text, name, date_format=date_format)
        if read.problem is None:
            return read
    if not looks_like_dates(text):
        return None
    read = read_date_text(text, name, dayfirst=first)
    if read.problem is None:
        return read
    notes.append(f"{shown(name)} kept as text ({read.issue})")
    return None


def _file_decimal(
    readings: Iterable[NumberText], delimiter: str, decimal: str | None
) -> str | None:
    """The decimal mark the file's number columns show; a comma-separated file's is the point."""
    if decimal is not None:
        return decimal
    seen = {mark for r in readings if not r.unreadable.size for mark in r.evidence}
    if len(seen) == 1:
        return next(iter(seen))
    # Fields separated by commas cannot hold decimal commas unquoted (common practice).
    return "." if delimiter == "," and not seen else None


def _converted(text: pd.Series, reading: NumberText, name: Any, notes: list[str]) -> pd.Series:
    """A column as int64 or float64 when every cell is a number, as bool or text otherwise."""
    if reading.unreadable.size:
        if not text.isna().any() and text.isin(list(_TRUE_FALSE)).all():
            return text.map(_TRUE_FALSE).astype(bool)
        if 2 * reading.unreadable.size < (~reading.blank).sum():  # mostly numbers: say why not
            notes.append(f"{shown(name)} kept as text ({row_list(reading.unreadable)} not numbers)")
        return text
    if reading.unsettled.size:
        raise QCDataError(unsettled_message(name, reading, text.to_numpy(dtype=object)))
    mixed = reading.mixed_marks()
    if mixed:
        notes.append(f"{shown(name)} {mixed}")
    values = reading.values
    if reading.whole and np.abs(values).max() < 2**63:
        return pd.Series(values.astype(np.int64), index=text.index, name=text.name)
    return pd.Series(values, index=text.index, name=text.name)


def _sheet(sheet: str | float) -> str | int:
    return sheet if isinstance(sheet, str) else int(sheet)


def _from_table_object(source: object) -> pd.DataFrame | None:
    if isinstance(source, pd.DataFrame):
        return source.copy()
    module = type(source).__module__.split(".")[0]
    if module == "polars" and hasattr(source, "to_pandas"):
        return source.to_pandas()
    if module == "pyarrow" and hasattr(source, "to_pandas"):
        return source.to_pandas()
    return None


def _check_options(
    sheet: object, decimal: object, dayfirst: object, date_format: object, progress: object
) -> None:
    """Refuse a malformed argument of read before any file is opened."""
    position = is_real_number(sheet) and float(sheet).is_integer() and float(sheet) >= 0
    if not (sheet is None or isinstance(sheet, str) or position):
        raise QCDataError(f"sheet={shown(sheet)}: give the sheet's name or its 0-based position.")
    if not (decimal is None or (isinstance(decimal, str) and decimal in (",", "."))):
        raise QCDataError(f"decimal={shown(decimal)}: give ',' or '.', or leave it out.")
    for name, value, kind in (("dayfirst", dayfirst, bool), ("date_format", date_format, str)):
        entries = value.values() if isinstance(value, Mapping) else [value]
        if not all(v is None or isinstance(v, kind) for v in entries):
            example = "True" if kind is bool else "'%d.%m.%Y'"
            raise QCDataError(
                f"{name}={shown(value)}: give {example}, a dict of column names to such values, "
                "or leave it out."
            )
    if progress is not None and not callable(progress):
        raise QCDataError(f"progress={shown(progress)} is not a function: pass a function or None.")


def _path_words(path: Path) -> str:
    """A path in a message: in full when short, else its file name and its length, so the
    name the user typed is always there."""
    text = str(path)
    return repr(text) if len(text) <= 80 else f"{path.name!r} (in a path of {len(text)} characters)"


def read(
    source: str | os.PathLike | object,
    *,
    sheet: str | int | None = None,
    progress: Progress | None = None,
    dayfirst: bool | Mapping[str, bool] | None = None,
    date_format: str | Mapping[str, str] | None = None,
    decimal: str | None = None,
    encoding: str | None = None,
) -> pd.DataFrame:
    """Read a table from a file or an in-memory table into a new pandas DataFrame.

    Delimited text is read as the cells show: each column becomes dates, numbers,
    true/false or text. A date column's day is told from its month by the values (a
    number above 12 settles it; dotted dates are day-first); where nothing settles it,
    the read is refused with the column named, never guessed. What was found (format,
    encoding, delimiter, decimal and thousands marks, date order, notes) is kept in
    ``frame.attrs["qcexplore_read"]``; :func:`describe_reading` words it in one line.

    Parameters
    ----------
    source : path or table
        A CSV/TSV/TXT file (delimiter and decimal comma detected), a Parquet file
        (``.parquet``, ``.pq``; needs pyarrow), an Excel workbook (``.xlsx``,
        ``.xlsm``, ``.xls``; needs openpyxl), or a pandas, polars or pyarrow table.
    sheet : name or 0-based position of the Excel sheet (default: the first).
    progress : called with the fraction read, for delimited files over 20 MB.
    dayfirst : for text files, True for 31/12/2026, False for 12/31/2026; or a dict
        ``{column: True/False}``. Needed only where the values cannot tell.
    date_format : for text files, a format such as ``"%d.%m.%Y %H:%M"`` tried on every
        column, or a dict ``{column: format}`` that must fit (``"%d%m%Y"`` reads
        30032024 as a date).
    decimal : for text files, ``","`` or ``"."`` to settle cells such as ``1.234``
        whose mark could be a decimal or a thousands mark.
    encoding : for text files, the encoding (detected when left out).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "w.csv"
    >>> _ = p.write_text("day;weight\\n30.03.2024;500,5\\n02.04.2024;499,8\\n")
    >>> frame = read(p)
    >>> frame["weight"].tolist(), frame["day"].dt.month.tolist()
    ([500.5, 499.8], [3, 4])
    >>> print(describe_reading(frame))
    w.csv: text, UTF-8, semicolon-separated, decimal comma; dates: 'day' day-first
    """
    _check_options(sheet, decimal, dayfirst, date_format, progress)
    table = _from_table_object(source)
    if table is not None:
        return table
    if not isinstance(source, (str, os.PathLike)):
        raise QCDataError(
            f"Cannot read a {type(source).__name__}: give a file path or a pandas, "
            "polars or pyarrow table."
        )
    path = Path(source)
    if not path.exists():
        raise QCDataError(f"File {_path_words(path)} not found: check the path.")
    if path.is_dir():
        raise QCDataError(f"{_path_words(path)} is a folder, not a file: give the data file.")
    suffix = path.suffix.lower()
    found: dict[str, Any] = {"source": path.name}
    try:
        if suffix in (".parquet", ".pq"):
            table = pd.read_parquet(path)
            found["format"] = "Parquet"
        elif suffix in (".xlsx", ".xlsm", ".xls"):
            with path.open("rb") as handle:
                table = pd.read_excel(handle, sheet_name=0 if sheet is None else _sheet(sheet))
            found.update(format="Excel", sheet=sheet if sheet is not None else 0)
        else:
            table, text_found = _read_delimited(path, progress, encoding)
            found.update(format="text", **text_found)
            table = _typed_columns(
                table, found, decimal=decimal, dayfirst=dayfirst, date_format=date_format
            )
    except QCDataError:
        raise
    except ImportError as error:
        raise QCDataError(
            f"Reading {path.name} needs an optional package ({error.name}): "
            "pip install 'qcexplore[excel]' or 'qcexplore[parquet]'."
        ) from None
    except (ValueError, OSError, UnicodeError, pd.errors.ParserError) as error:
        raise QCDataError(_read_failure(path, error)) from None
    table.attrs[READ_ATTRS] = found
    return table


def _read_failure(path: Path, error: Exception) -> str:
    """A one-line message for a file the readers could not take apart."""
    text = str(error).strip()
    fields = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", text)
    if fields:
        expected, line, saw = fields.groups()
        return (
            f"Could not read {path.name}: line {line} has {saw} fields where the header has "
            f"{expected}; a cell may hold the delimiter (put such cells in quotes) or the "
            "header may lack a name."
        )
    first_line = text.splitlines()[0] if text else type(error).__name__
    if len(first_line) > 200:
        first_line = shown(first_line, 200)
    return (
        f"Could not read {path.name} as a table ({first_line}); "
        "save it as CSV, Excel or Parquet and try again."
    )


def describe_reading(frame: pd.DataFrame | Mapping[str, Any]) -> str:
    """What :func:`read` found, in one line for the command line and the explorer.

    ``frame`` is a table from :func:`read` (or its ``attrs["qcexplore_read"]``); a table
    that did not come from a file gives ``""``.

    Examples
    --------
    >>> describe_reading({"source": "w.csv", "format": "text", "encoding": "UTF-8",
    ...                   "delimiter": ",", "decimal": ".", "thousands": None, "dates": {}})
    'w.csv: text, UTF-8, comma-separated, decimal point'
    """
    found = frame.attrs.get(READ_ATTRS, {}) if isinstance(frame, pd.DataFrame) else frame
    if not found:
        return ""
    parts = [found.get("format", "table")]
    if found.get("format") == "Excel":
        parts.append(f"sheet {shown(found.get('sheet', 0))}")
    if found.get("format") == "text":
        delimiter = found["delimiter"]
        parts += [
            found["encoding"],
            f"{_DELIMITER_NAMES.get(delimiter, repr(delimiter))}-separated",
        ]
        if found.get("trailing_delimiter"):
            parts.append("a delimiter at the end of every row")
        marks = {",": "decimal comma", ".": "decimal point", "mixed": "decimal comma and point"}
        if found.get("decimal") in marks:
            parts.append(marks[found["decimal"]])
        if found.get("thousands"):
            names = {".": "'.'", ",": "','", " ": "space"}
            parts.append("thousands " + " and ".join(names[m] for m in found["thousands"]))
    line = f"{found.get('source', 'table')}: " + ", ".join(parts)
    by_order: dict[str, list[str]] = {}
    for column, order in found.get("dates", {}).items():
        by_order.setdefault(order, []).append(shown(column))
    dates = "; ".join(f"{', '.join(cols)} {order}" for order, cols in by_order.items())
    if dates:
        line += f"; dates: {dates}"
    if found.get("notes"):
        line += "; " + "; ".join(found["notes"])
    return line

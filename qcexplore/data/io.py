"""Reading tables from files and from in-memory table objects."""

from __future__ import annotations

import csv
import io
import os
import re
from collections.abc import Callable
from pathlib import Path

import pandas as pd

from qcexplore.errors import QCDataError

_SNIFF_BYTES = 64 * 1024
_CHUNK_ROWS = 200_000
_PROGRESS_BYTES = 20 * 1024 * 1024  # smaller files load in about a second
_DELIMITERS = ",;\t|"
_COMMA_NUMBER = re.compile(r"(?:^|[;\t|])\s*-?\d+,\d+\s*(?=[;\t|]|$)", re.MULTILINE)

#: Called with the fraction of a large file read so far (0..1).
Progress = Callable[[float], None]


def _sniff_text(path: Path) -> tuple[str, str, str]:
    """Encoding, delimiter and decimal mark of a delimited text file."""
    raw = path.open("rb").read(_SNIFF_BYTES)
    for encoding in ("utf-8-sig", "cp1252", "latin-1"):
        try:
            sample = raw.decode(encoding)
            break
        except UnicodeDecodeError:
            continue
    lines = sample.splitlines()
    if len(raw) == _SNIFF_BYTES and len(lines) > 1:
        lines = lines[:-1]  # the last line may be cut in the middle
    sample = "\n".join(lines[:200])
    if not sample.strip():
        raise QCDataError(f"{path.name} is empty: export the data again.")
    if path.suffix.lower() == ".tsv":
        delimiter = "\t"
    else:
        try:
            delimiter = csv.Sniffer().sniff(sample, delimiters=_DELIMITERS).delimiter
        except csv.Error:
            counts = {d: lines[0].count(d) for d in _DELIMITERS}
            delimiter = max(counts, key=counts.get) if max(counts.values()) else ","
    decimal = "," if delimiter != "," and _COMMA_NUMBER.search(sample) else "."
    return encoding, delimiter, decimal


def _read_delimited(path: Path, progress: Progress | None) -> pd.DataFrame:
    encoding, delimiter, decimal = _sniff_text(path)
    options = dict(sep=delimiter, decimal=decimal, encoding=encoding, skipinitialspace=True)
    if decimal == ",":
        options["thousands"] = "."  # a decimal comma goes with a thousands point (1.499,8)
    size = path.stat().st_size
    if progress is None or size < _PROGRESS_BYTES:
        return pd.read_csv(path, **options)
    parts = []
    with path.open("rb") as handle:
        wrapper = io.TextIOWrapper(handle, encoding=encoding, newline="")
        for chunk in pd.read_csv(wrapper, chunksize=_CHUNK_ROWS, **options):
            parts.append(chunk)
            progress(min(handle.tell() / size, 1.0))
    progress(1.0)
    return pd.concat(parts, ignore_index=True)


def _from_table_object(source: object) -> pd.DataFrame | None:
    if isinstance(source, pd.DataFrame):
        return source.copy()
    module = type(source).__module__.split(".")[0]
    if module == "polars" and hasattr(source, "to_pandas"):
        return source.to_pandas()
    if module == "pyarrow" and hasattr(source, "to_pandas"):
        return source.to_pandas()
    return None


def read(
    source: str | os.PathLike | object,
    *,
    sheet: str | int | None = None,
    progress: Progress | None = None,
) -> pd.DataFrame:
    """Read a table from a file or an in-memory table into a new pandas DataFrame.

    Parameters
    ----------
    source : path or table
        A CSV/TSV/TXT file (delimiter and decimal comma detected), a Parquet file
        (``.parquet``, ``.pq``; needs pyarrow), an Excel workbook (``.xlsx``,
        ``.xlsm``, ``.xls``; needs openpyxl), or a pandas, polars or pyarrow table.
    sheet : name or 0-based position of the Excel sheet (default: the first).
    progress : called with the fraction read, for delimited files over 20 MB.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "w.csv"
    >>> _ = p.write_text("crew;weight\\nA;500,5\\nB;499,8\\n")
    >>> read(p)["weight"].tolist()
    [500.5, 499.8]
    """
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
        raise QCDataError(f"File {str(path)!r} not found: check the path.")
    if path.is_dir():
        raise QCDataError(f"{str(path)!r} is a folder, not a file: give the data file.")
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            return pd.read_parquet(path)
        if suffix in (".xlsx", ".xlsm", ".xls"):
            return pd.read_excel(path, sheet_name=0 if sheet is None else sheet)
        return _read_delimited(path, progress)
    except QCDataError:
        raise
    except ImportError as error:
        raise QCDataError(
            f"Reading {path.name} needs an optional package ({error.name}): "
            "pip install 'qcexplore[excel]' or 'qcexplore[parquet]'."
        ) from None
    except (ValueError, OSError, UnicodeDecodeError, pd.errors.ParserError) as error:
        first_line = str(error).strip().splitlines()[0] if str(error).strip() else type(error)
        raise QCDataError(
            f"Could not read {path.name} as a table ({first_line}); "
            "save it as CSV, Excel or Parquet and try again."
        ) from None

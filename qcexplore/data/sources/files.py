"""Parquet and CSV files scanned where they lie by DuckDB, never loaded whole."""

from __future__ import annotations

import glob
import os
import shutil
import tempfile
import weakref
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from qcexplore.data.coding import shorten as shown
from qcexplore.data.sources.sql import DIALECTS, Query, SqlSource
from qcexplore.data.validate import row_list
from qcexplore.errors import QCDataError

FORMATS = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".txt": "csv", ".tsv": "csv"}
_SHOWN = 5
#: The column DuckDB adds to name each row's file when a message must name rows.
_FILE_COLUMN = "qcexplore_file_"


def _format_of(path: Path) -> str | None:
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in (".gz", ".zst"):
        suffixes = suffixes[:-1]
    return FORMATS.get(suffixes[-1]) if suffixes else None


def _files(path: str | os.PathLike, format: str | None) -> tuple[list[Path], str]:
    """The files a path names (a file, a glob, or every data file under a folder), in name
    order, and their format. DuckDB reads ``key=value`` folder names as hive partitions."""
    text = os.fspath(path)
    if Path(text).is_dir():
        found = sorted(p for p in Path(text).rglob("*") if p.is_file() and _format_of(p))
    elif any(mark in text for mark in "*?["):
        found = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
    else:
        found = [Path(text)] if Path(text).is_file() else []
    if not found:
        raise QCDataError(
            f"No data file at {shown(text)}: give a Parquet or CSV file, a glob such as "
            "'data/*.parquet' or a folder of them."
        )
    if format is None:
        kinds = {_format_of(p) for p in found}
        if len(kinds) != 1 or None in kinds:
            raise QCDataError(
                f"{shown(text)} holds files of several or unknown kinds "
                f"({', '.join(sorted({p.suffix or p.name for p in found}))}); give "
                "format='parquet' or format='csv', or a glob that picks one kind."
            )
        format = kinds.pop()
    if format not in ("parquet", "csv"):
        raise QCDataError(f"format={shown(format)} is not known: give 'parquet' or 'csv'.")
    return found, format


class DuckRunner:
    """An in-process DuckDB with bounded memory, spilling to a private temporary folder,
    that never fetches an extension from the network."""

    dialect = DIALECTS["duckdb"]

    def __init__(self, *, memory_limit: str = "1GB", threads: int | None = None) -> None:
        import duckdb

        spill = tempfile.mkdtemp(prefix="qcexplore-duckdb-")
        self._connection = duckdb.connect(
            ":memory:",
            config={
                "memory_limit": memory_limit,
                "threads": threads or len(os.sched_getaffinity(0)),
                "temp_directory": spill,
                "autoinstall_known_extensions": False,
                "autoload_known_extensions": False,
            },
        )
        self._closed = weakref.finalize(self, _close, self._connection, spill)

    def fetch(self, sql: str, params: Sequence[Any] = ()) -> pd.DataFrame:
        return self._connection.execute(sql, list(params)).fetch_df()

    def types(self, relation: str) -> list[tuple[str, str]]:
        found = self._connection.execute(f"DESCRIBE SELECT * FROM {relation}").fetchall()
        return [(row[0], row[1]) for row in found]

    def close(self) -> None:
        self._closed()


def _close(connection: Any, spill: str) -> None:
    connection.close()
    shutil.rmtree(spill, ignore_errors=True)


class FileSource(SqlSource):
    """Parquet or CSV files as a Source (see :func:`scan`)."""

    def __init__(
        self, path: str | os.PathLike, *, format: str | None, memory_limit: str,
        threads: int | None,
    ) -> None:  # fmt: skip
        files, format = _files(path, format)
        self._files = files
        self._format = format
        runner = DuckRunner(memory_limit=memory_limit, threads=threads)
        super().__init__(
            runner,
            self._reader(),
            {"engine": "duckdb", "path": os.fspath(path), "format": format},
        )

    def _reader(self, **options: str) -> str:
        literal = DIALECTS["duckdb"].literal
        listed = ", ".join(literal(str(p)) for p in self._files)
        settings = {"union_by_name": "true", **options}
        if self._format == "csv":
            settings["header"] = "true"
        words = ", ".join(f"{k} = {v}" for k, v in settings.items())
        return f"read_{self._format}([{listed}], {words})"

    def _fingerprint_parts(self) -> list[str]:
        return [f"{p}\t{p.stat().st_size}\t{p.stat().st_mtime_ns}" for p in self._files]

    def where_rows(self, condition: str) -> str:
        """The rows where ``condition`` holds, as 1-based rows of their files."""
        name = self.dialect.literal(_FILE_COLUMN)
        if self._format == "parquet":
            numbered = (
                f"SELECT *, file_row_number + 1 AS row_ FROM "
                f"{self._reader(filename=name, file_row_number='true')}"
            )
        else:
            numbered = (
                f"SELECT *, ROW_NUMBER() OVER (PARTITION BY {self.q(_FILE_COLUMN)}) AS row_ "
                f"FROM {self._reader(filename=name)}"
            )
        found = self.fetch(
            Query(),
            f"SELECT {self.q(_FILE_COLUMN)} AS file, row_, COUNT(*) OVER () AS total FROM "
            f"({numbered}) AS b WHERE {condition} ORDER BY file, row_ LIMIT {_SHOWN}",
        )
        total = int(found["total"].iloc[0]) if len(found) else 0
        more = f" and {total - len(found)} more" if total > len(found) else ""
        if len(self._files) == 1:
            return row_list(found["row_"].to_numpy() - 1) + more
        parts = [
            f"{row_list(group['row_'].to_numpy() - 1)} of {Path(str(file)).name}"
            for file, group in found.groupby("file", sort=True)
        ]
        return "; ".join(parts) + more


def scan(
    path: str | os.PathLike,
    *,
    format: str | None = None,
    memory_limit: str = "1GB",
    threads: int | None = None,
) -> FileSource:
    """Parquet or CSV files as a Source, scanned by DuckDB where they lie.

    ``path`` is one file, a glob (``"line3/*.parquet"``, ``"**"`` for sub-folders) or a
    folder (every Parquet or CSV file under it; ``key=value`` folder names become columns,
    as hive partitions). Nothing is loaded whole: each question is one query. DuckDB keeps
    within ``memory_limit`` (it spills to a private temporary folder beyond it) and uses
    ``threads`` (default: the processors this process may use).

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> pd.DataFrame({"w": [1.0, 2.0, 4.0]}).to_csv(folder / "a.csv", index=False)
    >>> s = scan(folder / "a.csv")
    >>> s.n_rows, s.columns
    (3, {'w': 'number'})
    >>> s.close()
    """
    return FileSource(path, format=format, memory_limit=memory_limit, threads=threads)

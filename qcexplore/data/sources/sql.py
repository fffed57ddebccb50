"""One SQL builder for every engine: the reductions of a Source as queries, a dialect table
for the few places where DuckDB, PostgreSQL and Spark SQL differ.

Values in filters travel as query parameters; the only text pasted into a query is quoted
identifiers and constants of our own (weekday names, shift names, file paths), each written
by its dialect's quoting rule.
"""

from __future__ import annotations

import hashlib
import json
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any, Protocol

import numpy as np
import pandas as pd

from qcexplore.data.derive import WEEKDAYS, shift_starts
from qcexplore.data.sources.base import (
    Between,
    CellMoments,
    Where,
    allocate,
    histogram_scale,
    require_known,
    require_size,
    tidy_cells,
)
from qcexplore.data.validate import MISSING_TEXT
from qcexplore.errors import QCDataError


@dataclass(frozen=True)
class Dialect:
    """How one engine writes the few things the queries need beyond plain SQL.

    Templates take ``{x}`` (a double), ``{d}`` (a date) or ``{columns}``; ``row_hash``
    has one parameter marker for the seed.
    """

    name: str
    quote_mark: str
    double: str
    text: str
    nan: str
    infinite: str
    try_cast: str | None  # "{x}", "{type}"; None where the engine has no TRY_CAST
    timestamp: str
    isodow: str
    day_before: str
    row_hash: str
    backslash_escapes: bool = False

    def quote(self, name: str) -> str:
        mark = self.quote_mark
        return f"{mark}{name.replace(mark, mark * 2)}{mark}"

    def literal(self, text: str) -> str:
        if self.backslash_escapes:
            text = text.replace("\\", "\\\\")
        return "'" + text.replace("'", "''") + "'"

    def finite(self, x: str) -> str:
        return (
            f"({x} IS NOT NULL AND NOT ({self.nan.format(x=x)}) "
            f"AND NOT ({self.infinite.format(x=x)}))"
        )


DIALECTS = {
    "duckdb": Dialect(
        name="duckdb",
        quote_mark='"',
        double="DOUBLE",
        text="VARCHAR",
        nan="isnan({x})",
        infinite="isinf({x})",
        try_cast="TRY_CAST({x} AS {type})",
        timestamp="TIMESTAMP",
        isodow="isodow({d})",
        day_before="CAST({d} - INTERVAL 1 DAY AS DATE)",
        row_hash="hash(?, {columns})",
    ),
    "postgresql": Dialect(
        name="postgresql",
        quote_mark='"',
        double="double precision",
        text="text",
        nan="{x} = 'NaN'::float8",
        infinite="{x} IN ('Infinity'::float8, '-Infinity'::float8)",
        try_cast=None,
        timestamp="timestamp",
        isodow="CAST(EXTRACT(ISODOW FROM {d}) AS integer)",
        day_before="({d} - 1)",
        row_hash="hashtextextended(CAST(ROW({columns}) AS text), ?)",
    ),
    "spark": Dialect(
        name="spark",
        quote_mark="`",
        double="DOUBLE",
        text="STRING",
        nan="isnan({x})",
        infinite="abs({x}) = CAST('Infinity' AS DOUBLE)",
        try_cast="try_cast({x} AS {type})",
        timestamp="TIMESTAMP",
        isodow="(weekday({d}) + 1)",
        day_before="date_sub({d}, 1)",
        row_hash="xxhash64(?, {columns})",
        backslash_escapes=True,
    ),
}


class Runner(Protocol):
    """The engine behind a SqlSource: runs a query with ``?`` parameter markers."""

    dialect: Dialect

    def fetch(self, sql: str, params: Sequence[Any] = ()) -> pd.DataFrame: ...

    def types(self, relation: str) -> list[tuple[str, str]]: ...

    def close(self) -> None: ...


_NUMBER_TYPES = {"tinyint", "smallint", "integer", "int", "bigint", "hugeint", "utinyint",
                 "usmallint", "uinteger", "ubigint", "uhugeint", "double", "float", "real",
                 "decimal", "numeric", "long", "short", "byte", "int2", "int4", "int8",
                 "float4", "float8", "double precision"}  # fmt: skip
_TEXT_TYPES = {"varchar", "text", "string", "char", "character", "character varying", "bpchar"}


def kind_of_type(name: str) -> str:
    """The Source kind of an engine's type name.

    Examples
    --------
    >>> kind_of_type("DECIMAL(18,3)"), kind_of_type("timestamp with time zone")
    ('number', 'time')
    """
    base = name.lower().split("(")[0].strip()
    if base in _NUMBER_TYPES:
        return "number"
    if base in _TEXT_TYPES or base.startswith("varchar"):
        return "text"
    if base.startswith("timestamp") or base in ("date", "datetime"):
        return "time"
    if base in ("boolean", "bool"):
        return "bool"
    return "other"


class Query:
    """Query text and its parameters, built left to right so markers and values agree."""

    def __init__(self) -> None:
        self.params: list[Any] = []

    def bind(self, value: Any) -> str:
        self.params.append(value.item() if isinstance(value, np.generic) else value)
        return "?"


def _condition(column: str, wanted: Any, query: Query) -> str:
    if isinstance(wanted, Between):
        parts = []
        if wanted.low is not None:
            parts.append(f"{column} >= {query.bind(wanted.low)}")
        if wanted.high is not None:
            parts.append(f"{column} < {query.bind(wanted.high)}")
        return " AND ".join(parts) or "1 = 1"
    if isinstance(wanted, (list, tuple, set, frozenset)):
        levels = [w for w in wanted if w is not None]
        inside = f"{column} IN ({', '.join(query.bind(w) for w in levels)})" if levels else "1 = 0"
        return f"({inside} OR {column} IS NULL)" if None in wanted else inside
    if wanted is None:
        return f"{column} IS NULL"
    return f"{column} = {query.bind(wanted)}"


@dataclass(frozen=True)
class Intake:
    """What the intake checks found: rows left out of the value and the columns added.

    Examples
    --------
    >>> Intake(missing=2, infinite=1, derived=("hour",)).describe()
    '2 missing value(s); 1 infinite value(s) left out'
    """

    missing: int = 0
    infinite: int = 0
    derived: tuple[str, ...] = ()

    @property
    def count(self) -> int:
        return self.missing + self.infinite

    def describe(self) -> str:
        parts = [
            f"{count} {what} value(s)"
            for count, what in ((self.missing, "missing"), (self.infinite, "infinite"))
            if count
        ]
        return "; ".join(parts) + " left out" if parts else "no rows left out"


class SqlSource:
    """A table or query on a SQL engine as a :class:`~qcexplore.data.sources.base.Source`.

    ``relation`` is what follows FROM (a quoted table, a table function or a parenthesised
    query with an alias); ``description`` says how to open it again (no secrets).
    """

    def __init__(self, runner: Runner, relation: str, description: Mapping[str, str]) -> None:
        self._runner = runner
        self._relation = relation
        self._description = dict(description)
        self._centres: dict[str, float] = {}
        self._lock = threading.Lock()

    def __reduce__(self) -> tuple[Any, tuple[dict[str, str]]]:
        # Pickled as its description: a copy re-opens the engine and carries no secret.
        return _reopen, (self.description,)

    def __repr__(self) -> str:
        words = ", ".join(f"{k}={v!r}" for k, v in self._description.items() if k != "engine")
        return f"{type(self).__name__}({self._description['engine']}: {words})"

    @property
    def dialect(self) -> Dialect:
        return self._runner.dialect

    def fetch(self, query: Query, text: str) -> pd.DataFrame:
        with self._lock:  # one engine connection serves one query at a time
            return self._runner.fetch(text, query.params)

    def close(self) -> None:
        self._runner.close()

    def __enter__(self) -> SqlSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- what the table is ----------------------------------------------------------------
    @cached_property
    def columns(self) -> dict[str, str]:
        return {name: kind_of_type(kind) for name, kind in self._runner.types(self._relation)}

    @cached_property
    def n_rows(self) -> int:
        return self.count()

    @cached_property
    def fingerprint(self) -> str:
        parts = [json.dumps(self._description, sort_keys=True), *self._fingerprint_parts()]
        return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:16]

    def _fingerprint_parts(self) -> list[str]:
        """What changes with the data; engines with cheaper signs (file sizes) override it."""
        return [str(self.n_rows), repr(sorted(self.columns.items()))]

    @property
    def description(self) -> dict[str, str]:
        return dict(self._description)

    # ---- query pieces ------------------------------------------------------------------------
    def q(self, name: str) -> str:
        return self.dialect.quote(name)

    def _where(self, where: Where | None, query: Query) -> str:
        if not where:
            return "1 = 1"
        require_known(list(where), self.columns, "a filter")
        return " AND ".join(
            _condition(self.q(name), wanted, query) for name, wanted in where.items()
        )

    def _double(self, value: str) -> str:
        require_known([value], self.columns, "value")
        if self.columns[value] != "number":
            raise QCDataError(
                f"Column {value!r} holds {self.columns[value]}, not numbers; choose the column "
                "with the measured values."
            )
        return f"CAST({self.q(value)} AS {self.dialect.double})"

    def centre(self, value: str) -> float:
        if value not in self._centres:
            x = self._double(value)
            found = self.fetch(
                Query(),
                f"SELECT {x} AS x FROM {self._relation} WHERE {self.dialect.finite(x)} LIMIT 1",
            )
            if found.empty:
                raise QCDataError(f"Column {value!r} has no finite values.")
            self._centres[value] = float(found["x"].iloc[0])
        return self._centres[value]

    # ---- the reductions ----------------------------------------------------------------------
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
        centre = self.centre(value)
        x = self._double(value)
        query = Query()
        keys = [f"{self.q(name)} AS k{i}" for i, name in enumerate(by)]
        inner = [*keys, f"{x} AS x", f"{x} - {query.bind(centre)} AS d"]
        if time is not None:
            inner.append(f"{self.q(time)} AS t")
        outer = [f"k{i}" for i in range(len(by))]
        stats = ["COUNT(*) AS n_", "SUM(d) AS s_", "SUM(d * d) AS ss_", "MIN(x) AS lo_",
                 "MAX(x) AS hi_", *(["MIN(t) AS t_"] if time is not None else [])]  # fmt: skip
        text = (
            f"SELECT {', '.join([*outer, *stats])} FROM (SELECT {', '.join(inner)} "
            f"FROM {self._relation} WHERE {self.dialect.finite(x)} AND "
            f"{self._where(where, query)}) AS q"
        )
        if by:
            text += f" GROUP BY {', '.join(outer)}"
        found = self.fetch(query, text)
        names = {f"k{i}": name for i, name in enumerate(by)}
        names.update(n_="n", s_="sum", ss_="sumsq", lo_="min", hi_="max", t_="first")
        cells = found.rename(columns=names)
        cells = cells[cells["n"] > 0].astype({"n": np.int64, "sum": np.float64,
                                              "sumsq": np.float64, "min": np.float64,
                                              "max": np.float64})  # fmt: skip
        if time is not None and self.columns[time] == "time":
            cells["first"] = pd.to_datetime(cells["first"])
        return CellMoments(value, by, centre, tidy_cells(cells, by), time)

    def levels(self, column: str, *, where: Where | None = None) -> pd.Series:
        require_known([column], self.columns, "a factor")
        query = Query()
        found = self.fetch(
            query,
            f"SELECT {self.q(column)} AS k, COUNT(*) AS n FROM {self._relation} "
            f"WHERE {self._where(where, query)} GROUP BY {self.q(column)}",
        )
        found = tidy_cells(found, ["k"])
        return pd.Series(
            found["n"].to_numpy(dtype=np.int64), index=pd.Index(found["k"], name=column), name="n"
        )

    def count(self, where: Where | None = None, *, finite: str | None = None) -> int:
        query = Query()
        condition = self._where(where, query)
        if finite is not None:
            condition += f" AND {self.dialect.finite(self._double(finite))}"
        found = self.fetch(query, f"SELECT COUNT(*) AS n FROM {self._relation} WHERE {condition}")
        return int(found["n"].iloc[0])

    def histogram(
        self, value: str, low: float, high: float, bins: int, *, where: Where | None = None
    ) -> np.ndarray:
        scale = histogram_scale(low, high, bins)
        x = self._double(value)
        query = Query()  # markers bound in the order they appear in the text
        low_, scale_, last = query.bind(float(low)), query.bind(scale), query.bind(bins - 1)
        text = (
            f"SELECT LEAST(CAST(FLOOR((x - {low_}) * {scale_}) AS BIGINT), {last}) AS b, "
            f"COUNT(*) AS n FROM (SELECT {x} AS x FROM {self._relation} WHERE "
            f"{self.dialect.finite(x)} AND {self._where(where, query)}) AS q "
            f"WHERE x >= {query.bind(float(low))} AND x <= {query.bind(float(high))} GROUP BY 1"
        )
        found = self.fetch(query, text)
        counts = np.zeros(bins, dtype=np.int64)
        counts[found["b"].to_numpy(dtype=np.int64)] = found["n"].to_numpy(dtype=np.int64)
        return counts

    def sample(
        self, size: int, *, by: Sequence[str] = (), seed: int = 0, where: Where | None = None
    ) -> pd.DataFrame:
        size = require_size(size)
        by = tuple(by)
        require_known(list(by), self.columns, "a stratum")
        total = self.count(where)
        if total == 0 or size == 0:
            return self.rows(where, limit=0)
        query = Query()
        cells = f"PARTITION BY {', '.join(self.q(b) for b in by)} " if by else ""
        hashed = self.dialect.row_hash.format(columns=", ".join(self.q(c) for c in self.columns))
        ordered = hashed.replace("?", query.bind(int(seed)))
        # Each cell's first ceil(rows * fraction) + 1 rows by the seeded hash: never fewer
        # than its share, which is then cut to the exact allotment here.
        text = (
            f"SELECT * FROM (SELECT r.*, ROW_NUMBER() OVER ({cells}ORDER BY {ordered}) AS rn_, "
            f"COUNT(*) OVER ({cells.strip()}) AS cnt_ FROM {self._relation} AS r WHERE "
            f"{self._where(where, query)}) AS q WHERE rn_ <= CEIL(cnt_ * "
            f"{query.bind(size / total)}) + 1"
        )
        found = self.fetch(query, text)
        codes = (
            found.groupby(list(by), dropna=False, sort=False).ngroup().to_numpy()
            if by
            else np.zeros(len(found), dtype=np.intp)
        )
        first = pd.Series(np.arange(len(found))).groupby(codes).first().to_numpy()
        take = allocate(found["cnt_"].to_numpy(dtype=np.int64)[first], size)
        keep = found["rn_"].to_numpy(dtype=np.int64) <= take[codes]
        chosen = found.loc[keep].sort_values([*by, "rn_"], na_position="last", kind="stable")
        return chosen.drop(columns=["rn_", "cnt_"]).reset_index(drop=True)

    def rows(
        self,
        where: Where | None = None,
        *,
        order: Sequence[str] = (),
        start: int = 0,
        limit: int = 1000,
    ) -> pd.DataFrame:
        require_known(list(order), self.columns, "an order")
        query = Query()
        text = f"SELECT * FROM {self._relation} WHERE {self._where(where, query)}"
        if order:
            text += f" ORDER BY {', '.join(self.q(o) for o in order)}"
        text += f" LIMIT {query.bind(int(limit))} OFFSET {query.bind(int(start))}"
        return self.fetch(query, text)

    # ---- intake: the checks of qcexplore.data.validate as queries ---------------------------
    def where_rows(self, condition: str) -> str:
        """Words for the rows where ``condition`` holds; engines without row positions count
        them (file sources name their positions)."""
        found = self.fetch(Query(), f"SELECT COUNT(*) AS n FROM {self._relation} WHERE {condition}")
        return f"{int(found['n'].iloc[0])} rows"

    def _examples(self, column: str, condition: str) -> str:
        found = self.fetch(
            Query(), f"SELECT {column} AS c FROM {self._relation} WHERE {condition} LIMIT 3"
        )
        return ", ".join(repr(c) for c in found["c"])

    def prepare(
        self,
        value: str,
        *,
        time: str | None = None,
        shifts: Mapping[str, str] | None = None,
    ) -> tuple[SqlSource, Intake]:
        """The checked Source the Study works on, and what the checks found.

        The value is read as numbers (text cells by the engine's cast; a cell that is no
        number is refused naming its rows); its missing and infinite values are counted;
        text times are read as timestamps (an unreadable or missing time is refused); from
        timestamps ``weekday``, ``hour``, ``day`` (and ``shift`` with ``shifts``) are
        computed in the engine.
        """
        require_known([value, *([time] if time else [])], self.columns, "value or time")
        dialect = self.dialect
        select = {name: self.q(name) for name in self.columns}
        select[value] = self._number_column(value)
        stamps = False
        if time is not None:
            select[time], stamps = self._time_column(time)
        if shifts is not None and not stamps:
            raise QCDataError("shifts need a time column with timestamps: give time=.")
        derived: dict[str, str] = {}
        if time is not None and stamps:
            derived = self._time_factors(select[time], shifts)
            derived = {k: v for k, v in derived.items() if k not in self.columns}
        listed = [f"{expr} AS {self.q(name)}" for name, expr in {**select, **derived}.items()]
        relation = f"(SELECT {', '.join(listed)} FROM {self._relation} AS b) AS p"
        checked = PreparedSource(self, relation, value=value, time=time, shifts=shifts)
        x = f"CAST({self.q(value)} AS {dialect.double})"
        counts = checked.fetch(
            Query(),
            f"SELECT SUM(CASE WHEN {x} IS NULL OR {dialect.nan.format(x=x)} THEN 1 ELSE 0 END) "
            f"AS missing, SUM(CASE WHEN {dialect.infinite.format(x=x)} THEN 1 ELSE 0 END) AS inf "
            f"FROM {relation}",
        ).fillna(0)
        intake = Intake(int(counts["missing"].iloc[0]), int(counts["inf"].iloc[0]),
                        tuple(derived))  # fmt: skip
        if intake.count == checked.n_rows:
            raise QCDataError(f"Column {value!r} has no usable values ({intake.describe()}).")
        return checked, intake

    def _number_column(self, value: str) -> str:
        kind, column, dialect = self.columns[value], self.q(value), self.dialect
        if kind == "number":
            return f"CAST({column} AS {dialect.double})"
        if kind == "bool":
            raise QCDataError(
                f"Column {value!r} holds true/false values, not measurements; "
                "choose the column with the measured values."
            )
        if kind != "text" or dialect.try_cast is None:
            raise QCDataError(
                f"Column {value!r} holds {kind}, not numbers: choose the column with the "
                "measured values, or cast it to a number in the query."
            )
        blank = ", ".join(dialect.literal(m) for m in sorted(MISSING_TEXT))
        cell = f"trim({column})"
        cast = dialect.try_cast.format(x=cell, type=dialect.double)
        unreadable = f"{column} IS NOT NULL AND {cell} NOT IN ({blank}) AND {cast} IS NULL"
        if self._any(unreadable):
            raise QCDataError(
                f"Column {value!r} has cells that are not numbers "
                f"({self._examples(column, unreadable)}) in {self.where_rows(unreadable)}; "
                "correct or blank them in the source (a decimal comma needs qx.read, or a "
                "cast in the query)."
            )
        return f"CASE WHEN {cell} IN ({blank}) THEN NULL ELSE {cast} END"

    def _time_column(self, time: str) -> tuple[str, bool]:
        """The time as the engine reads it, and whether it holds timestamps (else an order
        column)."""
        kind, column, dialect = self.columns[time], self.q(time), self.dialect
        if kind == "text" and dialect.try_cast is not None:
            parsed = dialect.try_cast.format(x=f"trim({column})", type=dialect.timestamp)
            unreadable = f"{column} IS NOT NULL AND {parsed} IS NULL"
            if self._any(unreadable):
                raise QCDataError(
                    f"Column {time!r} (the time) has cells that are not times "
                    f"({self._examples(column, unreadable)}) in {self.where_rows(unreadable)}; "
                    "write them as 2026-03-29 01:30, or read the file with qx.read."
                )
            column = parsed
        elif kind not in ("time", "number"):
            raise QCDataError(
                f"Column {time!r} holds {kind} values, not times; give timestamps or a "
                "running number as the time."
            )
        missing = f"{column} IS NULL"
        if self._any(missing):
            raise QCDataError(
                f"Column {time!r} has missing times in {self.where_rows(missing)}; "
                "fill them in or leave the time column out."
            )
        return column, kind != "number"

    def _any(self, condition: str) -> bool:
        found = self.fetch(Query(), f"SELECT 1 AS hit FROM {self._relation} WHERE {condition} "
                                    "LIMIT 1")  # fmt: skip
        return not found.empty

    def _time_factors(self, t: str, shifts: Mapping[str, str] | None) -> dict[str, str]:
        """Weekday, hour, day (and shift) of a timestamp expression, as the engine computes
        them; the same rules as :func:`qcexplore.data.derive.derive_time_factors`."""
        dialect = self.dialect
        hour = f"CAST(EXTRACT(HOUR FROM {t}) AS INTEGER)"
        day = f"CAST({t} AS DATE)"
        factors = {"hour": hour}
        if shifts is not None:
            starts = shift_starts(shifts)
            minute = f"({hour} * 60 + CAST(EXTRACT(MINUTE FROM {t}) AS INTEGER))"
            early = f"{minute} < {starts[0][0]}"
            arms = [f"WHEN {early} THEN {dialect.literal(starts[-1][1])}"]
            arms += [
                f"WHEN {minute} < {nxt} THEN {dialect.literal(name)}"
                for (_, name), (nxt, _) in zip(starts[:-1], starts[1:], strict=True)
            ]
            factors["shift"] = f"CASE {' '.join(arms)} ELSE {dialect.literal(starts[-1][1])} END"
            day = f"CASE WHEN {early} THEN {dialect.day_before.format(d=day)} ELSE {day} END"
        names = " ".join(
            f"WHEN {i} THEN {dialect.literal(name)}" for i, name in enumerate(WEEKDAYS, start=1)
        )
        factors["weekday"] = f"CASE {dialect.isodow.format(d=day)} {names} END"
        factors["day"] = f"CAST({day} AS {dialect.text})"
        return factors


class PreparedSource(SqlSource):
    """A SqlSource after the intake checks: the value as numbers, the time parsed, the time
    factors added. Its description names the checks, so it re-opens checked."""

    def __init__(
        self,
        base: SqlSource,
        relation: str,
        *,
        value: str,
        time: str | None,
        shifts: Mapping[str, str] | None,
    ) -> None:
        description = dict(base.description)
        description["prepared"] = json.dumps(
            {"value": value, "time": time, "shifts": dict(shifts) if shifts else None}
        )
        super().__init__(base._runner, relation, description)
        self._base = base
        self._lock = base._lock  # one connection: one lock

    def where_rows(self, condition: str) -> str:
        return self._base.where_rows(condition)

    def _fingerprint_parts(self) -> list[str]:
        return self._base._fingerprint_parts()


def _reopen(description: Mapping[str, str]) -> Any:
    from qcexplore.data.sources import reopen

    return reopen(description)

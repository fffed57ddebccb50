"""A Spark table, query or DataFrame as a Source: the same queries in Spark SQL."""

from __future__ import annotations

import uuid
from collections.abc import Sequence
from typing import Any

import pandas as pd

from qcexplore.data.sources.postgres import relation_of
from qcexplore.data.sources.sql import DIALECTS, SqlSource


class SparkRunner:
    """Queries through a SparkSession the caller owns (closing the Source leaves it running)."""

    dialect = DIALECTS["spark"]

    def __init__(self, session: Any) -> None:
        self._session = session

    def fetch(self, sql: str, params: Sequence[Any] = ()) -> pd.DataFrame:
        # Through Arrow: pyspark's own pandas conversion checks pandas versions it knows.
        found = self._session.sql(sql, args=list(params) or None).toArrow().to_pandas()
        zone = self._session.conf.get("spark.sql.session.timeZone")
        for name, column in found.items():
            if isinstance(column.dtype, pd.DatetimeTZDtype):  # wall clock of the session
                found[name] = column.dt.tz_convert(zone).dt.tz_localize(None)
        return found

    def types(self, relation: str) -> list[tuple[str, str]]:
        schema = self._session.sql(f"SELECT * FROM {relation} LIMIT 0").schema
        return [(field.name, field.dataType.simpleString()) for field in schema.fields]

    def close(self) -> None:
        pass


def is_spark_session(thing: object) -> bool:
    return type(thing).__name__ == "SparkSession" and "pyspark" in type(thing).__module__


def is_spark_frame(thing: object) -> bool:
    return type(thing).__name__ == "DataFrame" and "pyspark" in type(thing).__module__


def spark_session(master: str) -> Any:
    """The Spark session for a master URL (``spark://host:port``, ``local[2]``)."""
    from pyspark.sql import SparkSession

    return SparkSession.builder.master(master).getOrCreate()


def spark_source(session: Any, table: str | None = None, *, query: str | None = None) -> SqlSource:
    """A table or query of a SparkSession as a Source."""
    relation, words = relation_of("spark", table, query)
    master = session.sparkContext.master
    return SqlSource(SparkRunner(session), relation, {"engine": "spark", "master": master, **words})


def spark_frame_source(frame: Any) -> SqlSource:
    """A Spark DataFrame as a Source, through a temporary view of its own. It re-opens only
    in the process that made it (a DataFrame has no address outside its session)."""
    view = f"qcexplore_{uuid.uuid4().hex}"
    frame.createOrReplaceTempView(view)
    session = frame.sparkSession
    return SqlSource(
        SparkRunner(session),
        DIALECTS["spark"].quote(view),
        {"engine": "spark", "master": session.sparkContext.master, "view": view},
    )

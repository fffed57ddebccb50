"""Sources: every engine answers as the table in memory does, on real engines (never mocks).

DuckDB reads temporary Parquet, CSV and hive-partitioned folders; PostgreSQL is a throwaway
cluster on a unix socket and Spark one local session (tests/conftest.py). The reference for
the moments is pandas ``groupby`` (count, mean, var, min, max: a general-purpose library);
the time factors are checked against ``qcexplore.data.derive`` on the same rows, whose own
tests check them against the calendar.
"""

from __future__ import annotations

import json
import pickle
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import psycopg
import pyarrow as pa
import pytest
from hypothesis import given
from hypothesis import strategies as st

from qcexplore.data.derive import derive_time_factors
from qcexplore.data.sources import Between, FrameSource, connect, reopen, scan
from qcexplore.data.sources.base import allocate
from qcexplore.data.sources.postgres import split_secret
from qcexplore.data.validate import finite_mask
from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import group_moments

SHIFTS = {"early": "06:00", "late": "14:00", "night": "22:00"}
ENGINES = ("duckdb-parquet", "duckdb-csv", "duckdb-hive", "postgres", "spark")
#: 1e9: naive sums of squares are garbage there (checked below); the shifted form is not.
OFFSETS = (0.0, 1e9)


def _table(offset: float, rows: int = 1500, seed: int = 7) -> pd.DataFrame:
    """Weights by crew and nozzle over three days, with a few missing and infinite values."""
    rng = np.random.default_rng(seed)
    crew = rng.choice(np.array(["Ann", "Bo", "Cy"], dtype=object), rows)
    crew[rng.choice(rows, 5, replace=False)] = None
    nozzle = rng.integers(1, 5, rows)
    weight = offset + 500.0 + 2.0 * nozzle + rng.normal(0.0, 1.5, rows)
    weight[rng.choice(rows, 6, replace=False)] = np.nan
    weight[rng.choice(rows, 3, replace=False)] = np.inf
    start = np.datetime64("2026-03-02T00:00")  # a Monday
    minutes = np.sort(rng.choice(3 * 24 * 60, rows, replace=False))
    return pd.DataFrame(
        {
            "crew": crew,
            "nozzle": nozzle.astype(np.int64),
            "w": weight,
            "t": (start + minutes.astype("timedelta64[m]")).astype("datetime64[us]"),
        }
    )


def _load_postgres(postgres, name: str, frame: pd.DataFrame) -> None:
    with psycopg.connect(postgres.url(), autocommit=True) as connection:
        connection.execute(f'DROP TABLE IF EXISTS "{name}"')
        connection.execute(
            f'CREATE TABLE "{name}" (crew text, nozzle integer, w double precision, t timestamp)'
        )
        with connection.cursor().copy(f'COPY "{name}" FROM STDIN') as copy:
            for row in frame.itertuples(index=False):
                crew = None if pd.isna(row.crew) else row.crew
                copy.write_row([crew, int(row.nozzle), float(row.w), row.t.to_pydatetime()])


def _source(engine: str, frame: pd.DataFrame, folder: Path, name: str, request):
    folder.mkdir(parents=True, exist_ok=True)
    if engine == "duckdb-parquet":
        frame.to_parquet(folder / f"{name}.parquet")
        return scan(folder / f"{name}.parquet")
    if engine == "duckdb-csv":
        half = len(frame) // 2  # two files through one glob
        frame.iloc[:half].to_csv(folder / f"{name}-1.csv", index=False)
        frame.iloc[half:].to_csv(folder / f"{name}-2.csv", index=False)
        return scan(str(folder / f"{name}-*.csv"))
    if engine == "duckdb-hive":
        for nozzle, part in frame.groupby("nozzle"):
            (folder / name / f"nozzle={nozzle}").mkdir(parents=True, exist_ok=True)
            part.drop(columns="nozzle").to_parquet(folder / name / f"nozzle={nozzle}" / "p.parquet")
        return scan(folder / name)
    if engine == "postgres":
        postgres = request.getfixturevalue("postgres")
        _load_postgres(postgres, name, frame)
        return connect(postgres.url(), name)
    spark = request.getfixturevalue("spark")
    spark.createDataFrame(pa.Table.from_pandas(frame)).createOrReplaceTempView(name)
    return connect(spark, name)


@pytest.fixture(scope="module", params=ENGINES)
def engine(request, tmp_path_factory):
    """Per engine: {offset: (the table in memory, the same rows on the engine)}."""
    folder = tmp_path_factory.mktemp(request.param)
    made = {}
    for offset in OFFSETS:
        frame = _table(offset)
        name = f"weights_{int(offset)}"
        made[offset] = (frame, _source(request.param, frame, folder, name, request))
    yield request.param, made
    for _, source in made.values():
        source.close()


def _labels(cells: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Grouping labels comparable across engines (missing as None, numbers as int)."""
    out = cells[by].astype(object).where(cells[by].notna(), None)
    if "nozzle" in by:
        out["nozzle"] = [int(v) for v in out["nozzle"]]
    return out.reset_index(drop=True)


def _same_moments(mine, reference, rtol=1e-9):
    by = list(reference.by)
    pd.testing.assert_frame_equal(_labels(mine.cells, by), _labels(reference.cells, by))
    np.testing.assert_array_equal(mine.n, reference.n)
    np.testing.assert_allclose(mine.mean, reference.mean, rtol=rtol)
    np.testing.assert_allclose(mine.ss, reference.ss, rtol=rtol)
    np.testing.assert_array_equal(mine.cells["min"], reference.cells["min"])
    np.testing.assert_array_equal(mine.cells["max"], reference.cells["max"])


@pytest.mark.parametrize("offset", OFFSETS)
def test_moments_equal_those_in_memory(engine, offset):
    """n, mean, SS, min, max and first time per (crew x nozzle) cell equal FrameSource's to
    1e-9 relative, also 1e9 from zero; both equal pandas groupby (count, mean, var, min, max)."""
    _, made = engine
    frame, source = made[offset]
    by = ["crew", "nozzle"]
    mine = source.moments("w", by, time="t")
    memory = FrameSource(frame).moments("w", by, time="t")
    _same_moments(mine, memory)
    np.testing.assert_array_equal(
        pd.to_datetime(mine.cells["first"]).to_numpy("datetime64[us]"),
        memory.cells["first"].to_numpy("datetime64[us]"),
    )
    finite = frame[np.isfinite(frame["w"])]
    grouped = finite.groupby(by, dropna=False, sort=True)["w"]
    # Two passes in pandas: its groupby var itself is off by 4e-8 relative at 1e9.
    deviation = finite["w"] - grouped.transform("mean")
    pandas = grouped.agg(["count", "mean", "min", "max"])
    pandas["ss"] = (deviation * deviation).groupby([finite[b] for b in by], dropna=False).sum()
    pandas = pandas.reset_index().sort_values(by, na_position="last", kind="stable")
    np.testing.assert_array_equal(memory.n, pandas["count"])
    np.testing.assert_allclose(memory.mean, pandas["mean"], rtol=1e-12)
    np.testing.assert_allclose(memory.ss, pandas["ss"], rtol=1e-9)
    np.testing.assert_array_equal(memory.cells["min"], pandas["min"])
    # Cells add up exactly: merged to crews they equal the crews queried directly.
    _same_moments(mine.merge(["crew"]), source.moments("w", ["crew"], time="t"))
    _same_moments(mine.merge(()), memory.merge(()))
    _same_moments(source.moments("w"), memory.merge(()))
    _same_moments(memory.merge(()), FrameSource(frame).moments("w"))


def test_naive_sums_of_squares_fail_at_1e9(tmp_path):
    """The data above have teeth: at 1e9, sum(x^2) - sum(x)^2/n in the engine is far off,
    while the shifted form equals numpy's two-pass variance to 1e-9."""
    frame = _table(1e9)
    frame.to_parquet(tmp_path / "w.parquet")
    naive = duckdb.sql(
        f"SELECT nozzle, SUM(w * w) - SUM(w) * SUM(w) / COUNT(*) AS ss FROM "
        f"'{tmp_path / 'w.parquet'}' WHERE isfinite(w) GROUP BY nozzle ORDER BY nozzle"
    ).fetchnumpy()["ss"]
    finite = frame[np.isfinite(frame["w"])]
    exact = finite.groupby("nozzle")["w"].apply(lambda w: np.var(w.to_numpy()) * len(w))
    assert np.max(np.abs(naive / exact - 1)) > 1e-3
    with scan(tmp_path / "w.parquet") as source:
        np.testing.assert_allclose(source.moments("w", ["nozzle"]).ss, exact, rtol=1e-9)


def test_reductions_equal_those_in_memory(engine):
    """Levels, counts under a filter, histogram counts (edges on data values) and drill-down
    rows equal FrameSource's on the same rows."""
    _, made = engine
    frame, source = made[0.0]
    memory = FrameSource(frame)
    mine_levels, memory_levels = source.levels("crew"), memory.levels("crew")
    assert mine_levels.tolist() == memory_levels.tolist()
    assert [None if pd.isna(v) else v for v in mine_levels.index] == [
        None if pd.isna(v) else v for v in memory_levels.index
    ]
    window = {"crew": ["Ann", None], "t": Between(frame["t"].iloc[100], frame["t"].iloc[900])}
    assert source.count(window) == memory.count(window) > 0
    assert source.count(window, finite="w") == memory.count(window, finite="w")
    assert source.count() == source.n_rows == len(frame)
    finite = frame["w"][np.isfinite(frame["w"])]
    low, high = float(finite.min()), float(finite.iloc[10])
    for where in (None, {"nozzle": [2, 3]}):
        counts = source.histogram("w", low, high, 7, where=where)
        np.testing.assert_array_equal(counts, memory.histogram("w", low, high, 7, where=where))
    drill = {"nozzle": 2}
    mine = source.rows(drill, order=["t"], start=3, limit=5)
    expected = memory.rows(drill, order=["t"], start=3, limit=5)
    np.testing.assert_array_equal(mine["w"].to_numpy(), expected["w"].to_numpy())
    np.testing.assert_array_equal(
        pd.to_datetime(mine["t"]).to_numpy("datetime64[us]"), expected["t"].to_numpy()
    )


def test_histogram_matches_numpy_inside_the_range():
    """FrameSource's histogram equals numpy.histogram (last bin closed) on values inside."""
    values = np.random.default_rng(3).normal(10.0, 2.0, 5000)
    frame = pd.DataFrame({"w": values})
    counts = FrameSource(frame).histogram("w", 6.0, 14.0, 16)
    expected, _ = np.histogram(values, bins=16, range=(6.0, 14.0))
    np.testing.assert_array_equal(counts, expected)


def test_sample_is_stratified_seeded_and_of_stated_size(engine):
    """The stated number of rows, allotted to crews by largest remainder; the same seed gives
    the same rows; every row sampled is a row of the table."""
    _, made = engine
    frame, source = made[0.0]
    levels = source.levels("crew")
    first = source.sample(60, by=["crew"], seed=11)
    again = source.sample(60, by=["crew"], seed=11)
    other = source.sample(60, by=["crew"], seed=12)
    assert len(first) == 60
    per_crew = (
        first["crew"].astype(object).where(first["crew"].notna(), None).value_counts(dropna=False)
    )
    wanted = dict(zip(levels.index.map(lambda v: None if pd.isna(v) else v),
                      allocate(levels.to_numpy(), 60), strict=True))  # fmt: skip
    assert {k: int(v) for k, v in per_crew.items()} == {k: v for k, v in wanted.items() if v}
    key = ["t"]
    assert first[key].equals(again[key])
    assert (
        not first.sort_values("t")["t"]
        .reset_index(drop=True)
        .equals(other.sort_values("t")["t"].reset_index(drop=True))
    )
    times = set(frame["t"].to_numpy("datetime64[us]").tolist())
    assert set(pd.to_datetime(first["t"]).to_numpy("datetime64[us]").tolist()) <= times
    assert len(source.sample(10_000)) == len(frame)


def test_intake_checks_and_time_factors_equal_those_in_memory(engine):
    """Missing and infinite values counted as qcexplore.data.validate counts them; weekday,
    hour, shift and production day computed in the engine equal derive_time_factors."""
    _, made = engine
    frame, source = made[0.0]
    checked, intake = source.prepare("w", time="t", shifts=SHIFTS)
    _, dropped = finite_mask(frame["w"])
    assert (intake.missing, intake.infinite) == (len(dropped.missing), len(dropped.infinite))
    assert set(intake.derived) == {"weekday", "hour", "shift", "day"}
    derived = derive_time_factors(frame["t"], SHIFTS)
    for name in intake.derived:
        expected = derived[name].value_counts().sort_index()
        found = checked.levels(name)
        assert dict(zip(map(str, found.index), found, strict=True)) == {
            str(k): int(v) for k, v in expected.items() if v
        }, name
    _same_moments(
        checked.moments("w", ["shift"]),
        FrameSource(frame.assign(shift=derived["shift"].astype(str))).moments("w", ["shift"]),
    )


def test_descriptions_reopen_the_same_source(engine, request):
    """A Source opened again from its description (JSON, as handed to a kernel) has the same
    fingerprint and answers; a prepared one re-opens prepared."""
    name, made = engine
    _, source = made[0.0]
    secret = request.getfixturevalue("postgres").password if name == "postgres" else None
    checked, _ = source.prepare("w", time="t")
    again = reopen(json.loads(json.dumps(checked.description)), password=secret)
    assert again.fingerprint == checked.fingerprint
    assert set(again.columns) == set(checked.columns)
    _same_moments(again.moments("w", ["weekday"]), checked.moments("w", ["weekday"]))
    if secret is None:  # a pickle is the description (PostgreSQL: see the next test)
        assert pickle.loads(pickle.dumps(checked)).fingerprint == checked.fingerprint


def test_postgres_password_is_never_shown(postgres, monkeypatch):
    """The password in the URL appears in no repr, str, description, pickle or message; the
    description re-opens with the password given apart (or found by libpq)."""
    frame = _table(0.0, rows=50)
    _load_postgres(postgres, "secret_check", frame)
    url = postgres.url()
    secret = postgres.password
    source = connect(url, "secret_check")
    shown = [repr(source), str(source), json.dumps(source.description)]
    assert all(secret not in text for text in shown)
    assert source.description["url"] == split_secret(url)[0]
    with pytest.raises(QCDataError) as refused:
        source.rows({"no_such_column": 1})
    assert secret not in str(refused.value)
    with pytest.raises(QCDataError) as failed:
        connect(postgres.url(password="wrong-" + secret), "secret_check")
    assert "wrong-" not in str(failed.value) and secret not in str(failed.value)
    assert "password authentication failed" in str(failed.value)
    query = connect(url, query="SELECT * FROM secret_check WHERE nozzle > 1")
    assert query.n_rows == int((frame["nozzle"] > 1).sum())
    with pytest.raises(QCDataError) as refused_query:
        _ = connect(url, query="SELECT no_such FROM secret_check").columns
    assert secret not in str(refused_query.value)
    again = reopen(source.description, password=secret)
    assert again.fingerprint == source.fingerprint
    packed = pickle.dumps(source)
    assert secret.encode() not in packed
    monkeypatch.setenv("PGPASSWORD", secret)
    unpacked = pickle.loads(packed)
    assert unpacked.fingerprint == source.fingerprint
    for opened in (source, query, again, unpacked):
        opened.close()


def test_postgres_never_writes(postgres):
    """The connection is read-only: a query that writes is refused by the server."""
    _load_postgres(postgres, "read_only", _table(0.0, rows=10))
    with connect(postgres.url(), query="SELECT 1 AS one") as source:
        with pytest.raises(QCDataError, match="read-only"):
            source._runner.fetch("CREATE TABLE written (x integer)")


def test_spark_url_and_session_reach_the_same_table(spark):
    """connect(spark://...) and connect(session) give one table; a Spark DataFrame is a Source."""
    from qcexplore.data.sources import as_source

    frame = _table(0.0, rows=200)
    spark_frame = spark.createDataFrame(pa.Table.from_pandas(frame))
    spark_frame.createOrReplaceTempView("spark_weights")
    by_session = connect(spark, "spark_weights")
    from_frame = as_source(spark_frame)
    again = reopen(by_session.description)
    for source in (by_session, from_frame, again):
        _same_moments(source.moments("w", ["nozzle"]), FrameSource(frame).moments("w", ["nozzle"]))
    with pytest.raises(QCDataError, match="cannot be opened again"):
        reopen(from_frame.description)


# ---- files: what the intake names ----------------------------------------------------------
def test_file_intake_names_rows_of_their_files(tmp_path):
    """Text that is no number, and times that are no times, are refused naming 1-based rows
    of the file they are in, as qcexplore.data.validate words them."""
    (tmp_path / "a.csv").write_text("w,t\n1.5,2026-03-02 06:00\n2.5,2026-03-02 07:00\n")
    (tmp_path / "b.csv").write_text(
        "w,t\n3.5,2026-03-02 08:00\nheavy,2026-03-02 09:00\n4.5,soon\n,2026-03-02 10:00\n"
    )
    source = scan(tmp_path / "*.csv")
    assert source.columns == {"w": "text", "t": "text"}
    with pytest.raises(QCDataError, match=r"not numbers \('heavy'\) in row 2 of b\.csv"):
        source.prepare("w")
    (tmp_path / "late.csv").write_text(
        "w,t\n1.0,2026-03-02 06:00\n2.0,2026-03-02 07:00\n3.0,soon\n"
    )
    with pytest.raises(QCDataError, match=r"not times \('soon'\) in row 3;"):
        scan(tmp_path / "late.csv").prepare("w", time="t")
    (tmp_path / "c.csv").write_text("w,t\n1.0,2026-03-02 06:00\n2.0,\n3.0,2026-03-02 07:00\n")
    with pytest.raises(QCDataError, match=r"missing times in row 2;"):
        scan(tmp_path / "c.csv").prepare("w", time="t")
    checked, intake = scan(tmp_path / "c.csv").prepare("w")
    assert intake.describe() == "no rows left out"
    assert checked.moments("w").mean.tolist() == [2.0]
    source.close()


def test_scan_refuses_what_it_cannot_read(tmp_path):
    with pytest.raises(QCDataError, match="No data file"):
        scan(tmp_path / "none-*.parquet")
    pd.DataFrame({"w": [1.0]}).to_parquet(tmp_path / "a.parquet")
    pd.DataFrame({"w": [1.0]}).to_csv(tmp_path / "b.csv", index=False)
    with pytest.raises(QCDataError, match="several or unknown kinds"):
        scan(tmp_path)
    with pytest.raises(QCDataError, match="format='xls' is not known"):
        scan(tmp_path / "a.parquet", format="xls")
    with scan(tmp_path / "a.parquet") as source:
        with pytest.raises(QCDataError, match="'crew' given as a grouping not found"):
            source.moments("w", ["crew"])


def test_fingerprint_follows_the_files(tmp_path):
    pd.DataFrame({"w": [1.0, 2.0]}).to_parquet(tmp_path / "a.parquet")
    first = scan(tmp_path / "a.parquet").fingerprint
    assert scan(tmp_path / "a.parquet").fingerprint == first
    pd.DataFrame({"w": [1.0, 2.0, 3.0]}).to_parquet(tmp_path / "a.parquet")
    assert scan(tmp_path / "a.parquet").fingerprint != first


# ---- in memory ------------------------------------------------------------------------------
@given(
    st.lists(st.tuples(st.integers(0, 4), st.floats(-1e6, 1e6)), min_size=1, max_size=60),
    st.sampled_from([0.0, 1e9]),
)
def test_frame_moments_equal_two_pass_group_moments(rows, offset):
    """FrameSource's shifted sums equal qcexplore.stats.subgroups.group_moments (two passes,
    checked against pandas in test_subgroups) on any data."""
    codes = np.array([r[0] for r in rows])
    values = np.array([r[1] for r in rows]) / 1e3 + offset
    moments = FrameSource(pd.DataFrame({"g": codes, "w": values})).moments("w", ["g"])
    present = np.unique(codes)
    reference = group_moments(values, codes, 5)
    np.testing.assert_array_equal(moments.n, reference.n[present])
    # centre + mean deviation: rounding is relative to the larger of the two.
    atol = 1e-14 * np.abs(values).max()
    np.testing.assert_allclose(moments.mean, reference.mean[present], rtol=1e-12, atol=atol)
    # The shifted form loses what cancels between sum((x - c)^2) and the cell's own part
    # (about n * 2.2e-16 of the former); the two-pass reference loses n * (mean's rounding)^2.
    scale = moments.cells["sumsq"].to_numpy()
    rounding = reference.n[present] * (4.5e-16 * np.abs(values).max()) ** 2
    error = np.abs(moments.ss - reference.ss[present])
    assert np.all(error <= 1e-9 * reference.ss[present] + 1e-12 * scale + rounding)


@given(st.lists(st.integers(0, 50), min_size=1, max_size=12), st.integers(0, 400))
def test_allocation_is_proportional_and_exact(sizes, total):
    sizes = np.array(sizes)
    taken = allocate(sizes, total)
    assert taken.sum() == min(total, sizes.sum())
    assert np.all((taken >= 0) & (taken <= sizes))
    if sizes.sum():
        share = sizes * min(total, sizes.sum()) / sizes.sum()
        assert np.all(np.abs(taken - share) < 1 + 1e-9)

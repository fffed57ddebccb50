"""Data intake: reading, reshaping and validation. Only QCDataError may escape."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import qcexplore as qx
from qcexplore import QCDataError


@pytest.fixture
def small() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "t": pd.date_range("2026-09-07 06:00", periods=6, freq="h"),
            "crew": ["A", "A", "B", "B", "C", "C"],
            "w": [500.5, 499.8, 501.2, 500.0, 499.1, 500.7],
        }
    )


def test_read_csv_with_semicolons_and_decimal_comma(tmp_path: Path) -> None:
    path = tmp_path / "weights.csv"
    path.write_text("crew;weight;note\nA;500,5;x\nB;1.499,8;y\n", encoding="utf-8")
    frame = qx.read(path)
    assert frame["weight"].tolist() == [500.5, 1499.8]


def test_read_tsv_and_comma_csv(tmp_path: Path, small: pd.DataFrame) -> None:
    small.to_csv(tmp_path / "a.tsv", sep="\t", index=False)
    small.to_csv(tmp_path / "a.csv", index=False)
    for name in ("a.tsv", "a.csv"):
        frame = qx.read(tmp_path / name)
        assert frame["w"].tolist() == small["w"].tolist()


def test_read_parquet_excel_and_table_objects(tmp_path: Path, small: pd.DataFrame) -> None:
    small.to_parquet(tmp_path / "a.parquet")
    with pd.ExcelWriter(tmp_path / "a.xlsx") as writer:
        small.head(2).to_excel(writer, sheet_name="first", index=False)
        small.to_excel(writer, sheet_name="weights", index=False)
    assert qx.read(tmp_path / "a.parquet")["w"].tolist() == small["w"].tolist()
    assert qx.read(tmp_path / "a.xlsx", sheet="weights")["w"].tolist() == small["w"].tolist()
    assert len(qx.read(tmp_path / "a.xlsx")) == 2
    assert qx.read(pl.from_pandas(small))["w"].tolist() == small["w"].tolist()
    assert qx.read(pa.Table.from_pandas(small))["w"].tolist() == small["w"].tolist()
    copy = qx.read(small)
    copy.loc[0, "w"] = 0.0
    assert small.loc[0, "w"] == 500.5  # read gives a copy


def test_read_reports_progress_on_large_files(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setattr("qcexplore.data.io._PROGRESS_BYTES", 1000)
    path = tmp_path / "big.csv"
    rows = 500_000
    pd.DataFrame({"w": np.arange(rows) % 97 + 0.5, "crew": "A"}).to_csv(path, index=False)
    seen: list[float] = []
    frame = qx.read(path, progress=seen.append)
    assert len(frame) == rows and seen[-1] == 1.0 and len(seen) > 2
    assert seen == sorted(seen)


def _written(path: Path, content: bytes) -> Path:
    path.write_bytes(content)
    return path


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda d: d / "none.csv", "not found"),
        (lambda d: d, "folder"),
        (lambda d: _written(d / "e.csv", b""), "empty"),
        (lambda d: _written(d / "b.xlsx", b"\x00garbage"), "Could not read"),
        (lambda d: _written(d / "b.parquet", b"PAR1 not really"), "Could not read"),
        (lambda d: 42, "Cannot read a int"),
    ],
)
def test_read_errors_are_qcdataerror(tmp_path: Path, make, message: str) -> None:
    with pytest.raises(QCDataError, match=message):
        qx.read(make(tmp_path))


def test_to_long_keeps_ids_and_orders_samples() -> None:
    wide = pd.DataFrame({"day": [1, 2], "team": ["x", "y"], "s1": [1.0, 3.0], "s2": ["2,5", 4]})
    long = qx.to_long(wide, ["s1", "s2"], keep=["day"], sample="position", value="w")
    assert list(long.columns) == ["day", "position", "w"]
    assert long["day"].tolist() == [1, 1, 2, 2]
    assert long["position"].cat.categories.tolist() == ["s1", "s2"]
    assert long["w"].tolist()[0] == 1.0
    assert list(wide.columns) == ["day", "team", "s1", "s2"]
    with pytest.raises(QCDataError, match="clash"):
        qx.to_long(wide, ["s1"], sample="day")
    with pytest.raises(QCDataError, match="not found"):
        qx.to_long(wide, ["s9"])


def test_to_long_with_a_duplicated_index() -> None:
    # Two sheets stacked with pd.concat keep their own row labels: rows go by position.
    wide = pd.DataFrame({"day": [1, 2], "s1": [1.0, 2.0], "s2": [3.0, 4.0]}, index=[7, 7])
    long = qx.to_long(wide, ["s1", "s2"])
    assert long["day"].tolist() == [1, 1, 2, 2]
    assert long["value"].tolist() == [1.0, 3.0, 2.0, 4.0]


def test_study_converts_text_numbers_and_counts_dropped() -> None:
    frame = pd.DataFrame(
        {
            "w": pd.Series(["500,5", " 499.5", None, np.inf, "", "501"], dtype=object),
            "crew": ["A", "B", "A", "B", "A", "B"],
        }
    )
    s = qx.Study(frame, value="w", factors=["crew"])
    assert s.data["w"].tolist() == [500.5, 499.5, 501.0]
    assert s.dropped == 3
    assert s.dropped_rows.missing == (3, 5) and s.dropped_rows.infinite == (4,)
    assert isinstance(s.data["crew"].dtype, pd.CategoricalDtype)


def test_unreadable_cells_are_reported_with_rows() -> None:
    frame = pd.DataFrame({"w": ["500", "abc", "501", "5x"]})
    with pytest.raises(QCDataError, match=r"'w'.*rows 2, 4"):
        qx.Study(frame, value="w")


def test_duplicate_columns_and_missing_roles_rejected(small: pd.DataFrame) -> None:
    doubled = pd.concat([small, small[["w"]]], axis=1)
    with pytest.raises(QCDataError, match="Duplicate column"):
        qx.Study(doubled, value="w")
    with pytest.raises(QCDataError, match="'nozzle'"):
        qx.Study(small, value="w", factors=["nozzle"])
    with pytest.raises(QCDataError, match="list of column names"):
        qx.Study(small, value="w", factors="crew")
    with pytest.raises(QCDataError, match="need a time column"):
        qx.Study(small, value="w", shifts={"early": "06:00"})
    with pytest.raises(QCDataError, match="clock time"):
        qx.Study(small, value="w", time="t", shifts={"early": "6 am"})


def test_factor_cells_that_cannot_be_labels_are_rejected() -> None:
    frame = pd.DataFrame({"w": [1.0, 2.0], "crew": [["A"], ["B"]]})
    with pytest.raises(QCDataError, match="'crew'.*labels"):
        qx.Study(frame, value="w", factors=["crew"])


def test_timestamps_with_and_without_time_zone() -> None:
    frame = pd.DataFrame(
        {
            "t": ["2026-03-29T01:30:00+01:00", "2026-03-29T03:30:00+02:00"],
            "w": [1.0, 2.0],
        }
    )
    s = qx.Study(frame, value="w", time="t")
    assert pd.api.types.is_datetime64_any_dtype(s.data["t"].dtype)
    naive = qx.Study(frame.assign(t=["2026-03-29 01:30", "2026-03-29 03:30"]), value="w", time="t")
    assert naive.data["hour"].tolist() == [1, 3]
    with pytest.raises(QCDataError, match="not times"):
        qx.Study(frame.assign(t=["2026-03-29 01:30", "yesterday noon"]), value="w", time="t")


_cells = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.integers(-(10**12), 10**12),
    st.text(max_size=6),
    st.none(),
    st.booleans(),
    st.sampled_from(["500,5", "1.234,5", " 7 ", "nan", "-inf", "—", "1e400"]),
)
_names = st.text(min_size=1, max_size=5)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    names=st.lists(_names, min_size=1, max_size=4),
    rows=st.integers(0, 6),
    data=st.data(),
)
def test_only_qcdataerror_escapes_and_input_is_unchanged(names, rows, data) -> None:
    columns = {name: data.draw(st.lists(_cells, min_size=rows, max_size=rows)) for name in names}
    frame = pd.DataFrame(columns, dtype=object)
    if data.draw(st.booleans()) and len(frame.columns):
        frame = pd.concat([frame, frame.iloc[:, :1]], axis=1)  # a duplicate column name
    before = frame.copy()
    value = data.draw(st.sampled_from([*names, "missing column"]))
    factor = data.draw(st.sampled_from([*names, "other"]))
    time = data.draw(st.sampled_from([None, *names]))
    try:
        qx.Study(frame, value=value, factors=[factor] if factor != value else [], time=time)
    except QCDataError:
        pass
    pd.testing.assert_frame_equal(frame, before)
    samples = data.draw(st.lists(st.sampled_from([*names, "missing column"]), max_size=3))
    try:
        qx.to_long(frame, samples, sample=data.draw(_names))
    except QCDataError:
        pass
    pd.testing.assert_frame_equal(frame, before)


def test_messages_name_rows_of_the_table_as_given() -> None:
    # Row 2 is dropped (missing value) and the rows are sorted by time before the checks
    # that follow, yet the messages must name the rows of the input table (1-based).
    frame = pd.DataFrame(
        {
            "t": ["2026-01-03 00:00", "2026-01-01 00:00", "2026-01-02 00:00", "not a time"],
            "w": [1.0, None, 2.0, 3.0],
            "lot": ["a", "b", "c", "d"],
        },
        index=[10, 20, 30, 40],
    )
    with pytest.raises(QCDataError, match=r"'t'.*row 4;"):
        qx.Study(frame, value="w", time="t")
    frame.loc[40, "t"] = "2026-01-04 00:00"
    frame.loc[30, "lot"] = None
    with pytest.raises(QCDataError, match=r"'lot'.*row 3;"):
        qx.Study(frame, value="w", time="t", subgroup="lot")


def test_to_long_refuses_a_missing_list_and_takes_number_names() -> None:
    wide = pd.DataFrame({"day": [1, 2], "s1": [1.0, 3.0], "s2": ["2,5", 4]})
    with pytest.raises(QCDataError, match="sample_columns must be a non-empty list"):
        qx.to_long(wide, None)
    with pytest.raises(QCDataError, match=r"an entry of sample_columns=\['s1'\] is not one"):
        qx.to_long(wide, [["s1"]])
    assert qx.to_long(wide, ["s1", "s2"])["value"].tolist() == [1.0, 2.5, 3.0, 4.0]
    from_array = pd.DataFrame(np.array([[500.1, 500.4], [499.7, 500.0]]))
    long = qx.to_long(from_array, [0, 1])
    assert long["value"].tolist() == [500.1, 500.4, 499.7, 500.0]
    assert long["sample"].tolist() == ["0", "1", "0", "1"]


@pytest.mark.parametrize(
    "spec, message",
    [
        (5, r"spec=5 is not a specification; give qx.Spec"),
        ({"usll": 505}, r"spec has no entry 'usll' \(did you mean 'usl'\?\)"),
        ({"lsl": "500"}, r"Spec lsl='500' is not a number"),
        ({"lsl": 505, "usl": 495}, r"Spec lsl=505 is not below usl=495"),
        ({"lsl": 495, "usl": 505, "target": 510}, r"Spec target=510 lies outside the limits"),
        ({"lsl": float("inf")}, r"Spec lsl=inf is not a number"),
    ],
)
def test_spec_arguments_are_checked(spec, message) -> None:
    with pytest.raises(QCDataError, match=message):
        qx.Spec.coerce(spec)


def test_spec_takes_tiny_and_huge_magnitudes() -> None:
    assert qx.Spec(lsl=1e-310, usl=2e-310).sides == ("lower", "upper")
    assert qx.Spec(lsl=-1e300, usl=1e300, target=0).target == 0.0
    assert qx.Spec.coerce(None) is None
    spec = qx.Spec(lsl=500)
    assert qx.Spec.coerce(spec) is spec

"""Files in the shapes plant PCs and spreadsheet exports write (issue 13's "Found" list).

Each test writes a file into tmp_path, reads it with qx.read and checks the values, their
order and what the read reports in ``frame.attrs["qcexplore_read"]``. The day-first and
dotted-date conventions are common practice; the byte-order marks are the Unicode
standard's (from memory: EF BB BF for UTF-8, FF FE for UTF-16 little-endian).
"""

from __future__ import annotations

import gc
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import qcexplore as qx
from qcexplore import QCDataError
from qcexplore.data.dates import check_time_line, parse_times
from qcexplore.data.io import READ_ATTRS, describe_reading

MARCH_TO_APRIL = ["2024-03-30", "2024-03-31", "2024-04-01", "2024-04-02"]


def _write(path: Path, text: str, encoding: str = "utf-8") -> Path:
    path.write_bytes(text.encode(encoding))
    return path


def _found(frame: pd.DataFrame) -> dict:
    return frame.attrs[READ_ATTRS]


def _days(frame: pd.DataFrame, column: str) -> list[str]:
    return frame[column].dt.strftime("%Y-%m-%d").tolist()


# ---- dates ------------------------------------------------------------------------------------
def test_dotted_day_first_dates_in_a_comma_file_keep_march_before_april(tmp_path: Path) -> None:
    path = _write(
        tmp_path / "fill.csv",
        "date,weight\n30.03.2024,500.5\n31.03.2024,501.0\n01.04.2024,499.5\n02.04.2024,500.2\n",
    )
    frame = qx.read(path)
    assert _days(frame, "date") == MARCH_TO_APRIL
    assert frame["date"].is_monotonic_increasing
    assert frame["weight"].tolist() == [500.5, 501.0, 499.5, 500.2]
    assert _found(frame)["dates"] == {"date": "day-first"}


def test_dotted_dates_that_no_day_settles_are_day_first_by_custom(tmp_path: Path) -> None:
    path = _write(tmp_path / "f.csv", "date,w\n01.03.2024,1\n02.03.2024,2\n03.03.2024,3\n")
    frame = qx.read(path)
    assert _days(frame, "date") == ["2024-03-01", "2024-03-02", "2024-03-03"]
    assert _found(frame)["dates"] == {"date": "day-first (dotted)"}


def test_semicolon_decimal_comma_file_reads_dates_not_integers(tmp_path: Path) -> None:
    # With the thousands point of a decimal-comma file, 30.03.2024 became 30032024.
    path = _write(
        tmp_path / "fill.csv",
        "Datum;Gewicht;Zeit\n30.03.2024;500,5;06:15\n31.03.2024;1.501,0;06:20\n"
        "01.04.2024;499,5;06:25\n02.04.2024;500,2;06:30\n",
    )
    frame = qx.read(path)
    assert pd.api.types.is_datetime64_any_dtype(frame["Datum"].dtype)
    assert _days(frame, "Datum") == MARCH_TO_APRIL
    assert frame["Gewicht"].tolist() == [500.5, 1501.0, 499.5, 500.2]
    found = _found(frame)
    assert (found["delimiter"], found["decimal"], found["thousands"]) == (";", ",", ".")
    assert describe_reading(frame) == (
        "fill.csv: text, UTF-8, semicolon-separated, decimal comma, thousands '.'; "
        "dates: 'Datum' day-first"
    )


@pytest.mark.parametrize(
    "cells, expected, order",
    [
        (["13/03/2026", "14/03/2026", "01/04/2026"], ["2026-03-13", "2026-03-14", "2026-04-01"],
         "day-first"),
        (["03/13/2026", "03/14/2026", "04/01/2026"], ["2026-03-13", "2026-03-14", "2026-04-01"],
         "month-first"),
        (["13-03-2026 06:00", "14-03-2026 6:30", "01-04-2026 07:00"],
         ["2026-03-13", "2026-03-14", "2026-04-01"], "day-first"),
        (["30-Mar-2026", '"Mar 31, 2026"', "1 April 2026"],
         ["2026-03-30", "2026-03-31", "2026-04-01"], "month names"),
        (["2026/3/30", "2026/3/31", "2026/4/1"], ["2026-03-30", "2026-03-31", "2026-04-01"],
         "year first"),
    ],
)  # fmt: skip
def test_slash_and_dash_dates_are_settled_by_a_number_above_12(
    tmp_path: Path, cells: list[str], expected: list[str], order: str
) -> None:
    path = _write(
        tmp_path / "d.csv", "when,w\n" + "".join(f"{c},{i}\n" for i, c in enumerate(cells))
    )
    frame = qx.read(path)
    assert _days(frame, "when") == expected
    assert _found(frame)["dates"] == {"when": order}


def test_us_clock_times_with_am_and_pm(tmp_path: Path) -> None:
    path = _write(tmp_path / "d.csv", "t,w\n3/30/2026 11:45 AM,1\n3/30/2026 12:15 PM,2\n")
    frame = qx.read(path)
    assert frame["t"].dt.strftime("%H:%M").tolist() == ["11:45", "12:15"]


def test_dates_no_number_settles_are_refused_with_the_argument_to_pass(tmp_path: Path) -> None:
    path = _write(tmp_path / "d.csv", "day,w\n01/03/2026,1\n02/03/2026,2\n05/03/2026,3\n")
    with pytest.raises(QCDataError, match=r"Column 'day' .*'01/03/2026'.*dayfirst=True"):
        qx.read(path)
    assert _days(qx.read(path, dayfirst=True), "day") == ["2026-03-01", "2026-03-02", "2026-03-05"]
    assert _days(qx.read(path, dayfirst=False), "day") == ["2026-01-03", "2026-02-03", "2026-05-03"]
    by_format = qx.read(path, date_format={"day": "%d/%m/%Y"})
    assert _days(by_format, "day") == ["2026-03-01", "2026-03-02", "2026-03-05"]
    assert _found(by_format)["dates"] == {"day": "format '%d/%m/%Y'"}


def test_a_column_mixing_day_first_and_month_first_is_refused(tmp_path: Path) -> None:
    path = _write(tmp_path / "d.csv", "day,w\n30/03/2026,1\n03/31/2026,2\n")
    with pytest.raises(QCDataError, match=r"'day' mixes day-first .*'30/03/2026'.*'03/31/2026'"):
        qx.read(path)


def test_integer_dates_are_read_with_a_format_or_refused_as_a_time(tmp_path: Path) -> None:
    # 30032024 as a number sorts after 01042024 (1042024): day-first digits are no order.
    path = _write(tmp_path / "d.csv", "day;w\n30032024;500,5\n31032024;501,0\n01042024;499,5\n")
    frame = qx.read(path)
    assert frame["day"].tolist() == [30032024, 31032024, 1042024]
    with pytest.raises(QCDataError, match=r"'day' holds numbers that are dates .*'%d%m%Y'"):
        parse_times(frame["day"], "day")
    dated = qx.read(path, date_format={"day": "%d%m%Y"})
    assert _days(dated, "day") == ["2024-03-30", "2024-03-31", "2024-04-01"]
    year_first = parse_times(pd.Series([20240330, 20240331, 20240401]), "day")
    assert year_first.dt.strftime("%Y-%m-%d").tolist() == ["2024-03-30", "2024-03-31", "2024-04-01"]


def test_a_date_format_for_a_column_must_fit_every_cell(tmp_path: Path) -> None:
    path = _write(tmp_path / "d.csv", "day,w\n30.03.2024,1\n2024-04-01,2\n")
    with pytest.raises(QCDataError, match=r"'day'.*'2024-04-01'.*row 2.*date_format"):
        qx.read(path, date_format={"day": "%d.%m.%Y"})


def test_mixed_zone_aware_and_naive_times_are_kept_as_text_and_refused_as_time(
    tmp_path: Path,
) -> None:
    # Converted to UTC and re-sorted, 07:30+02:00 (05:30 UTC) would come before 06:30.
    path = _write(
        tmp_path / "t.csv",
        "t,w\n2024-05-01 06:30,1\n2024-05-01 07:30+02:00,2\n2024-05-01 08:30,3\n",
    )
    frame = qx.read(path)
    assert frame["t"].tolist()[1] == "2024-05-01 07:30+02:00"
    assert "'t' kept as text (times with and without a time zone)" in describe_reading(frame)
    with pytest.raises(
        QCDataError, match=r"'t' mixes times with a time zone .*row 2\) and without"
    ):
        parse_times(frame["t"], "t")


def test_times_with_different_offsets_keep_their_instants(tmp_path: Path) -> None:
    # Europe/Berlin changes from +01:00 to +02:00 on 29 March 2026 (common knowledge).
    path = _write(
        tmp_path / "t.csv", "t,w\n2026-03-29T01:30:00+01:00,1\n2026-03-29T03:30:00+02:00,2\n"
    )
    frame = qx.read(path)
    assert frame["t"].dt.strftime("%H:%M").tolist() == ["00:30", "01:30"]  # in UTC, one hour apart


def test_a_day_of_month_beside_a_month_column_is_not_a_time_line(tmp_path: Path) -> None:
    # Sorted by day of month the months interleave: May 1, June 1, July 1, May 2, ...
    rows = [(month, day) for month in (5, 6, 7) for day in range(1, 31)]
    path = _write(
        tmp_path / "m.csv",
        "month,day,w\n" + "".join(f"{m},{d},{500 + m + d / 100:.2f}\n" for m, d in rows),
    )
    frame = qx.read(path)
    with pytest.raises(QCDataError) as refused:
        check_time_line(frame.assign(day=parse_times(frame["day"], "day")), "day")
    message = str(refused.value)
    assert "'day' (the time) starts again at rows 31, 61 (each time 'month' changes)" in message
    assert "pd.to_datetime(frame[['year', 'month', 'day']])" in message
    assert "leave time= out" in message
    joined = pd.to_datetime(frame[["month", "day"]].assign(year=2026))
    check_time_line(frame.assign(date=joined), "date")  # one time line: accepted
    assert joined.is_monotonic_increasing


# ---- numbers ----------------------------------------------------------------------------------
def test_a_column_mixing_decimal_comma_and_point_is_never_ten_times_too_large(
    tmp_path: Path,
) -> None:
    path = _write(tmp_path / "w.csv", "crew;w\nA;2,5\nB;2.5\nC;2,75\nD;3\n")
    frame = qx.read(path)
    assert frame["w"].tolist() == [2.5, 2.5, 2.75, 3.0]
    assert _found(frame)["decimal"] == "mixed"
    assert "'w' mixes decimal comma (rows 1, 3) and decimal point (row 2)" in describe_reading(
        frame
    )


def test_a_mixed_column_with_a_cell_either_mark_fits_is_refused_with_its_rows(
    tmp_path: Path,
) -> None:
    path = _write(tmp_path / "w.csv", "crew;w\nA;2,5\nB;2.5\nC;1.250\n")
    with pytest.raises(QCDataError, match=r"'w' uses both decimal marks .*'1.250' in row 3"):
        qx.read(path)
    assert qx.read(path, decimal=",")["w"].tolist() == [2.5, 2.5, 1250.0]
    assert qx.read(path, decimal=".")["w"].tolist() == [2.5, 2.5, 1.25]


def test_a_mark_nothing_settles_is_refused(tmp_path: Path) -> None:
    # 1.250 is 1.25 with a decimal point and 1250 with a thousands point: a gauge that reads
    # to three decimals writes such cells only, and so does a count with thousands marks.
    path = _write(tmp_path / "g.txt", "part\tgap\nA\t1.250\nB\t2.375\n")
    with pytest.raises(QCDataError, match=r"'gap' has numbers such as '1.250', '2.375' in rows"):
        qx.read(path)
    assert qx.read(path, decimal=".")["gap"].tolist() == [1.25, 2.375]
    assert qx.read(path, decimal=",")["gap"].tolist() == [1250, 2375]


def test_thousands_marks_follow_the_file(tmp_path: Path) -> None:
    german = _write(tmp_path / "de.csv", "n;w\n1.250;2,5\n2.500;3,5\n")
    english = _write(tmp_path / "en.csv", 'n,w\n"1,250",2.5\n"2,500",3.5\n')
    swiss = _write(tmp_path / "ch.txt", "n\tw\n1'250\t2.5\n12'500\t3.5\n")
    for path in (german, english, swiss):
        frame = qx.read(path)
        assert frame["n"].tolist() == [1250, 12500 if path is swiss else 2500], path.name
        assert frame["w"].tolist() == [2.5, 3.5]
        assert frame["n"].dtype == np.int64


# ---- structure and encoding -------------------------------------------------------------------
@pytest.mark.parametrize("header_too", [True, False])
def test_a_delimiter_at_the_end_of_every_row_does_not_shift_the_columns(
    tmp_path: Path, header_too: bool
) -> None:
    header = "crew;nozzle;w;" if header_too else "crew;nozzle;w"
    path = _write(tmp_path / "t.csv", f"{header}\nA;1;500,5;\nB;2;499,8;\n")
    frame = qx.read(path)
    assert list(frame.columns) == ["crew", "nozzle", "w"]
    assert frame["crew"].tolist() == ["A", "B"] and frame["w"].tolist() == [500.5, 499.8]
    assert isinstance(frame.index, pd.RangeIndex)
    assert _found(frame)["trailing_delimiter"]


@pytest.mark.parametrize(
    "encoding, reported",
    [
        ("utf-8", "UTF-8"),
        ("utf-8-sig", "UTF-8 with byte-order mark"),
        ("utf-16", "UTF-16 with byte-order mark"),  # a spreadsheet's "Unicode text"
        ("utf-16-be", None),  # no mark: refused, not read as mojibake
        ("cp1252", "cp1252 (not valid UTF-8; read as single-byte Western European text)"),
    ],
)
def test_encodings_are_detected_and_reported(
    tmp_path: Path, encoding: str, reported: str | None
) -> None:
    text = "crew\tGewicht\tOrt\nA\t500,5\tKöln\nB\t499,8\tMünchen €\n"
    path = _write(tmp_path / "u.txt", text, encoding)
    if reported is None:
        with pytest.raises(QCDataError, match="zero bytes.*encoding="):
            qx.read(path)
        assert qx.read(path, encoding="utf-16-be")["Ort"].tolist() == ["Köln", "München €"]
        return
    frame = qx.read(path)
    assert list(frame.columns) == ["crew", "Gewicht", "Ort"]
    assert frame["Ort"].tolist() == ["Köln", "München €"]
    assert frame["Gewicht"].tolist() == [500.5, 499.8]
    assert _found(frame)["encoding"] == reported


def test_latin1_bytes_that_cp1252_lacks_fall_back_to_latin1(tmp_path: Path) -> None:
    path = tmp_path / "l.csv"
    path.write_bytes(b"code;w\nA\x81;1\n")  # 0x81 is undefined in cp1252
    frame = qx.read(path)
    assert frame["code"].tolist() == ["A\x81"]
    assert _found(frame)["encoding"].startswith("latin-1")


def test_a_spreadsheet_sep_line_names_the_delimiter(tmp_path: Path) -> None:
    frame = qx.read(_write(tmp_path / "s.csv", "sep=;\ncrew;w\nA;1,5\n"))
    assert frame.to_dict("list") == {"crew": ["A"], "w": [1.5]}


def test_excel_and_parquet_as_before_with_what_was_read(tmp_path: Path) -> None:
    small = pd.DataFrame({"crew": ["A", "B"], "w": [500.5, 499.8]})
    with pd.ExcelWriter(tmp_path / "a.xlsx") as writer:
        small.to_excel(writer, sheet_name="weights", index=False)
    small.to_parquet(tmp_path / "a.parquet")
    excel = qx.read(tmp_path / "a.xlsx", sheet="weights")
    assert excel.to_dict("list") == small.to_dict("list")
    assert describe_reading(excel) == "a.xlsx: Excel, sheet 'weights'"
    assert describe_reading(qx.read(tmp_path / "a.parquet")) == "a.parquet: Parquet"
    assert describe_reading(small) == ""


def _open_files_on(path: Path) -> int:
    fds = Path("/proc/self/fd")
    return sum(1 for fd in fds.iterdir() if os.path.realpath(fd) == str(path.resolve()))


@pytest.mark.filterwarnings("error::ResourceWarning")
def test_read_leaves_no_file_open(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    small = pd.DataFrame({"crew": ["A", "B"] * 50, "w": np.arange(100.0)})
    small.to_csv(tmp_path / "a.csv", index=False)
    _write(tmp_path / "u.txt", small.to_csv(sep="\t", index=False), "utf-16")
    small.to_excel(tmp_path / "a.xlsx", index=False)
    small.to_parquet(tmp_path / "a.parquet")
    monkeypatch.setattr("qcexplore.data.io._PROGRESS_BYTES", 100)
    for name in ("a.csv", "u.txt", "a.xlsx", "a.parquet"):
        qx.read(tmp_path / name, progress=lambda fraction: None)
        assert _open_files_on(tmp_path / name) == 0, name
    gc.collect()  # a file object left open would warn here


def test_odd_read_arguments_are_refused(tmp_path: Path) -> None:
    small = pd.DataFrame({"crew": ["A", "B"], "w": [500.5, 499.8]})
    small.to_excel(tmp_path / "a.xlsx", index=False)
    with pytest.raises(QCDataError, match=r"sheet=\[0\]: give the sheet's name"):
        qx.read(tmp_path / "a.xlsx", sheet=[0])
    assert qx.read(tmp_path / "a.xlsx", sheet=0).to_dict("list") == small.to_dict("list")
    for options, match in [
        ({"decimal": ";"}, r"decimal=';': give ',' or '.'"),
        ({"dayfirst": "yes"}, r"dayfirst='yes': give True"),
        ({"date_format": {"d": 5}}, r"date_format=\{'d': 5\}: give '%d.%m.%Y'"),
        ({"encoding": "klingon"}, r"encoding='klingon' is not a known text encoding"),
        ({"progress": 5}, r"progress=5 is not a function"),
    ]:
        with pytest.raises(QCDataError, match=match):
            qx.read(_write(tmp_path / "w.csv", "crew,w\nA,1\n"), **options)


def test_a_study_on_a_day_first_file_keeps_the_time_order(tmp_path: Path) -> None:
    # The first case end to end: month-first parsing put 2 April before 30 March.
    path = _write(
        tmp_path / "fill.csv",
        "date,weight\n30.03.2024,500.5\n31.03.2024,501.0\n01.04.2024,499.5\n02.04.2024,500.2\n",
    )
    study = qx.Study(path, value="weight", time="date")
    assert study.data["date"].dt.strftime("%Y-%m-%d").tolist() == MARCH_TO_APRIL
    assert study.data["weight"].tolist() == [500.5, 501.0, 499.5, 500.2]

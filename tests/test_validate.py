"""The checks in qcexplore.data.validate: numbers, text numbers and dates, time lines, names."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcexplore.data.dates import check_time_line, parse_times, read_date_text
from qcexplore.data.numbers import number_cells, numeric_values, read_number_text
from qcexplore.data.validate import (
    check_role_names,
    column_names,
    finite_column,
    require_columns,
    require_text_names,
)
from qcexplore.errors import QCDataError


def test_numbers_pass_through_as_float64():
    frame = pd.DataFrame({"w": [500, 501, 499], "f": pd.array([1.5, 2.0, 2.5], dtype="Float64")})
    assert finite_column(frame, "w", "value").dtype == np.float64
    np.testing.assert_array_equal(finite_column(frame, "f", "value"), [1.5, 2.0, 2.5])
    cells = pd.DataFrame({"v": pd.Series([1, 2.5, np.int8(3)], dtype=object)})
    np.testing.assert_array_equal(finite_column(cells, "v", "value"), [1.0, 2.5, 3.0])


@pytest.mark.parametrize(
    ("column", "match"),
    [
        # Each message names the column, its role, the first rows (1-based) and what to do.
        ("gone", "Column 'gone' given as value not found; the table has: 'w', "),
        ("nan", r"Column 'nan' given as value: missing or infinite values in rows 2, 4; drop"),
        ("inf", r"Column 'inf' given as value: missing or infinite values in row 3; drop"),
        (
            "text",
            r"Column 'text' given as value: cells that are not numbers \('a', 'b', 'c'\) "
            r"in rows 1, 2, 3, 4; convert",
        ),  # fmt: skip
        ("mixed", r"Column 'mixed' given as value: cells that are not numbers \('x'\) in row 2;"),
        ("flag", r"Column 'flag' given as value: true/false values, not measurements; choose"),
        (
            "flag_cell",
            r"Column 'flag_cell' given as value: cells that are not numbers \(True\) in row 1;",
        ),
        (
            "list_cell",
            r"Column 'list_cell' given as value: cells that are not numbers \(\[2, 3\]\) in row 2;",
        ),
    ],
)
def test_column_messages_name_column_rows_and_remedy(column, match):
    frame = pd.DataFrame(
        {
            "w": [1.0, 2.0, 3.0, 4.0],
            "nan": [1.0, np.nan, 3.0, None],
            "inf": [1.0, 2.0, -np.inf, 4.0],
            "text": ["a", "b", "c", "d"],
            "mixed": pd.Series([1.0, "x", 3.0, None], dtype=object),
            "flag": [True, False, True, True],
            # As objects each cell keeps its own type: True is not taken for 1.
            "flag_cell": pd.Series([True, 1, 2, 3], dtype=object),
            "list_cell": pd.Series([1, [2, 3], 4, 5], dtype=object),
        }
    )
    with pytest.raises(QCDataError, match=match):
        finite_column(frame, column, "value")


_CELLS = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=4),
    st.complex_numbers(),
    st.lists(st.integers(), max_size=2),
    st.just(pd.NA),
    st.just(pd.NaT),
)


@settings(max_examples=150, deadline=None)
@given(cells=st.lists(_CELLS, max_size=8))
def test_odd_input_raises_only_qcdataerror(cells):
    # Property: whatever the cells, the result is finite float64 of the same length or a
    # QCDataError; no TypeError, OverflowError or KeyError escapes.
    try:
        out = finite_column(pd.DataFrame({"v": pd.Series(cells, dtype=object)}), "v", "value")
    except QCDataError:
        return
    assert out.dtype == np.float64 and out.shape == (len(cells),)
    assert np.isfinite(out).all()


@settings(max_examples=60, deadline=None)
@given(values=st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=1, max_size=20))
def test_finite_numbers_come_back_unchanged(values):
    frame = pd.DataFrame({"v": values})
    np.testing.assert_array_equal(finite_column(frame, "v", "value"), values)


# ---- numbers written as text (issue 13) -------------------------------------------------------
@pytest.mark.parametrize(
    ("cells", "options", "expected"),
    [
        # Decimal comma with thousands point, and the reverse: common practice in Europe and the
        # English-speaking world; the Swiss apostrophe and the French space likewise.
        (["500,5", "1.499,8", "2"], {}, [500.5, 1499.8, 2.0]),
        (["500.5", "1,499.8", "2"], {}, [500.5, 1499.8, 2.0]),
        (["1'499.8", "1 499,8", "12 345"], {}, [1499.8, 1499.8, 12345.0]),
        (["2,5", "2.5", "2,75"], {}, [2.5, 2.5, 2.75]),  # each by the only mark it can have
        (["1.250", "2.500"], {"default": "."}, [1.25, 2.5]),  # the file uses decimal points
        (["1.250", "2.500"], {"default": ","}, [1250.0, 2500.0]),  # the file uses decimal commas
        (["1.250", "2,5"], {}, [1250.0, 2.5]),  # the column uses the decimal comma
        (["1,250", "2.5"], {}, [1250.0, 2.5]),  # the column uses the decimal point
        (["1,250", "2,500"], {"decimal": "."}, [1250.0, 2500.0]),
        (["0.125", "0,125"], {}, [0.125, 0.125]),  # a group never starts with 0: decimals
        (["1.234.567", "1,234,567"], {}, [1234567.0, 1234567.0]),
        (["1,5E-03", "-.5", "+5", "inf"], {}, [0.0015, -0.5, 5.0, np.inf]),
    ],
)
def test_number_text_reads_each_decimal_mark(cells, options, expected):
    read = read_number_text(pd.Series(cells), **options)
    assert read.values.tolist() == expected
    assert read.readable


def test_number_text_refuses_what_is_not_a_number_or_is_in_doubt():
    read = read_number_text(pd.Series(["500", "abc", "", "1_000", "NA"]))
    assert read.unreadable.tolist() == [1, 3] and read.blank.tolist() == [0, 0, 1, 0, 1]
    doubt = read_number_text(pd.Series(["2,5", "2.5", "1.250"]))
    assert doubt.unsettled.tolist() == [2] and np.isnan(doubt.values[2])
    assert read_number_text(pd.Series(["1.250", "2,500"])).unsettled.tolist() == [0, 1]
    with pytest.raises(QCDataError, match=r"'n' has numbers such as '1.250', '2.500' in rows 1, 2"):
        numeric_values(pd.DataFrame({"n": ["1.250", "2.500"]}), "n")
    assert read_number_text(pd.Series(["2,5", "2.5", "1.250"]), decimal=",").values[2] == 1250.0
    frame = pd.DataFrame({"w": ["2,5", "2.5", "1.250"]})
    with pytest.raises(QCDataError, match=r"'w' uses both decimal marks .*'1.250' in row 3"):
        numeric_values(frame, "w")


def test_number_cells_keep_numbers_and_read_text():
    cells = pd.Series([1.5, "2,5", None, True, [1], 2**70], dtype=object)
    read = number_cells(cells)
    assert read.values[[0, 1, 5]].tolist() == [1.5, 2.5, float(2**70)]
    assert read.unreadable.tolist() == [3, 4] and read.blank.tolist()[2]


# ---- dates written as text --------------------------------------------------------------------
@pytest.mark.parametrize(
    ("cells", "expected", "order"),
    [
        (["30/03/2024", "02/04/2024"], ["2024-03-30 00:00", "2024-04-02 00:00"], "day-first"),
        (["03/30/2024", "04/02/2024"], ["2024-03-30 00:00", "2024-04-02 00:00"], "month-first"),
        (["01.03.24 6:05", "02.03.24"], ["2024-03-01 06:05", "2024-03-02 00:00"],
         "day-first (dotted)"),
        # POSIX strptime %y (from memory): 69-99 are 1969-1999, 00-68 are 2000-2068.
        (["13.01.69", "13.01.68"], ["1969-01-13 00:00", "2068-01-13 00:00"], "day-first"),
        (["3/30/2024 12:05 AM", "3/30/2024 12:05 PM"], ["2024-03-30 00:05", "2024-03-30 12:05"],
         "month-first"),
        (["2024-03-30 06:15", "2024-03-30T06:16:00"], ["2024-03-30 06:15", "2024-03-30 06:16"],
         "year first"),
    ],
)  # fmt: skip
def test_date_text_tells_the_day_from_the_month(cells, expected, order):
    read = read_date_text(pd.Series(cells), "t")
    assert read.values.dt.strftime("%Y-%m-%d %H:%M").tolist() == expected
    assert (read.order, read.problem) == (order, None)


def test_date_text_refuses_to_guess():
    with pytest.raises(QCDataError, match=r"'t' has dates such as '01/03/2024' .*dayfirst=True"):
        read_date_text(pd.Series(["01/03/2024", "02/03/2024"]), "t")
    with pytest.raises(QCDataError, match=r"dotted dates such as '03.30.2024'"):
        read_date_text(pd.Series(["03.30.2024"]), "t")
    given = read_date_text(pd.Series(["01/03/2024"]), "t", dayfirst=False)
    assert given.values.dt.month.tolist() == [1]


def test_parse_times_refuses_clock_times_without_a_date_and_mixed_zones():
    with pytest.raises(QCDataError, match=r"'clock'.*clock times without a date: join"):
        parse_times(pd.Series(["06:15", "06:20"]), "clock")
    mixed = pd.Series(
        [pd.Timestamp("2024-05-01 06:30"), pd.Timestamp("2024-05-01 07:30", tz="Europe/Berlin")],
        dtype=object,
        index=[10, 11],
    )
    with pytest.raises(QCDataError, match=r"'t' mixes times with a time zone .*row 12\) and"):
        parse_times(mixed, "t")
    with pytest.raises(QCDataError, match=r"'t' holds bool values, not times"):
        parse_times(pd.Series([True, False]), "t")


# ---- the time line ----------------------------------------------------------------------------
def test_a_time_that_starts_again_in_blocks_is_refused():
    blocks = pd.DataFrame({"nozzle": np.repeat([1, 2, 3], 4), "n": np.tile(np.arange(4.0), 3)})
    with pytest.raises(QCDataError, match=r"'n' \(the time\) starts again at rows 5, 9 \(each"):
        check_time_line(blocks, "n")
    with pytest.raises(
        QCDataError, match=r"in every subgroup: it numbers the samples within 'nozzle'"
    ):
        check_time_line(blocks, "n", subgroup="nozzle")
    check_time_line(blocks.sort_values("n", kind="stable"), "n")  # sorted first: a time line


@pytest.mark.parametrize(
    "times",
    [
        [5.0, 4, 3, 2, 1, 0],  # written backwards
        [1.0, 2, 3, 5, 4, 6, 7, 8],  # one late entry
        [7.0, 8, 9, 1, 2, 3],  # two exports, the later first
        [3.0, 9, 1, 7, 2, 8, 5, 4, 6, 0],  # no order at all
    ],
)
def test_rows_that_sorting_puts_right_pass(times):
    check_time_line(pd.DataFrame({"t": times, "w": np.arange(len(times))}), "t")


def test_timestamps_are_a_time_line_by_themselves():
    frame = pd.DataFrame(
        {"nozzle": [1, 1, 2, 2], "t": pd.to_datetime(["2026-01-01 06:00", "2026-01-01 07:00"] * 2)}
    )
    check_time_line(frame, "t")


# ---- names, arguments and short messages ------------------------------------------------------
def test_column_names_must_be_single_names_and_text_for_the_study():
    with pytest.raises(QCDataError, match=r"^value=\['v'\] is not one column name"):
        check_role_names(["v"], None, None, (), ())
    with pytest.raises(QCDataError, match=r"an entry of factors=\[1\] is not one column name"):
        column_names([[1]], "factors")
    with pytest.raises(QCDataError, match=r"factors=5 is not a list of column names"):
        column_names(5, "factors")
    assert column_names([0, "crew"], "factors") == (0, "crew")
    array_frame = pd.DataFrame(np.ones((2, 3)))
    with pytest.raises(QCDataError, match=r"Column names must be text; this table has 0, 1, 2 "):
        require_text_names(array_frame)
    with pytest.raises(QCDataError, match=r"^Column 7 given as value not found; the table has: 0,"):
        finite_column(array_frame, 7, "value")
    assert finite_column(array_frame, 1, "value").tolist() == [1.0, 1.0]


def test_a_huge_cell_is_cut_in_messages():
    huge = "x" * 5_000_000
    frame = pd.DataFrame({"w": ["1", huge], huge: [1, 2], "t": ["2026-01-01", huge]})
    attempts = [
        lambda: numeric_values(frame, "w"),
        lambda: finite_column(frame, "w", "value"),
        lambda: parse_times(frame["t"], "t"),
        lambda: require_columns(frame, [huge + "y"], "factor"),
        lambda: column_names(huge, "factors"),
        lambda: check_role_names(huge, None, huge, (), ()),
    ]
    for attempt in attempts:
        with pytest.raises(QCDataError) as refused:
            attempt()
        assert len(str(refused.value)) < 800 and "(5000002 characters)" in str(refused.value)

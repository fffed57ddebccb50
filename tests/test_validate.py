"""The shared numeric checks in qcexplore.data.validate: finite_column and finite_array."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcexplore.data.validate import finite_array, finite_column
from qcexplore.errors import QCDataError


def test_numbers_pass_through_as_float64():
    frame = pd.DataFrame({"w": [500, 501, 499], "f": pd.array([1.5, 2.0, 2.5], dtype="Float64")})
    assert finite_column(frame, "w", "value").dtype == np.float64
    np.testing.assert_array_equal(finite_column(frame, "f", "value"), [1.5, 2.0, 2.5])
    np.testing.assert_array_equal(finite_array([1, 2.5, np.int8(3)], "values"), [1.0, 2.5, 3.0])
    np.testing.assert_array_equal(finite_array(np.array([[1, 2], [3, 4]]), "values"), [1, 2, 3, 4])


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
        }
    )
    with pytest.raises(QCDataError, match=match):
        finite_column(frame, column, "value")


def test_array_messages_use_positions():
    with pytest.raises(QCDataError, match=r"^sizes: missing or infinite values in row 2;"):
        finite_array([1.0, float("nan")], "sizes")
    with pytest.raises(QCDataError, match=r"^sizes: cells that are not numbers \(True\) in row 1;"):
        finite_array([True, 1], "sizes")
    with pytest.raises(QCDataError, match="^sizes: true/false values"):
        finite_array(np.array([True, False]), "sizes")
    with pytest.raises(QCDataError, match=r"^sizes: cells that are not numbers \(\[2, 3\]\)"):
        finite_array([1, [2, 3]], "sizes")


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
@given(cells=st.lists(_CELLS, max_size=8), as_column=st.booleans())
def test_odd_input_raises_only_qcdataerror(cells, as_column):
    # Property: whatever the cells, the result is finite float64 of the same length or a
    # QCDataError; no TypeError, OverflowError or KeyError escapes.
    try:
        if as_column:
            frame = pd.DataFrame({"v": pd.Series(cells, dtype=object)})
            out = finite_column(frame, "v", "value")
        else:
            out = finite_array(cells, "values")
    except QCDataError:
        return
    assert out.dtype == np.float64 and out.shape == (len(cells),)
    assert np.isfinite(out).all()


@settings(max_examples=60, deadline=None)
@given(values=st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=1, max_size=20))
def test_finite_numbers_come_back_unchanged(values):
    frame = pd.DataFrame({"v": values})
    np.testing.assert_array_equal(finite_column(frame, "v", "value"), values)
    np.testing.assert_array_equal(finite_array(values, "values"), values)

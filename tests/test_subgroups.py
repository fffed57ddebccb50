"""Per-group sufficient statistics against pandas groupby (a general-purpose library)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcexplore.errors import QCDataError
from qcexplore.stats.subgroups import constant_within, group_codes, group_moments, subgroup_table


def _random_groups(seed: int, n: int = 5_000, k: int = 400) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, k, n)
    values = rng.normal(10.0, 3.0, n) + codes * 0.01
    # Multiples of 2**-10 stay exact after adding 1e9, so any difference in spread comes
    # from the algorithm, not from rounding the offset input.
    return np.round(values * 1024) / 1024, codes


@pytest.mark.parametrize("offset", [0.0, 1e9])
def test_moments_equal_pandas_groupby(offset: float) -> None:
    # Reference: pandas groupby on the un-offset values; with the offset, spread must be the
    # same to 1e-9 relative (issue 2) and the mean shifted by exactly the offset.
    values, codes = _random_groups(1)
    reference = (
        pd.Series(values).groupby(codes).agg(["count", "mean", "var", "min", "max"]).sort_index()
    )
    m = group_moments(values + offset, codes)
    present = m.n > 0
    np.testing.assert_array_equal(m.n[present], reference["count"].to_numpy())
    rtol = 1e-12 if offset == 0 else 1e-9
    np.testing.assert_allclose(m.var[present], reference["var"].to_numpy(), rtol=rtol)
    np.testing.assert_allclose(
        m.range[present], (reference["max"] - reference["min"]).to_numpy(), rtol=rtol, atol=1e-6
    )
    np.testing.assert_allclose(m.mean[present] - offset, reference["mean"].to_numpy(), atol=1e-6)
    if offset == 0:
        np.testing.assert_allclose(m.mean[present], reference["mean"].to_numpy(), rtol=1e-12)


def test_blocks_of_sorted_rows_sum_squares_to_the_same_bits_as_one_bincount() -> None:
    # More rows than a block, one group longer than a block, empty groups between: with the
    # codes in order the squared deviations are summed in blocks; the sums must equal those
    # of a single np.bincount over all rows bit for bit, and pandas' min and max (reference:
    # numpy and pandas).
    rng = np.random.default_rng(7)
    sizes = np.r_[rng.integers(1, 9, 30_000), 150_000, rng.integers(1, 9, 30_000)]
    codes = np.repeat(np.arange(sizes.size) * 2, sizes)  # odd codes: groups without rows
    values = rng.normal(1e6, 2.0, codes.size)
    k = 2 * sizes.size + 1
    m = group_moments(values, codes, k)
    n = np.bincount(codes, minlength=k)
    mean = np.bincount(codes, values, k) / np.where(n > 0, n, 1)
    ss = np.bincount(codes, (values - mean[codes]) ** 2, k)
    present = n > 0
    np.testing.assert_array_equal(m.ss[present], ss[present])
    assert np.isnan(m.ss[~present]).all()
    reference = pd.Series(values).groupby(codes).agg(["min", "max"])
    np.testing.assert_array_equal(m.min[present], reference["min"].to_numpy())
    np.testing.assert_array_equal(m.max[present], reference["max"].to_numpy())
    # The same rows shuffled take the one-bincount path: the same moments to rounding.
    order = rng.permutation(codes.size)
    shuffled = group_moments(values[order], codes[order], k)
    np.testing.assert_allclose(shuffled.ss[present], m.ss[present], rtol=1e-9)


def test_no_values_at_all_gives_empty_groups() -> None:
    # Every group empty (a level that occurs nowhere): NaN moments, not a dtype error.
    m = group_moments(np.array([]), np.array([], dtype=int), n_groups=3)
    assert m.n.tolist() == [0, 0, 0]
    assert np.isnan(m.ss).all() and np.isnan(m.mean).all() and np.isnan(m.min).all()


def test_unsorted_codes_and_empty_groups() -> None:
    m = group_moments(np.array([5.0, 1.0, 3.0]), np.array([2, 0, 2]), n_groups=4)
    assert m.n.tolist() == [1, 0, 2, 0]
    assert m.range[2] == 2.0 and np.isnan(m.mean[1]) and np.isnan(m.min[3])
    assert np.isnan(m.sd[0])  # one value: no spread


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(0, 6), st.floats(-1e6, 1e6, allow_nan=False)), min_size=1, max_size=60
    )
)
def test_moments_match_groupby_property(rows: list[tuple[int, float]]) -> None:
    codes = np.array([c for c, _ in rows])
    values = np.array([v for _, v in rows])
    m = group_moments(values, codes, 7)
    reference = pd.Series(values).groupby(codes).agg(["count", "mean", "min", "max", "var"])
    for code, row in reference.iterrows():
        assert m.n[code] == row["count"]
        assert m.min[code] == row["min"] and m.max[code] == row["max"]
        assert m.mean[code] == pytest.approx(row["mean"], rel=1e-9, abs=1e-6)
        if row["count"] > 1:
            assert m.var[code] == pytest.approx(row["var"], rel=1e-7, abs=1e-3)


def test_subgroup_table_columns_and_constant_factors() -> None:
    frame = pd.DataFrame(
        {
            "day": pd.Categorical(["d2", "d2", "d1", "d1"], categories=["d2", "d1"], ordered=True),
            "w": [1.0, 3.0, 2.0, 2.0],
            "crew": pd.Categorical(["A", "A", "B", "B"]),
            "nozzle": pd.Categorical(["1", "2", "1", "2"]),
            "t": pd.to_datetime(
                ["2026-01-02 06:00", "2026-01-02 07:00", "2026-01-01 00:00", "2026-01-01 00:00"]
            ),
        }
    )
    table = subgroup_table(frame, value="w", subgroup="day", time="t", factors=("crew", "nozzle"))
    assert list(table.columns) == ["subgroup", "n", "mean", "sd", "range", "start", "crew"]
    assert table["subgroup"].tolist() == ["d2", "d1"]
    assert table["mean"].tolist() == [2.0, 2.0]
    assert table["range"].tolist() == [2.0, 0.0]
    assert table["crew"].tolist() == ["A", "B"]
    assert table["start"].iloc[0] == pd.Timestamp("2026-01-02 06:00")


@settings(max_examples=40, deadline=None)
@given(
    labels=st.lists(st.sampled_from(["a", "b", "c", "d"]), min_size=1, max_size=30),
    unused=st.lists(st.sampled_from(["e", "f"]), max_size=2, unique=True),
)
def test_group_codes_match_pandas_with_unused_levels_dropped(labels, unused):
    # Reference: pandas Categorical.remove_unused_categories (a general-purpose library).
    column = pd.Categorical(labels, categories=[*unused, "d", "c", "b", "a"])
    codes, levels = group_codes(pd.DataFrame({"g": column}), "g", "subgroup")
    reference = column.remove_unused_categories()
    assert codes.tolist() == reference.codes.tolist()
    assert list(levels) == list(reference.categories)
    # a plain column: levels in order of first appearance (pandas.unique)
    codes, levels = group_codes(pd.DataFrame({"g": labels}), "g", "subgroup")
    assert list(levels) == list(pd.unique(pd.Series(labels)))
    assert [levels[c] for c in codes] == labels


def test_group_codes_refuse_missing_labels_naming_role_and_row() -> None:
    frame = pd.DataFrame({"crew": ["a", None, "b"]})
    with pytest.raises(QCDataError, match=r"by='crew': missing labels in row 2;"):
        group_codes(frame, "crew", "by")


def test_constant_within_matches_pandas_nunique() -> None:
    rng = np.random.default_rng(3)
    groups = rng.integers(0, 50, 400)
    codes = np.where(groups % 3 == 0, groups % 4, rng.integers(0, 4, 400))
    shared = constant_within(codes, groups, 50)
    frame = pd.DataFrame({"g": groups, "c": codes}).groupby("g")["c"]
    one = frame.nunique() == 1  # pandas: groups with a single code
    assert (shared[one.index[one]] == frame.first()[one].to_numpy()).all()
    assert (shared[one.index[~one]] == -1).all()

"""The Study core: roles, ordering, caching, immutability."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import qcexplore as qx
from qcexplore import QCDataError


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return qx.demo.filling_line(seed=4, days=6)[0]


def test_subgroups_ordered_by_time_not_by_label(frame) -> None:
    shuffled = frame.sample(frac=1.0, random_state=1)
    shuffled["round_label"] = "r" + (
        999 - shuffled["round"].dt.day_of_year * 24 - shuffled["round"].dt.hour
    ).astype(str)  # labels that sort the wrong way
    before = shuffled.copy()
    s = qx.Study(shuffled, value="net_g", subgroup="round_label", time="taken_at")
    table = s.subgroups
    assert table["start"].is_monotonic_increasing
    assert (
        s.data["taken_at"]
        .groupby(s.data["round_label"], observed=True)
        .min()
        .is_monotonic_increasing
    )
    pd.testing.assert_frame_equal(shuffled, before)  # the caller's frame is never mutated


def test_without_time_subgroups_follow_first_appearance() -> None:
    frame = pd.DataFrame({"lot": ["b", "b", "a", "c", "a"], "w": [1.0, 2.0, 3.0, 4.0, 5.0]})
    s = qx.Study(frame, value="w", subgroup="lot")
    assert s.subgroups["subgroup"].tolist() == ["b", "a", "c"]
    assert s.subgroups["n"].tolist() == [2, 2, 1]
    assert s.data["w"].tolist() == [1.0, 2.0, 3.0, 5.0, 4.0]


def test_individuals_when_no_subgroup(frame) -> None:
    s = qx.Study(frame.head(30), value="net_g", time="taken_at")
    table = s.subgroups
    assert len(table) == 30 and (table["n"] == 1).all()
    assert "observation" not in s.data.columns
    assert s.subgroup is None


def test_subgroup_table_matches_pandas_groupby(frame) -> None:
    s = qx.Study(frame, value="net_g", subgroup="round", time="taken_at", factors=["crew"])
    ours = s.subgroups.set_index("subgroup")
    ref = frame.groupby("round")["net_g"].agg(["count", "mean", "std", "min", "max"])
    np.testing.assert_allclose(ours["mean"].to_numpy(), ref["mean"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(ours["sd"].to_numpy(), ref["std"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(
        ours["range"].to_numpy(), (ref["max"] - ref["min"]).to_numpy(), rtol=1e-12
    )
    assert "crew" in ours.columns  # constant within each hourly round
    assert "nozzle" not in ours.columns


def test_study_is_immutable_and_caches(frame) -> None:
    s = qx.Study(frame, value="net_g", subgroup="round", time="taken_at", factors=["crew"])
    data = s.data
    data["net_g"] = 0.0
    assert s.data["net_g"].iloc[0] != 0.0
    table = s.subgroups
    table["mean"] = 0.0
    assert s.subgroups["mean"].iloc[0] != 0.0


def test_roles_round_trip_and_restrict(frame) -> None:
    s = qx.Study(
        frame, value="net_g", subgroup="round", time="taken_at", factors=["crew", "shift"],
        measured_by=["crew"], spec={"lsl": 500}, units="g",
    )  # fmt: skip
    again = qx.Study(s.data, **s.roles())
    pd.testing.assert_frame_equal(again.subgroups, s.subgroups)
    window = s.restrict("2026-09-08", "2026-09-09 23:59")
    assert window.data["taken_at"].min() >= pd.Timestamp("2026-09-08")
    assert len(window.subgroups) == 48
    with pytest.raises(QCDataError, match="widen"):
        s.restrict("2030-01-01")
    assert s.process_factors == ("shift",)
    assert s.spec == qx.Spec(lsl=500)


def test_measured_by_is_added_to_factors_and_subgroup_cannot_be_factor(frame) -> None:
    s = qx.Study(frame, value="net_g", subgroup="round", measured_by=["crew"])
    assert s.factors == ("crew",)
    with pytest.raises(QCDataError, match="subgroup"):
        qx.Study(frame, value="net_g", subgroup="crew", factors=["crew"])
    with pytest.raises(QCDataError, match="need time"):
        qx.Study(frame, value="net_g", factors=["weekday"])
    with pytest.raises(QCDataError, match="not a factor"):
        qx.Study(frame, value="net_g", subgroup="round").chart(by="nozzle")


@pytest.fixture(scope="module")
def demo_study() -> qx.Study:
    frame, _ = qx.demo.filling_line(seed=6, days=10)
    return qx.Study(
        frame, value="net_g", subgroup="round", time="taken_at", factors=["crew", "nozzle"],
        measured_by=["crew"], spec=qx.Spec(lsl=500), units="g",
    )  # fmt: skip


def test_adjust_for_removes_the_measurement_offsets(demo_study) -> None:
    raw = demo_study.data.groupby("crew", observed=True)["net_g"].mean()
    adjusted_frame = demo_study.adjusted_data(True)
    adjusted = adjusted_frame.groupby("crew", observed=True)["net_g"].mean()
    assert raw.max() - raw.min() > 1.0  # crew B's scale reads high in the demo
    assert adjusted.max() - adjusted.min() < raw.max() - raw.min()
    offsets = demo_study.variation().offsets.set_index("level")["offset"]
    # value minus its level's offset, row by row (the contract of adjusted_values)
    expected = demo_study.data["net_g"] - demo_study.data["crew"].map(offsets).astype(float)
    np.testing.assert_allclose(adjusted_frame["net_g"].to_numpy(), expected.to_numpy(), atol=1e-9)
    chart = demo_study.chart(adjust_for=True)
    assert chart.points["stat"].std() < demo_study.chart().points["stat"].std()
    assert demo_study.chart(adjust_for=["crew"]) is chart  # cached by its arguments
    with pytest.raises(QCDataError, match="not measured_by"):
        demo_study.chart(adjust_for=["nozzle"])


def test_capability_uses_the_chart_sigma_and_spec(demo_study) -> None:
    result = demo_study.capability()
    sigma = float(demo_study.chart().limits["sigma"].iloc[0])
    assert result.sigma_within == pytest.approx(sigma)
    assert result.lsl == 500 and result.usl is None
    assert set(result.indices["index"]) >= {"cpk", "ppk"}
    with pytest.raises(QCDataError, match="specification"):
        qx.Study(demo_study.data, value="net_g", subgroup="round").capability()


def test_subgroup_cells_that_are_not_labels_are_refused() -> None:
    frame = pd.DataFrame({"w": [1.0, 2.0], "lot": pd.Series([["a"], ["b"]], dtype=object)})
    with pytest.raises(QCDataError, match="not single labels"):
        qx.Study(frame, value="w", subgroup="lot")

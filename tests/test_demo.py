"""The demo's ground truth shows in its data (simulation checks on our own scenario)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import qcexplore as qx


@pytest.fixture(scope="module")
def demo() -> tuple[pd.DataFrame, dict]:
    return qx.demo.filling_line(seed=3)


def test_same_seed_same_data() -> None:
    a, _ = qx.demo.filling_line(seed=5, days=3)
    b, _ = qx.demo.filling_line(seed=5, days=3)
    pd.testing.assert_frame_equal(a, b)


def test_layout_crews_rotate_and_scales_follow_crews(demo) -> None:
    frame, truth = demo
    assert frame["crew"].nunique() == 3 and frame["nozzle"].nunique() == 6
    assert (frame.groupby("round")["crew"].nunique() == 1).all()  # one crew per hourly round
    crosstab = pd.crosstab(frame["crew"], frame["shift"])
    assert (crosstab > 0).all().all()  # every crew works every shift: crew and shift separable
    assert (pd.crosstab(frame["crew"], frame["scale"]) > 0).sum(axis=1).eq(1).all()
    expected_rows = 28 * 24 * 5
    assert len(frame) == expected_rows - truth["missed"]["count"]


def test_offset_crew_reads_high_by_the_injected_size(demo) -> None:
    frame, truth = demo
    # Paired by production day: each crew works one 8-hour block a day, so day-to-day
    # block differences are close to independent despite the hourly autocorrelation.
    blocks = frame.groupby(["day", "crew"])["net_g"].mean().unstack()
    crew = truth["crew_offset"]["crew"]
    others = [c for c in blocks.columns if c != crew]
    difference = blocks[crew] - blocks[others].mean(axis=1)
    se = difference.std(ddof=1) / np.sqrt(len(difference))
    assert abs(difference.mean() - truth["crew_offset"]["size_g"]) < 3 * se


def test_drifting_nozzle_moves_after_the_stated_day(demo) -> None:
    frame, truth = demo
    drift = truth["nozzle_drift"]
    is_drifting = frame["nozzle"] == drift["nozzle"]
    daily = frame.groupby(["day", is_drifting])["net_g"].mean().unstack()
    gap = daily[True] - daily[False]
    before = gap[gap.index < drift["start_day"]]
    after = gap[gap.index >= drift["start_day"] + 3]
    assert abs(before.mean()) < 3 * before.std(ddof=1) / np.sqrt(len(before))
    days_in = after.index - (drift["start_day"] - 1) - 0.5
    slope = np.polyfit(days_in, after.to_numpy(), 1)[0]
    assert after.mean() > 1.0 and slope == pytest.approx(drift["slope_g_per_day"], rel=0.35)


def test_effects_switch_off() -> None:
    frame, truth = qx.demo.filling_line(seed=2, crew_offset=0, drift=0, phi=0, missed=0)
    assert not any(truth[k]["active"] for k in ("crew_offset", "nozzle_drift", "missed"))
    assert len(frame) == 28 * 24 * 5
    assert abs(frame.groupby("crew")["net_g"].mean().std()) < 0.2


@pytest.mark.parametrize(
    "options", [{"days": 0}, {"jars_per_round": 7}, {"missed": 1.0}, {"phi": 1.0}]
)
def test_bad_options_raise_qcdataerror(options) -> None:
    with pytest.raises(qx.QCDataError, match="filling_line"):
        qx.demo.filling_line(**options)

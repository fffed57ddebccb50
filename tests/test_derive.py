"""Derived time factors: shifts across midnight and across daylight-saving changes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import qcexplore as qx
from qcexplore import QCDataError
from qcexplore.data.derive import derive_time_factors

SHIFTS = {"early": "06:00", "late": "14:00", "night": "22:00"}


def test_night_shift_belongs_to_the_day_it_started() -> None:
    times = pd.Series(
        pd.to_datetime(
            ["2026-03-02 05:59", "2026-03-02 06:00", "2026-03-02 13:59", "2026-03-02 14:00",
             "2026-03-02 21:59", "2026-03-02 22:00", "2026-03-03 00:00", "2026-03-03 05:59"]
        )
    )  # fmt: skip
    out = derive_time_factors(times, SHIFTS)
    names, days = out["shift"], out["day"]
    assert names.tolist() == ["night", "early", "early", "late", "late", "night", "night", "night"]
    assert [str(d) for d in days] == ["2026-03-01"] + ["2026-03-02"] * 7


@pytest.mark.parametrize(
    "first_hour, expected_night_hours",
    # Europe/Berlin: clocks go forward on the last Sunday of March (29 March 2026, 02:00 -> 03:00)
    # and back on the last Sunday of October (25 October 2026, 03:00 -> 02:00): common knowledge.
    [("2026-03-28 22:00", 7), ("2026-10-24 22:00", 9)],
)
def test_shifts_across_daylight_saving_change(first_hour: str, expected_night_hours: int) -> None:
    utc = pd.date_range(
        pd.Timestamp(first_hour, tz="Europe/Berlin").tz_convert("UTC"), periods=12, freq="h"
    )
    local = pd.Series(utc.tz_convert("Europe/Berlin"))
    out = derive_time_factors(local, SHIFTS)
    names, days = out["shift"], out["day"]
    night = names == "night"
    assert int(night.sum()) == expected_night_hours  # the night is an hour shorter or longer
    assert names.iloc[expected_night_hours] == "early"
    assert local.iloc[expected_night_hours].hour == 6
    assert {str(d) for d in days[night.to_numpy()]} == {first_hour[:10]}


def test_weekday_follows_production_day_when_shifts_are_given() -> None:
    times = pd.Series(pd.to_datetime(["2026-09-08 02:00", "2026-09-08 07:00"]))  # a Tuesday
    with_shifts = derive_time_factors(times, SHIFTS)
    assert with_shifts["weekday"].tolist() == ["Monday", "Tuesday"]
    assert derive_time_factors(times)["weekday"].tolist() == ["Tuesday", "Tuesday"]
    assert with_shifts["hour"].tolist() == [2, 7]


def test_study_derives_shift_and_matches_demo_labels() -> None:
    frame, _ = qx.demo.filling_line(days=8)
    s = qx.Study(
        frame.drop(columns=["shift"]), value="net_g", subgroup="round", time="taken_at",
        factors=["shift", "weekday"], shifts=SHIFTS,
    )  # fmt: skip
    expected = frame.sort_values("taken_at", kind="stable")["shift"].to_numpy()
    assert (s.data["shift"].astype(str).to_numpy() == expected).all()
    assert "shift" in s.derived_factors


@pytest.mark.parametrize(
    "shifts, message",
    [
        ({}, "map shift names"),
        ({"a": "25:00"}, "clock time"),
        ({"a": "06:00", "b": "6:00"}, "same"),
    ],
)
def test_bad_shift_maps(shifts, message) -> None:
    times = pd.Series(pd.to_datetime(["2026-09-08 02:00"]))
    with pytest.raises(QCDataError, match=message):
        derive_time_factors(times, shifts)


@pytest.mark.parametrize("zone", [None, "Europe/Berlin", "America/New_York"])
@pytest.mark.parametrize("shifts", [None, SHIFTS])
def test_derived_factors_equal_a_row_by_row_reference(zone, shifts) -> None:
    # Reference: pandas' own per-row accessors (dt.hour, dt.strftime("%Y-%m-%d"),
    # dt.day_name()) on every timestamp, the shift read from the local hour and the
    # production day moved back a day before the first shift starts. Two months of random
    # minutes cross a daylight-saving change.
    rng = np.random.default_rng(7)
    minutes = np.sort(rng.integers(0, 60 * 24 * 61, 3000))
    times = pd.Series(pd.Timestamp("2026-03-01", tz="UTC") + pd.to_timedelta(minutes, "min"))
    times = times.dt.tz_convert(zone) if zone else times.dt.tz_localize(None)
    out = derive_time_factors(times, shifts)
    assert out["hour"].tolist() == times.dt.hour.tolist()
    local = times.dt.tz_localize(None)
    day = local.dt.normalize()
    if shifts is not None:
        day = day - pd.to_timedelta((local.dt.hour < 6).astype(int), unit="D")
        # SHIFTS starts early at 06:00, late at 14:00, night at 22:00 (to 06:00)
        shift = ["night"] * 6 + ["early"] * 8 + ["late"] * 8 + ["night"] * 2
        assert out["shift"].tolist() == [shift[h] for h in local.dt.hour]
    assert out["day"].astype(str).tolist() == day.dt.strftime("%Y-%m-%d").tolist()
    assert out["weekday"].astype(str).tolist() == day.dt.day_name().tolist()
    days = sorted(set(day.dt.strftime("%Y-%m-%d")))
    assert list(out["day"].cat.categories) == days
    assert list(out["hour"].cat.categories) == sorted(set(times.dt.hour))


def test_missing_times_stay_missing() -> None:
    times = pd.Series(pd.to_datetime(["2026-09-08 02:00", None, "2026-09-09 07:00"]))
    out = derive_time_factors(times, SHIFTS)
    assert [bool(v.isna().iloc[1]) for v in out.values()] == [True] * 4
    assert out["day"].astype(str).tolist()[::2] == ["2026-09-07", "2026-09-09"]

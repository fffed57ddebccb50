"""Factors derived from timestamps: weekday, hour, shift and production day."""

from __future__ import annotations

import re
from collections.abc import Mapping

import numpy as np
import pandas as pd

from qcexplore.errors import QCDataError

WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
DERIVED_FACTORS = ("weekday", "hour", "shift", "day")
_CLOCK = re.compile(r"^\s*(\d{1,2}):(\d{2})\s*$")


def _minutes(clock: object, name: str) -> int:
    match = _CLOCK.match(str(clock))
    if not match or int(match.group(1)) > 23 or int(match.group(2)) > 59:
        raise QCDataError(
            f"Shift {name!r} starts at {clock!r}, which is not a clock time; "
            'write it as "HH:MM", for example "06:00".'
        )
    return int(match.group(1)) * 60 + int(match.group(2))


def shift_starts(shifts: Mapping[str, str]) -> list[tuple[int, str]]:
    """Shift start times in minutes after midnight, sorted, checked for repeats.

    Examples
    --------
    >>> shift_starts({"late": "14:00", "early": "06:00"})
    [(360, 'early'), (840, 'late')]
    """
    if not isinstance(shifts, Mapping) or not shifts:
        raise QCDataError(
            'shifts must map shift names to start clocks, e.g. {"early": "06:00", "late": "14:00"}.'
        )
    starts = sorted((_minutes(clock, str(name)), str(name)) for name, clock in shifts.items())
    clocks = [m for m, _ in starts]
    if len(set(clocks)) != len(clocks):
        raise QCDataError("Two shifts start at the same clock time; give each its own start.")
    return starts


def assign_shifts(times: pd.Series, shifts: Mapping[str, str]) -> tuple[pd.Series, pd.Series]:
    """Shift name and production day of each timestamp.

    Shifts start at local wall-clock times and run to the next start; a shift
    that runs past midnight belongs to the day it started. Clock times are read
    in each timestamp's own time zone, so the assignment stays right across a
    daylight-saving change (a night shift is an hour shorter or longer that night).

    Examples
    --------
    >>> t = pd.Series(pd.to_datetime(["2026-03-02 23:00", "2026-03-03 05:59"]))
    >>> names, days = assign_shifts(t, {"early": "06:00", "late": "14:00", "night": "22:00"})
    >>> names.tolist(), days.astype(str).tolist()
    (['night', 'night'], ['2026-03-02', '2026-03-02'])
    """
    starts = shift_starts(shifts)
    start_minutes = np.array([m for m, _ in starts])
    names = [n for _, n in starts]
    local = times.dt
    minute_of_day = (local.hour * 60 + local.minute).to_numpy()
    slot = np.searchsorted(start_minutes, minute_of_day, side="right") - 1
    before_first = slot < 0
    slot = np.where(before_first, len(names) - 1, slot)
    shift = pd.Categorical.from_codes(slot, categories=names)
    calendar_day = local.normalize()
    if getattr(local, "tz", None) is not None:
        calendar_day = calendar_day.dt.tz_localize(None)
    day = calendar_day - pd.to_timedelta(before_first.astype(int), unit="D")
    return pd.Series(shift, index=times.index), day.dt.date


def derive_time_factors(
    times: pd.Series, shifts: Mapping[str, str] | None = None
) -> dict[str, pd.Series]:
    """Weekday, hour (and shift and production day when ``shifts`` is given) as categoricals.

    With shifts, the weekday is that of the production day, so the Monday night
    shift's early-morning samples count as Monday.

    Examples
    --------
    >>> t = pd.Series(pd.to_datetime(["2026-09-08 02:00", "2026-09-08 07:00"]))  # a Tuesday
    >>> out = derive_time_factors(t, {"early": "06:00", "late": "14:00", "night": "22:00"})
    >>> out["shift"].tolist(), out["weekday"].tolist()
    (['night', 'early'], ['Monday', 'Tuesday'])
    """
    if not pd.api.types.is_datetime64_any_dtype(times.dtype):
        return {}
    hours = pd.Categorical(times.dt.hour, categories=range(24)).remove_unused_categories()
    derived = {"hour": pd.Series(hours, index=times.index)}
    if shifts is not None:
        shift, day = assign_shifts(times, shifts)
        derived["shift"] = shift
        day_ts = pd.to_datetime(day)
    else:
        day_ts = times.dt.normalize()
        if getattr(times.dt, "tz", None) is not None:
            day_ts = day_ts.dt.tz_localize(None)
    weekday = pd.Categorical.from_codes(day_ts.dt.day_of_week.to_numpy(), categories=list(WEEKDAYS))
    derived["weekday"] = pd.Series(weekday, index=times.index).cat.remove_unused_categories()
    days = day_ts.dt.strftime("%Y-%m-%d")
    derived["day"] = pd.Series(
        pd.Categorical(days, categories=sorted(days.unique())), index=times.index
    )
    return derived

"""Factors derived from timestamps: weekday, hour, shift and production day."""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import Any

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


def _wall_clock(times: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """The calendar day (``datetime64[D]``) and the minute of the day of each timestamp, read
    on its own wall clock (a time zone's local time), in whole-array operations."""
    local = times.dt.tz_localize(None) if getattr(times.dt, "tz", None) is not None else times
    stamps = local.to_numpy().astype("datetime64[m]")
    days = stamps.astype("datetime64[D]")
    return days, np.where(np.isnat(stamps), -1, (stamps - days).astype(np.int64))


def _shift_slots(
    days: np.ndarray, minutes: np.ndarray, shifts: Mapping[str, str]
) -> tuple[pd.Categorical[str], np.ndarray]:
    """Shift of each minute of the day, and the production day (the day its shift began)."""
    starts = shift_starts(shifts)
    slot = np.searchsorted(np.array([m for m, _ in starts]), minutes, side="right") - 1
    before_first = slot < 0
    slot = np.where(minutes < 0, -1, np.where(before_first, len(starts) - 1, slot))
    shift = pd.Categorical.from_codes(slot, categories=pd.Index([name for _, name in starts]))
    return shift, days - before_first.astype("timedelta64[D]")


def _present(codes: np.ndarray, labels: Sequence[Any], index: pd.Index) -> pd.Series:
    """A categorical of ``labels[codes]`` (-1: missing) with only the labels in use, in their
    order."""
    used = np.bincount(codes + 1, minlength=len(labels) + 1)[1:] > 0
    # The new code of each old one; the last entry, -1, is what code -1 (missing) reads.
    renumber = np.r_[np.cumsum(used) - 1, -1].astype(np.int8)
    kept = [label for label, keep in zip(labels, used, strict=True) if keep]
    return pd.Series(pd.Categorical.from_codes(renumber[codes], pd.Index(kept)), index=index)


def derive_time_factors(
    times: pd.Series, shifts: Mapping[str, str] | None = None
) -> dict[str, pd.Series]:
    """Weekday, hour (and shift and production day when ``shifts`` is given) as categoricals.

    Shifts start at local wall-clock times and run to the next start; a shift that runs
    past midnight belongs to the day it started. Clock times are read in each timestamp's
    own time zone, so the assignment stays right across a daylight-saving change (a night
    shift is an hour shorter or longer that night). With shifts, the weekday is that of
    the production day, so the Monday night shift's early-morning samples count as Monday.
    Each distinct day is named and given its weekday once, whatever the number of rows on
    it.

    Examples
    --------
    >>> t = pd.Series(pd.to_datetime(["2026-09-08 02:00", "2026-09-08 07:00"]))  # a Tuesday
    >>> out = derive_time_factors(t, {"early": "06:00", "late": "14:00", "night": "22:00"})
    >>> out["shift"].tolist(), out["weekday"].tolist()
    (['night', 'early'], ['Monday', 'Tuesday'])
    """
    if not pd.api.types.is_datetime64_any_dtype(times.dtype):
        return {}
    days, minutes = _wall_clock(times)
    derived = {"hour": _present(minutes // 60, list(range(24)), times.index)}
    if shifts is not None:
        shift, days = _shift_slots(days, minutes, shifts)
        derived["shift"] = pd.Series(shift, index=times.index)
    codes, distinct = pd.factorize(days, sort=True)
    # 1970-01-01, day 0 of datetime64[D], was a Thursday (weekday 3 counting Monday as 0).
    weekday_of = (distinct.astype(np.int64) + 3) % 7
    weekdays = np.where(codes >= 0, weekday_of[codes], -1)
    derived["weekday"] = _present(weekdays, list(WEEKDAYS), times.index)
    names = np.datetime_as_string(distinct, unit="D").tolist()
    derived["day"] = pd.Series(
        pd.Categorical.from_codes(codes, categories=names), index=times.index
    )
    return derived

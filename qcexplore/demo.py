"""The demo filling line: our own scenario, with the ground truth it injected.

A six-nozzle filler puts 500 g of honey into jars. Three quality crews take five
jars an hour, around the clock, in three shifts (early 06-14, late 14-22, night
22-06) for four weeks; the crews rotate through the shifts every week, so crew and
shift can be told apart. Each crew weighs on its own scale, so crew and scale
cannot. Every jar is recorded with the time it was taken, the crew, the shift,
the nozzle, the scale and the net weight in grams.

The effects, each switchable (size 0 turns it off) and sizable:

* ``crew_offset``: the scale of one crew (``offset_crew``) reads high by this
  many grams: a measurement offset, not a change in the jars.
* ``drift``: one nozzle (``drift_nozzle``) fills more and more from day
  ``drift_day`` on, by this many grams per day: a process change.
* ``phi``: lag-1 autocorrelation of the hourly fill level (product temperature
  changes slowly, and warm honey flows more freely).
* ``missed``: the share of jars that were never weighed (missed samples).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from qcexplore.errors import QCDataError

CREWS = ("A", "B", "C")
SHIFTS = {"early": "06:00", "late": "14:00", "night": "22:00"}
NOZZLES = ("1", "2", "3", "4", "5", "6")
START = pd.Timestamp("2026-09-07 06:00")  # a Monday, away from daylight-saving changes
#: The roles of the demo's columns, as ``qx.Study(frame, **ROLES)`` takes them: the hourly
#: round is the subgroup, the crew (with its own scale) describes how jars were weighed, and
#: the label's 500 g is the lower specification limit.
#: The title the app and report give the demo.
TITLE = "Demo: honey filling line"
ROLES: dict[str, Any] = {
    "value": "net_g",
    "subgroup": "round",
    "time": "taken_at",
    "factors": ["crew", "shift", "nozzle"],
    "measured_by": ["crew"],
    "spec": {"lsl": 500.0},
    "units": "g",
}


def filling_line(
    seed: int = 0,
    *,
    days: int = 28,
    jars_per_round: int = 5,
    mean: float = 503.0,
    sd: float = 1.6,
    crew_offset: float = 1.5,
    offset_crew: str = "B",
    drift: float = 0.35,
    drift_nozzle: str = "4",
    drift_day: int = 15,
    phi: float = 0.6,
    level_sd: float = 0.7,
    missed: float = 0.015,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """The demo data set and the ground truth of what was put into it.

    Parameters
    ----------
    seed : random seed; the same seed always gives the same data
    days : length of the record (starts Monday 2026-09-07 06:00, the early shift)
    jars_per_round : jars weighed each hour (each from a different nozzle)
    mean, sd : process mean and jar-to-jar standard deviation in grams
    crew_offset, offset_crew : the high-reading scale's bias (g) and its crew
    drift, drift_nozzle, drift_day : the drifting nozzle's slope (g/day), which
        nozzle, and the 1-based day on which the drift starts
    phi, level_sd : lag-1 autocorrelation and standard deviation of the hourly level
    missed : share of jars never weighed

    Returns
    -------
    frame : columns ``taken_at, round, day, crew, shift, nozzle, scale, net_g``
        (``round`` is the start of the hourly sampling round, the natural subgroup)
    truth : what was injected, where and how large

    Examples
    --------
    >>> frame, truth = filling_line(seed=1)
    >>> sorted(frame.columns)
    ['crew', 'day', 'net_g', 'nozzle', 'round', 'scale', 'shift', 'taken_at']
    >>> truth["crew_offset"]["crew"]
    'B'
    """
    if days < 1 or jars_per_round < 1 or jars_per_round > len(NOZZLES):
        raise QCDataError(
            f"filling_line: days={days!r} must be >= 1 and jars_per_round={jars_per_round!r} "
            "between 1 and 6."
        )
    if not 0 <= missed < 1 or not -1 < phi < 1:
        raise QCDataError(
            f"filling_line: missed={missed!r} must be in [0, 1) and phi={phi!r} in (-1, 1)."
        )
    rng = np.random.default_rng(seed)
    rounds = pd.date_range(START, periods=days * 24, freq="h")
    hours_since_start = np.arange(len(rounds))
    day_index = hours_since_start // 24  # production day: starts at 06:00 with the early shift
    shift_index = (hours_since_start % 24) // 8
    week = day_index // 7
    crew_index = (shift_index + week) % len(CREWS)

    innovation_sd = level_sd * np.sqrt(1 - phi**2)
    shocks = rng.normal(0.0, innovation_sd, len(rounds))
    level = np.empty(len(rounds))
    level[0] = rng.normal(0.0, level_sd)
    for i in range(1, len(rounds)):  # a recursion: each hour depends on the one before
        level[i] = phi * level[i - 1] + shocks[i]

    n_rows = len(rounds) * jars_per_round
    round_of_row = np.repeat(np.arange(len(rounds)), jars_per_round)
    nozzle_index = np.argsort(rng.random((len(rounds), len(NOZZLES))), axis=1)[:, :jars_per_round]
    nozzle_index = nozzle_index.reshape(-1)
    minutes = np.sort(rng.integers(5, 55, (len(rounds), jars_per_round)), axis=1).reshape(-1)
    taken_at = rounds[round_of_row] + pd.to_timedelta(minutes, unit="min")

    days_in = (hours_since_start[round_of_row] / 24.0) - (drift_day - 1)
    drifting = (np.asarray(NOZZLES)[nozzle_index] == drift_nozzle) & (days_in > 0)
    fill = mean + level[round_of_row] + rng.normal(0.0, sd, n_rows)
    fill = fill + np.where(drifting, drift * days_in, 0.0)

    crews = np.asarray(CREWS)[crew_index[round_of_row]]
    reading = fill + np.where(crews == offset_crew, crew_offset, 0.0)
    frame = pd.DataFrame(
        {
            "taken_at": taken_at,
            "round": rounds[round_of_row],
            "day": day_index[round_of_row] + 1,
            "crew": crews,
            "shift": np.asarray(list(SHIFTS))[shift_index[round_of_row]],
            "nozzle": np.asarray(NOZZLES)[nozzle_index],
            "scale": np.char.add("scale-", crews),
            "net_g": np.round(reading, 1),
        }
    )
    dropped = np.sort(rng.choice(n_rows, size=int(round(missed * n_rows)), replace=False))
    frame = frame.drop(index=dropped).reset_index(drop=True)

    truth = {
        "scenario": "six-nozzle honey filler, 500 g jars, hourly rounds, three rotating crews",
        "process": {"mean_g": mean, "sd_g": sd, "label_g": 500.0},
        "crew_offset": {
            "active": crew_offset != 0,
            "crew": offset_crew,
            "scale": f"scale-{offset_crew}",
            "size_g": crew_offset,
            "kind": "measurement_offset",
        },
        "nozzle_drift": {
            "active": drift != 0,
            "nozzle": drift_nozzle,
            "start_day": drift_day,
            "start": START + pd.Timedelta(days=drift_day - 1),
            "slope_g_per_day": drift,
            "kind": "process_shift",
        },
        "autocorrelation": {
            "active": phi != 0,
            "phi": phi,
            "level_sd_g": level_sd,
            "unit": "hourly round",
        },
        "missed": {"active": missed != 0, "count": int(dropped.size), "share": missed},
        "crew_shift_rotation": "crew of shift s in week w is CREWS[(s + w) % 3]",
        "confounded": {"crew": "scale"},
    }
    return frame, truth

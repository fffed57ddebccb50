"""Where to look for the cause of a step: the first subgroup after it and its neighbours."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.errors import QCDataError
from qcexplore.stats.plans.checks import plain_text, value_list, whole_number
from qcexplore.stats.plans.words import plural


@dataclass(frozen=True)
class StepLookup:
    """Where to look for the cause of a step: the first subgroup after it and its neighbours.

    ``position`` (0-based), ``subgroup`` and ``time`` are the first subgroup after the step;
    ``positions``, ``subgroups`` and ``times`` the subgroups around it in time order
    (``times`` empty without times); ``changes`` the recorded factors whose level differs
    between the last subgroup before the step and the first after it, as (factor, level
    before, level after) labels.
    """

    position: int
    subgroup: object
    time: object
    positions: tuple[int, ...]
    subgroups: tuple[object, ...]
    times: tuple[object, ...]
    changes: tuple[tuple[str, str, str], ...]
    sentence: str


def _moment(time: object) -> str:
    if isinstance(time, (pd.Timestamp, np.datetime64)):
        stamp = pd.Timestamp(time)
        if not pd.isna(stamp):
            return f"{stamp:%a %d %b %Y %H:%M}"
    return str(time)


def step_lookup(
    subgroups: Sequence[object],
    position: int,
    *,
    starts: Sequence[object] | None = None,
    around: int = 2,
    levels: Mapping[str, Sequence[object]] | None = None,
    subgroup_word: str = "subgroup",
) -> StepLookup:
    """The subgroups to look at for the cause of a step: the first after it and its neighbours.

    Parameters
    ----------
    subgroups : the subgroup labels in time order (``TimeResult.series["subgroup"]``)
    position : the 0-based position of the first subgroup after the step
        (``TimeResult.shifts["position"]``)
    starts : the start time of each subgroup (``TimeResult.series["start"]``)
    around : the subgroups to show on each side of the first one after the step
    levels : the level of each recorded factor in each subgroup (factors constant inside
        subgroups), to say which changed at the step
    subgroup_word : the word for a subgroup in ``sentence``

    Examples
    --------
    >>> look = step_lookup(["r1", "r2", "r3", "r4", "r5"], 3, around=1,
    ...                    levels={"crew": ["A", "A", "A", "B", "B"]})
    >>> look.subgroup, look.subgroups, look.changes
    ('r4', ('r3', 'r4', 'r5'), (('crew', 'A', 'B'),))
    """
    labels = value_list("subgroups", subgroups)
    if len(labels) < 2:
        raise QCDataError(
            f"subgroups holds {len(labels)} label(s): a step needs subgroups before and after it."
        )
    at = whole_number("position", position, 1)
    if at >= len(labels):
        raise QCDataError(
            f"position={at} is past the last of the {len(labels)} subgroups: give the "
            f"position of the first subgroup after the step, 1 to {len(labels) - 1}."
        )
    times = [] if starts is None else value_list("starts", starts)
    if starts is not None and len(times) != len(labels):
        raise QCDataError(
            f"starts has {len(times)} times for {len(labels)} subgroups: give one per subgroup."
        )
    side = whole_number("around", around, 0)
    if levels is not None and not isinstance(levels, Mapping):
        raise QCDataError(
            f"levels={levels!r:.60} must map each factor's name to its level in each subgroup."
        )
    changes = []
    for factor, column in (levels or {}).items():
        cells = value_list(f"levels[{factor!r}]", column)
        if len(cells) != len(labels):
            raise QCDataError(
                f"levels[{factor!r}] has {len(cells)} levels for {len(labels)} subgroups: "
                "give one per subgroup."
            )
        before, after = str(cells[at - 1]), str(cells[at])
        if before != after:
            changes.append((str(factor), before, after))
    word = plain_text("subgroup_word", subgroup_word)
    window = range(max(0, at - side), min(len(labels), at + side + 1))

    def named(i: int) -> str:
        return f"{labels[i]}" + (f" ({_moment(times[i])})" if times else "")

    sentence = f"Look first at {word} {named(at)}, the first after the step"
    if len(window) > 1:
        sentence += f", and at the {plural(word)} from {named(window[0])} to {named(window[-1])}"
    if changes:
        moved = "; ".join(f"{f} changed from {x} to {y}" for f, x, y in changes)
        sentence += f": {moved} there. Ask what else changed then."
    else:
        recorded = " (no recorded factor changed there)" if levels else ""
        sentence += f": ask what changed then{recorded}."
    return StepLookup(
        position=at,
        subgroup=labels[at],
        time=times[at] if times else None,
        positions=tuple(window),
        subgroups=tuple(labels[i] for i in window),
        times=tuple(times[i] for i in window) if times else (),
        changes=tuple(changes),
        sentence=sentence,
    )

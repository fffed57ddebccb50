"""The values with the measurement offsets taken off: what the chart, the time structure and
the adjusted table of a study read when a crew or a scale reads off.

Checked through its parts: the offsets against statsmodels OLS (tests/test_variation.py), the
step-safe offsets against statsmodels WLS (tests/test_honesty.py).
"""

from __future__ import annotations

from collections.abc import Sequence

import pandas as pd

from qcexplore.stats.variation.offsets import adjusted_values, measurement_offsets
from qcexplore.stats.variation.timeline import step_safe_offsets


def remove_offsets(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    measured_by: Sequence[str],
    factors: Sequence[str] = (),
    step_safe: bool = False,
) -> tuple[pd.DataFrame, tuple[str, ...]]:
    """A copy of ``frame`` with each ``measured_by`` level's offset taken off ``value``, and
    notes on what was not taken off.

    The offsets are those of :func:`measurement_offsets` (the process ``factors`` held
    fixed). With ``step_safe``, they are those of :func:`step_safe_offsets`: an offset that
    could be a change of the process in time stays in the values, so a search for steps
    still finds it, and the notes say which. Without ``measured_by`` the frame itself is
    returned.

    Examples
    --------
    >>> f = pd.DataFrame({"hour": [1, 1, 2, 2], "crew": list("abab"),
    ...                   "w": [10.0, 11.0, 12.0, 13.0]})
    >>> out, notes = remove_offsets(f, value="w", subgroup="hour", measured_by=["crew"])
    >>> out["w"].tolist(), notes
    ([10.5, 10.5, 12.5, 12.5], ())
    """
    if not measured_by:
        return frame, ()
    notes: tuple[str, ...] = ()
    if step_safe:
        offsets, notes = step_safe_offsets(
            frame, value=value, subgroup=subgroup, measured_by=measured_by, factors=factors
        )
    else:
        offsets = measurement_offsets(
            frame, value=value, subgroup=subgroup, measured_by=measured_by, factors=factors
        )
    adjusted = frame.copy()
    adjusted[value] = adjusted_values(frame, value=value, offsets=offsets)
    return adjusted, notes

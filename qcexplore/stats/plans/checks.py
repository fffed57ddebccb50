"""The inputs of the plans, checked: bad ones raise a ``QCDataError`` that says what to give."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from qcexplore.data.coding import real_number
from qcexplore.errors import QCDataError

#: The largest plan offered: a difference that needs more units is too small to settle.
MOST_UNITS = 10**9


def whole_number(name: str, x: object, lowest: int) -> int:
    value = real_number(name, x, lower=lowest, what="a whole number")
    if not value.is_integer() or value > MOST_UNITS:
        raise QCDataError(f"{name}={value:g}: give a whole number from {lowest} to {MOST_UNITS:,}.")
    return int(value)


def plain_text(name: str, x: object) -> str:
    if not isinstance(x, str):
        raise QCDataError(f"{name}={x!r:.60} is not text: give the words to use, as a string.")
    return x


def nonzero_difference(name: str, x: object) -> float:
    value = abs(real_number(name, x))
    if value == 0.0:
        raise QCDataError(
            f"{name}=0: a zero difference needs no study; give the difference to tell apart."
        )
    return value


def power_and_alpha(power: object, alpha: object) -> tuple[float, float]:
    # Below 1e-6 scipy's t quantiles for few degrees of freedom are no longer reliable, and
    # no plan is made at such a level.
    alpha = real_number("alpha", alpha, lower=1e-6, upper=0.5)
    power = real_number("power", power, lower=alpha, upper=1, inclusive=False)
    return power, alpha


def value_list(name: str, x: object) -> list[Any]:
    ordered = (Sequence, np.ndarray, pd.Series, pd.Index, pd.api.extensions.ExtensionArray)
    if isinstance(x, (str, bytes)) or not isinstance(x, ordered) or np.asarray(x).ndim != 1:
        raise QCDataError(
            f"{name}={x!r:.60} is not a list of values: give one value per subgroup, in time "
            "order (a list, an array or a column)."
        )
    return list(x)

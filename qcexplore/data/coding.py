"""The two checks every layer needs: is this argument a real number, and what are a column's codes.

Declared once here so that every analysis refuses a bad number with the same words and codes a
factor the same way (missing cells as -1, levels in the column's own order).
"""

from __future__ import annotations

import math
import numbers
from typing import Any, TypeGuard

import numpy as np
import pandas as pd

from qcexplore.errors import QCDataError


def is_real_number(x: object, *, finite: bool = True) -> TypeGuard[float]:
    """True for an int or float (numpy's too) that is not a bool, finite unless told otherwise.

    Examples
    --------
    >>> is_real_number(2), is_real_number(True), is_real_number("2"), is_real_number(float("nan"))
    (True, False, False, False)
    >>> is_real_number(float("inf"), finite=False), is_real_number(10**400)
    (True, False)
    """
    if isinstance(x, (bool, np.bool_)) or not isinstance(x, numbers.Real):
        return False
    if not finite:
        return True
    try:
        return math.isfinite(float(x))
    except OverflowError:  # an integer beyond any float (10**400) is no usable number
        return False


def real_number(
    name: str,
    x: object,
    *,
    lower: float | None = None,
    upper: float | None = None,
    inclusive: bool = True,
    what: str = "a number",
) -> float:
    """``x`` as a float, or a QCDataError that names the argument and the range it needs.

    Examples
    --------
    >>> real_number("lam", 0.2, lower=0, upper=1, inclusive=False)
    0.2
    >>> real_number("lam", [0.2])  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: lam=[0.2] is not a number: give a single finite number.
    """
    if not is_real_number(x):
        raise QCDataError(
            f"{name}={shorten(x)} is not {what}: give a single finite number"
            f"{_range(lower, upper, inclusive)}."
        )
    value = float(x)
    low_bad = lower is not None and (value < lower or (not inclusive and value == lower))
    high_bad = upper is not None and (value > upper or (not inclusive and value == upper))
    if low_bad or high_bad:
        raise QCDataError(
            f"{name}={value:g} is out of range: give a number{_range(lower, upper, inclusive)}."
        )
    return value


def _range(lower: float | None, upper: float | None, inclusive: bool) -> str:
    low, high = (">=", "<=") if inclusive else (">", "<")
    if lower is not None and upper is not None:
        return f" {low} {lower:g} and {high} {upper:g}"
    if lower is not None:
        return f" {low} {lower:g}"
    if upper is not None:
        return f" {high} {upper:g}"
    return ""


def shorten(x: Any, limit: int = 60) -> str:
    text = repr(x)
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text)} characters)"


def category_codes(column: pd.Series) -> tuple[np.ndarray, pd.Index]:
    """Integer codes (``np.intp``, -1 for a missing cell) and the levels of a column.

    A categorical column keeps its own level order (the Study orders subgroups in time and
    factors as given); any other column is coded in order of first appearance.

    Examples
    --------
    >>> codes, levels = category_codes(pd.Series(["b", "a", None, "b"]))
    >>> codes.tolist(), list(levels)
    ([0, 1, -1, 0], ['b', 'a'])
    """
    if isinstance(column.dtype, pd.CategoricalDtype):
        return column.cat.codes.to_numpy().astype(np.intp), column.cat.categories
    codes, levels = pd.factorize(column, use_na_sentinel=True)
    return codes.astype(np.intp), pd.Index(levels)

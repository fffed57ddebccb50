"""Result columns as values the page can carry: level texts and codes, times, rule texts.

Bokeh sends number columns to the page as compact binary arrays and text columns
element by element, so per-point texts travel as integer codes into small lookup
tables, and times as milliseconds since the epoch (bokeh's datetime unit). The
numbers written on a chart (centre and limit values) are formatted here too.

Nothing here computes a statistic: these functions only re-express result columns.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from qcexplore.stats.rules import RULE_TEXT


def levels_of(column: pd.Series) -> list[Any]:
    """Display order of a stratum column: its categories, else sorted distinct values.

    Missing values are not a level. Using all categories (also unused ones) keeps a
    level's colour the same when a panel shows only part of the data.

    Examples
    --------
    >>> levels_of(pd.Series(["b", "a", "b", None]))
    ['a', 'b']
    """
    if isinstance(column.dtype, pd.CategoricalDtype):
        return list(column.cat.categories)
    present = pd.unique(column.dropna())
    try:
        return sorted(present)
    except TypeError:  # mixed types: keep the order of first appearance
        return list(present)


def labels(column: pd.Series) -> np.ndarray:
    """Plain text labels for hover tooltips and panel filters (missing -> empty text).

    Examples
    --------
    >>> labels(pd.Series(["a", None, "a"])).tolist()
    ['a', '', 'a']
    """
    codes, uniques = pd.factorize(column)
    texts = np.array([*(str(u) for u in uniques), ""], dtype=object)
    return texts[codes]  # code -1 (missing) picks the trailing empty text


def is_datetime(column: pd.Series) -> bool:
    """Whether a column (or a Categorical's categories) holds dates and times.

    Examples
    --------
    >>> is_datetime(pd.Series(pd.to_datetime(["2026-01-05"]))), is_datetime(pd.Series([1]))
    (True, False)
    """
    dtype = column.dtype
    if isinstance(dtype, pd.CategoricalDtype):
        dtype = dtype.categories.dtype
    return pd.api.types.is_datetime64_any_dtype(dtype)


def hover_values(column: pd.Series) -> np.ndarray:
    """Values for hover text only: numbers stay numbers and dates become milliseconds
    (:func:`time_ms`; both are sent to the page as compact binary arrays), anything else
    becomes :func:`labels`.

    Examples
    --------
    >>> hover_values(pd.Series(pd.Categorical([3, 1]))).tolist()
    [3, 1]
    >>> hover_values(pd.Series(pd.to_datetime(["1970-01-01 00:00:01"]))).tolist()
    [1000.0]
    >>> hover_values(pd.Series(["a", None])).tolist()
    ['a', '']
    """
    if is_datetime(column):
        if isinstance(column.dtype, pd.CategoricalDtype):
            # Convert each category once, then pick by code (missing -> NaN).
            ms = np.append(time_ms(pd.Series(column.cat.categories)), np.nan)
            return ms[column.cat.codes.to_numpy()]
        return time_ms(column)
    values = column.cat.categories if isinstance(column.dtype, pd.CategoricalDtype) else column
    if pd.api.types.is_numeric_dtype(values.dtype) and not pd.api.types.is_bool_dtype(values.dtype):
        if isinstance(column.dtype, pd.CategoricalDtype):
            codes = column.cat.codes.to_numpy()
            if (codes >= 0).all():
                return values.to_numpy()[codes]
        elif column.notna().all():
            return column.to_numpy()
    return labels(column)


def codes_for(column: pd.Series, levels: Sequence[str]) -> np.ndarray:
    """Each row's position in ``levels`` (the texts of :func:`levels_of`), -1 where none.

    Sent to the page instead of the level texts: a number column travels as one binary
    array, a text column element by element.

    Examples
    --------
    >>> codes_for(pd.Series(["b", None, "a"]), ["a", "b"]).tolist()
    [1, -1, 0]
    """
    if isinstance(column.dtype, pd.CategoricalDtype) and [
        str(c) for c in column.cat.categories
    ] == list(levels):
        return column.cat.codes.to_numpy().astype(np.int32)
    found = pd.Index(list(levels), dtype=object).get_indexer(labels(column))
    return found.astype(np.int32)


def code_table(values: Sequence[Any]) -> tuple[np.ndarray, list[Any]]:
    """Integer codes of hashable values (e.g. tuples of rule ids) and the distinct values.

    Examples
    --------
    >>> code_table([("N1",), (), ("N1",)])
    (array([0, 1, 0], dtype=int32), [('N1',), ()])
    """
    codes, uniques = pd.factorize(pd.Series(list(values), dtype=object))
    return codes.astype(np.int32), list(uniques)


def rule_texts(uniques: Sequence[Any]) -> np.ndarray:
    """Text of each distinct set of rules (the uniques of :func:`code_table`): the ids
    with their plain-words description, plus a trailing empty text that code -1 picks.

    Examples
    --------
    >>> rule_texts([("N1",), ()]).tolist()
    ['N1: one point beyond the control limits', '', '']
    """
    texts = [
        "; ".join(f"{r}: {RULE_TEXT.get(r, r)}" for r in u) if isinstance(u, (tuple, list)) else ""
        for u in uniques
    ]
    return np.array([*texts, ""], dtype=object)


def time_ms(column: pd.Series) -> np.ndarray:
    """Times as float milliseconds since the epoch (bokeh's datetime axis unit).

    Time-zone aware times keep their wall-clock reading (the hour the crew saw);
    missing times become NaN.

    Examples
    --------
    >>> time_ms(pd.Series(pd.to_datetime(["1970-01-01 00:00:01"]))).tolist()
    [1000.0]
    """
    times = pd.to_datetime(column)
    if getattr(times.dt, "tz", None) is not None:
        times = times.dt.tz_localize(None)
    ns = times.astype("datetime64[ns]").to_numpy().astype("int64").astype(float)
    ns[times.isna().to_numpy()] = np.nan
    return ns / 1e6


def value_texts(values: np.ndarray, span: float) -> np.ndarray:
    """Numbers written on a chart, with thousands separators and as many decimals as
    show three significant digits of ``span`` (the distance between the lines they
    label); missing values give an empty text.

    Examples
    --------
    >>> value_texts(np.array([494.06, 500.0, 505.94]), 11.88).tolist()
    ['494.1', '500.0', '505.9']
    >>> value_texts(np.array([-0.0, 1234.5, np.nan]), 0.0).tolist()
    ['0', '1,234', '']
    """
    v = np.asarray(values, dtype=float) + 0.0  # + 0.0 turns -0.0 into 0.0
    if math.isfinite(span) and span > 0:
        decimals = min(6, max(0, 2 - math.floor(math.log10(span))))
        style = f",.{decimals}f"
    else:
        style = ",.4g"
    return np.array([format(x, style) if math.isfinite(x) else "" for x in v], dtype=object)

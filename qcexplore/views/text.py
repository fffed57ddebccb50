"""Plain HTML pieces of the views, shown by the explorer and the report: tables, notes, findings.

Every piece of text that comes from the data or the user is escaped here.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable
from typing import Any

import pandas as pd

#: Code values of result tables in the words people read (others: underscores as spaces).
WORDS = {
    "between_subgroups": "between subgroups",
    "within_subgroup": "within subgroups",
    "brown_forsythe": "Brown-Forsythe",
    "anderson_darling": "Anderson-Darling",
    "kruskal_wallis": "Kruskal-Wallis",
    "tukey": "Tukey",
    "anom": "analysis of means",
    "ljung_box": "Ljung-Box",
    **{name: name.capitalize() for name in ("cp", "cpk", "cpl", "cpu", "pp", "ppk", "ppl", "ppu")},
}
#: Column headings in words (others: underscores as spaces).
HEADINGS = {"center": "centre", "lcl": "lower limit", "ucl": "upper limit", "with_": "with"}
_P_COLUMNS = ("p", "p_adjusted")


def p_words(p: float) -> str:
    """A p-value for people: "< 0.001" below a thousandth, else two significant digits.

    Examples
    --------
    >>> p_words(3.965e-52), p_words(0.6612), p_words(0.0123)
    ('< 0.001', '0.66', '0.012')
    """
    if p != p:  # NaN: no test
        return ""
    return "< 0.001" if p < 0.001 else f"{p:.2g}"


def whole(x: float) -> str:
    """A count or ppm for people: a whole number with thousands separators.

    Examples
    --------
    >>> whole(25981.4)
    '25,981'
    """
    return "" if x != x else f"{x:,.0f}"


def _cell_words(cell: Any) -> Any:
    if isinstance(cell, (tuple, list)):  # rule ids read as "N1, N5", not a Python tuple
        return ", ".join(map(str, cell))
    if isinstance(cell, str) and cell.isidentifier() and cell.islower():
        return WORDS.get(cell, cell.replace("_", " "))
    return cell


def _number(v: float) -> str:
    if v != v:
        return ""
    if math.isinf(v):
        return "∞" if v > 0 else "-∞"
    if v == int(v) and abs(v) < 1e15:
        return f"{int(v):,}"
    return f"{v:.4g}"


def table_html(
    frame: pd.DataFrame,
    caption: str,
    *,
    rows: int | None = None,
    whole_numbers: tuple[str, ...] = (),
) -> str:
    """A small HTML table of a result frame for people, with a heading, every cell escaped.

    Column names are shown as words ("error_term" as "error term", "center" as "centre"),
    left-aligned over their cells; code values as words ("between_subgroups" as "between
    subgroups"); p-values as "< 0.001" or two digits; the ``whole_numbers`` columns (ppm,
    counts) with thousands separators; a column with no value in any row (the stratum of a
    chart without a split) is left out.

    Examples
    --------
    >>> "&lt;b&gt;" in table_html(pd.DataFrame({"a": ["<b>"]}), "x")
    True
    >>> "<th>error term</th>" in table_html(pd.DataFrame({"error_term": ["residual"]}), "x")
    True
    >>> "stratum" in table_html(pd.DataFrame({"stratum": [None], "ucl": [3.0]}), "x")
    False
    >>> "&lt; 0.001" in table_html(pd.DataFrame({"p": [1e-52]}), "x")
    True
    """
    shown = frame if rows is None else frame.head(rows)
    if len(shown):
        shown = shown.loc[:, shown.notna().any().to_numpy()]
    shown = shown.copy()
    for column in shown.columns:
        if column in _P_COLUMNS:
            shown[column] = shown[column].astype(float).map(p_words)
        elif column in whole_numbers:
            shown[column] = shown[column].astype(float).map(whole)
        elif shown[column].dtype == object or isinstance(shown[column].dtype, pd.StringDtype):
            shown[column] = shown[column].map(_cell_words)
    shown = shown.rename(
        columns=lambda c: HEADINGS.get(str(c), str(c).strip("_").replace("_", " "))
    )
    body = shown.to_html(
        index=False, escape=True, border=0, na_rep="", justify="left", float_format=_number
    )
    more = "" if rows is None or len(frame) <= rows else f"<p>... {len(frame) - rows} more</p>"
    return f"<h4>{html.escape(caption)}</h4>{body}{more}"


def notes_html(notes: Iterable[Any]) -> str:
    """Result notes as a short list (escaped).

    Examples
    --------
    >>> notes_html(["a < b"])
    '<ul><li>a &lt; b</li></ul>'
    """
    items = "".join(f"<li>{html.escape(str(n))}</li>" for n in notes)
    return f"<ul>{items}</ul>" if items else ""


def log_html(exclusions: Iterable[Any], notes: Iterable[Any]) -> str:
    """Exclusions (subgroup, reason) and notes (text, at) as two tables (escaped).

    Examples
    --------
    >>> log_html([], [])
    '<p>Nothing excluded, no notes.</p>'
    """
    left_out = [vars(e) for e in exclusions]
    written = [vars(n) for n in notes]
    parts = []
    if left_out:
        parts.append(table_html(pd.DataFrame(left_out), "Left out of the limits"))
    if written:
        parts.append(table_html(pd.DataFrame(written), "Notes"))
    return "".join(parts) or "<p>Nothing excluded, no notes.</p>"

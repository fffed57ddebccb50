"""Plain HTML pieces of the views, shown by the explorer and the report: tables, notes, findings.

Every piece of text that comes from the data or the user is escaped here.
"""

from __future__ import annotations

import html
from collections.abc import Iterable
from typing import Any

import pandas as pd


def plural(count: int, word: str, words: str | None = None) -> str:
    """``count`` and the word in the right number.

    Examples
    --------
    >>> plural(1, "finding"), plural(3, "finding"), plural(2, "index", "indices")
    ('1 finding', '3 findings', '2 indices')
    """
    return f"{count} {word if count == 1 else (words or word + 's')}"


def _joined(cell: Any) -> Any:
    return ", ".join(map(str, cell)) if isinstance(cell, (tuple, list)) else cell


def table_html(frame: pd.DataFrame, caption: str, *, rows: int | None = None) -> str:
    """A small HTML table of a result frame with a heading, every cell escaped.

    Column names are shown as words ("error_term" as "error term", "with_" as "with"),
    left-aligned over their cells; a column with no value in any row (the stratum of a
    chart without a split) is left out.

    Examples
    --------
    >>> "&lt;b&gt;" in table_html(pd.DataFrame({"a": ["<b>"]}), "x")
    True
    >>> "<th>error term</th>" in table_html(pd.DataFrame({"error_term": ["residual"]}), "x")
    True
    >>> "stratum" in table_html(pd.DataFrame({"stratum": [None], "ucl": [3.0]}), "x")
    False
    """
    shown = frame if rows is None else frame.head(rows)
    if len(shown):
        shown = shown.loc[:, shown.notna().any().to_numpy()]
    # Rule ids and other sequences read as "N1, N5", not as a Python tuple.
    shown = shown.apply(lambda column: column.map(_joined) if column.dtype == object else column)
    shown = shown.rename(columns=lambda c: str(c).strip("_").replace("_", " "))
    body = shown.to_html(
        index=False,
        escape=True,
        border=0,
        na_rep="",
        justify="left",
        float_format=lambda v: f"{v:.4g}",
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


def findings_html(found: Iterable[Any], caution: str) -> str:
    """The findings as a numbered list of titles and details, then the caution (escaped).

    Examples
    --------
    >>> "take care" in findings_html([], "take care")
    True
    """
    items = "".join(
        f"<li><b>{html.escape(str(f.title))}</b><br>{html.escape(str(f.detail))}</li>"
        for f in found
    )
    body = f"<ol class='qcx-findings'>{items}</ol>" if items else "<p>No findings.</p>"
    return body + f"<p class='qcx-caution'><i>{html.escape(caution)}</i></p>"


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

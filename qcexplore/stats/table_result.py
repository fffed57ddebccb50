"""How every table result of qcexplore behaves: its own copies of its tables, ``to_frame()``,
and a compact summary as text and as HTML in a notebook.

Results are deeply immutable. The dataclasses are frozen, their other members are
numbers, strings, tuples or frozen results, and a table result keeps its own copy of
every table it is given and hands out a new copy on each access: a caller who edits
``chart.limits`` edits that copy only, never the cached result nor an answer computed
from it later (a capability, a finding). Under pandas' copy-on-write these copies are
lazy: no data are copied until somebody writes, so reading a large ``points`` table
costs nothing, and the arrays behind them (``to_numpy()``) are read-only views.
"""

from __future__ import annotations

import html
from dataclasses import fields
from typing import Any

import numpy as np
import pandas as pd

_HTML_ROWS = 12


def _detached(value: Any) -> Any:
    """A copy of a table (lazy under copy-on-write) or of a dict of tables; else the value."""
    if isinstance(value, pd.DataFrame):
        return value.copy(deep=False)
    if isinstance(value, dict):
        return {key: _detached(item) for key, item in value.items()}
    return value


def _frame_html(name: str, frame: pd.DataFrame) -> str:
    shown = frame.head(_HTML_ROWS)
    more = len(frame) - len(shown)
    table = shown.to_html(index=False, float_format=lambda v: f"{v:.6g}", border=0)
    tail = f"<p><small>... {more} more rows</small></p>" if more > 0 else ""
    return f"<h5>{html.escape(name)}</h5>{table}{tail}"


class TableResult:
    """Shared behaviour of table results: own copies of their tables, ``to_frame``, summaries."""

    #: Names of the DataFrame fields stacked by ``to_frame`` (first is the main one).
    _tables: tuple[str, ...] = ()
    #: One-line heading used by the notebook and text summaries.
    _heading: str = ""

    def __post_init__(self) -> None:
        # The caller that built the result keeps its frames; the result keeps its own.
        for f in fields(self):  # type: ignore[arg-type]
            object.__setattr__(self, f.name, _detached(object.__getattribute__(self, f.name)))

    def __getattribute__(self, name: str) -> Any:
        value = object.__getattribute__(self, name)
        return value if name.startswith("_") else _detached(value)

    def _scalars(self) -> dict[str, Any]:
        out = {}
        for f in fields(self):  # type: ignore[arg-type]
            value = getattr(self, f.name)
            if isinstance(value, (str, int, float, bool, np.floating, np.integer)):
                out[f.name] = value
        return out

    def to_frame(self) -> pd.DataFrame:
        """All tables of the result stacked into one tidy frame with a ``table`` column."""
        parts = []
        for name in self._tables:
            frame = getattr(self, name)
            if isinstance(frame, dict):
                for key, sub in frame.items():
                    parts.append(sub.assign(table=f"{name}:{key}"))
            elif isinstance(frame, pd.DataFrame):
                parts.append(frame.assign(table=name))
        if not parts:
            return pd.DataFrame({"table": []})
        stacked = pd.concat(parts, ignore_index=True, sort=False)
        return stacked[["table", *[c for c in stacked.columns if c != "table"]]]

    def _repr_html_(self) -> str:
        scalars = "".join(
            f"<tr><th style='text-align:left'>{html.escape(k)}</th>"
            f"<td style='text-align:left'>{html.escape(str(v))}</td></tr>"
            for k, v in self._scalars().items()
        )
        body = [f"<h4>{html.escape(self._heading or type(self).__name__)}</h4>"]
        if scalars:
            body.append(f"<table>{scalars}</table>")
        for name in self._tables:
            frame = getattr(self, name)
            if isinstance(frame, dict):
                for key, sub in frame.items():
                    body.append(_frame_html(f"{name}: {key}", sub))
            elif isinstance(frame, pd.DataFrame):
                body.append(_frame_html(name, frame))
        return "<div class='qcexplore-result'>" + "".join(body) + "</div>"

    def __repr__(self) -> str:
        lines = [self._heading or type(self).__name__]
        lines += [f"  {k}: {v}" for k, v in self._scalars().items()]
        for name in self._tables:
            frame = getattr(self, name)
            if isinstance(frame, pd.DataFrame):
                lines.append(f"  {name}: {len(frame)} rows x {frame.shape[1]} columns")
            elif isinstance(frame, dict):
                lines.append(f"  {name}: {', '.join(map(str, frame)) or 'none'}")
        return "\n".join(lines)

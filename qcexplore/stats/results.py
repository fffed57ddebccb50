"""Frozen result objects: the shapes that ``stats`` hands to findings, draw, app and report.

Every result holds tidy pandas DataFrames with lower_snake_case columns, prints a
compact summary, renders as a small HTML table in a notebook and flattens to one
tidy table with ``to_frame()``. The frames are never modified after construction;
treat them as read-only.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np
import pandas as pd

_HTML_ROWS = 12


def _frame_html(name: str, frame: pd.DataFrame) -> str:
    shown = frame.head(_HTML_ROWS)
    more = len(frame) - len(shown)
    table = shown.to_html(index=False, float_format=lambda v: f"{v:.6g}", border=0)
    tail = f"<p><small>... {more} more rows</small></p>" if more > 0 else ""
    return f"<h5>{html.escape(name)}</h5>{table}{tail}"


class _Result:
    """Shared behaviour of result dataclasses: ``to_frame``, ``_repr_html_``, ``__repr__``."""

    #: Names of the DataFrame fields stacked by ``to_frame`` (first is the main one).
    _tables: tuple[str, ...] = ()
    #: One-line heading used by the notebook and text summaries.
    _heading: str = ""

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


@dataclass(frozen=True, eq=False, repr=False)
class ChartResult(_Result):
    """A control chart: plotted points with their limits and the run-rule signals.

    ``points``: ``subgroup, stratum, stat, center, lcl, ucl, n, signal, rules`` plus
    ``se`` (the point's standard error: the zone width), ``excluded`` (left out of the
    limit estimate), ``start`` (the subgroup's first time, when there is a time column);
    attribute charts add ``count`` (``n`` is then the number inspected); CUSUM adds
    ``stat_lower`` (-C-) and ``change_start`` (where a signalling run began).
    ``limits``: ``stratum, center, lcl, ucl, sigma, method`` (one row per stratum
    with ``limits="per_stratum"``, else one row with ``stratum`` missing).
    """

    kind: str
    points: pd.DataFrame
    limits: pd.DataFrame
    secondary: ChartResult | None = None
    title: str = ""
    statistic: str = "mean"
    sigma_level: float = 3.0
    sigma_method: str = "within"
    false_alarm_rate: float = float("nan")
    by: str | None = None
    limits_mode: str = "pooled"
    rules: tuple[str, ...] = ()
    excluded: tuple[Any, ...] = ()
    notes: tuple[str, ...] = ()
    _tables = ("points", "limits")

    @property
    def _heading(self) -> str:  # type: ignore[override]
        return self.title or f"{self.kind} chart"


@dataclass(frozen=True, eq=False, repr=False)
class VariationResult(_Result):
    """The variance taken apart into its sources, with the error term each test used."""

    structure: pd.DataFrame
    anova: pd.DataFrame
    components: pd.DataFrame
    comparisons: dict[str, pd.DataFrame] = field(default_factory=dict)
    spread: pd.DataFrame = field(default_factory=pd.DataFrame)
    offsets: pd.DataFrame = field(default_factory=pd.DataFrame)
    multivari: pd.DataFrame = field(default_factory=pd.DataFrame)
    method: str = ""
    notes: tuple[str, ...] = ()
    _tables = ("structure", "anova", "components", "comparisons", "spread", "offsets")
    _heading = "Sources of variation"


@dataclass(frozen=True, eq=False, repr=False)
class TimeResult(_Result):
    """Time structure of the plotted series: autocorrelation and step changes."""

    acf: pd.DataFrame
    ljung_box: pd.DataFrame
    ar1: dict[str, float]
    shifts: pd.DataFrame
    series: pd.DataFrame = field(default_factory=pd.DataFrame)
    effective_n: float = float("nan")
    residual_chart: ChartResult | None = None
    moving_center_chart: ChartResult | None = None
    notes: tuple[str, ...] = ()
    _tables = ("acf", "ljung_box", "shifts")
    _heading = "Time structure"


@dataclass(frozen=True, eq=False, repr=False)
class CapabilityResult(_Result):
    """Capability indices against a specification, with intervals and ppm."""

    indices: pd.DataFrame
    ppm: pd.DataFrame
    normality: pd.DataFrame
    lsl: float | None = None
    usl: float | None = None
    target: float | None = None
    mean: float = float("nan")
    sigma_within: float = float("nan")
    sigma_overall: float = float("nan")
    n: int = 0
    histogram: pd.DataFrame = field(default_factory=pd.DataFrame)
    curve: pd.DataFrame = field(default_factory=pd.DataFrame)
    warnings: tuple[str, ...] = ()
    _tables = ("indices", "ppm", "normality")
    _heading = "Capability"

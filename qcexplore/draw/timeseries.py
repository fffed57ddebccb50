"""Figures of the time structure: autocorrelation by lag, and detected step changes.

Names (layout / figures / sources and their columns):

- :func:`acf_figure`: ``"acf_layout"``; figures ``"acf"`` (autocorrelation) above
  ``"pacf"`` (partial autocorrelation) on a shared lag axis; ``"acf_bars"``
  (``lag, acf, pacf, lower, upper``; lags from 1, lag 0 is always 1 and is left out).
  The grey band is the result's ``lower``..``upper`` at each lag, drawn on both panels.
- :func:`shifts_figure`: ``"shifts_layout"``, figure ``"shifts"``; ``"shifts_series"``
  (``x, value, subgroup, n`` + ``time``), ``"shifts_line"`` (``x0, y0, x1, y1``, empty
  above :data:`~qcexplore.draw.theme.LINE_UP_TO` means) and ``"shifts_steps"``
  (``x0, y0, x1, y1, subgroup, before, after, p``: the level before and after each
  change as horizontal pieces joined by a riser at the change). x is the subgroup's
  position 1..k in the series, or its start time when every subgroup has one.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from bokeh.layouts import column
from bokeh.models import HoverTool, LayoutDOM

from qcexplore.draw import theme
from qcexplore.errors import QCDataError
from qcexplore.stats.results import TimeResult


def acf_spec(result: TimeResult) -> dict[str, Any]:
    """Build description of the ACF layout (nothing in it depends on the data).

    Examples
    --------
    >>> acf_spec(None)
    {'figure': 'acf', 'options': {}}
    """
    return {"figure": "acf", "options": {}}


def acf_sources(result: TimeResult, spec: dict[str, Any]) -> dict[str, dict]:
    """Column data of ``"acf_bars"`` (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import TimeResult
    >>> acf = pd.DataFrame({"lag": [0, 1], "acf": [1.0, 0.4], "pacf": [1.0, 0.4],
    ...                     "lower": [-0.2, -0.2], "upper": [0.2, 0.2]})
    >>> r = TimeResult(acf, pd.DataFrame(), {}, pd.DataFrame())
    >>> acf_sources(r, acf_spec(r))["acf_bars"]["lag"].tolist()
    [1.0]
    """
    table = result.acf[result.acf["lag"] >= 1]
    return {
        "acf_bars": {
            c: table[c].to_numpy(dtype=float) for c in ("lag", "acf", "pacf", "lower", "upper")
        }
    }


def acf_texts(result: TimeResult, spec: dict[str, Any]) -> dict[str, str]:
    """Titles of the two ACF panels.

    Examples
    --------
    >>> sorted(acf_texts(None, {}))
    ['acf', 'pacf']
    """
    band = "grey band: the range expected without autocorrelation"
    return {
        "acf": f"Autocorrelation of the subgroup means by lag ({band})",
        "pacf": f"Partial autocorrelation of the subgroup means by lag ({band})",
    }


def acf_figure(result: TimeResult) -> LayoutDOM:
    """Autocorrelation and partial autocorrelation bars by lag, with their band.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import TimeResult
    >>> acf = pd.DataFrame({"lag": [1, 2], "acf": [0.4, 0.1], "pacf": [0.4, -0.1],
    ...                     "lower": [-0.2, -0.2], "upper": [0.2, 0.2]})
    >>> acf_figure(TimeResult(acf, pd.DataFrame(), {}, pd.DataFrame())).name
    'acf_layout'
    """
    spec = acf_spec(result)
    bars = theme.source("acf_bars", acf_sources(result, spec)["acf_bars"])
    texts = acf_texts(result, spec)
    figs = []
    for name in ("acf", "pacf"):
        shared = {"x_range": figs[0].x_range, "y_range": figs[0].y_range} if figs else {}
        fig = theme.new_figure(name, texts[name], height=220, **shared)
        fig.varea(
            x="lag", y1="lower", y2="upper", source=bars, fill_color=theme.BAND, fill_alpha=0.7
        )
        rects = fig.vbar(x="lag", top=name, width=0.3, source=bars, color=theme.POINT)
        fig.add_tools(
            HoverTool(
                renderers=[rects],
                tooltips=[
                    ("lag", "@lag"),
                    (name, f"@{name}{{0.000}}"),
                    ("band", "@lower{0.000} to @upper{0.000}"),
                ],
            )
        )
        fig.xaxis.axis_label = "Lag (subgroups)"
        fig.yaxis.axis_label = "Autocorrelation" if name == "acf" else "Partial autocorrelation"
        theme.whole_number_ticks(fig)
        figs.append(fig)
    return column(*figs, name="acf_layout", tags=[spec])


def shifts_spec(result: TimeResult, *, x: str = "auto") -> dict[str, Any]:
    """Build description of the step-change layout: the kind of x axis.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import TimeResult
    >>> series = pd.DataFrame({"subgroup": [1, 2], "start": pd.NaT, "mean": [1.0, 2.0],
    ...                        "n": 5})
    >>> shifts_spec(TimeResult(pd.DataFrame(), pd.DataFrame(), {}, pd.DataFrame(),
    ...                        series=series))["x"]
    'position'
    """
    series = result.series
    has_time = "start" in series and bool(series["start"].notna().any())
    return {
        "figure": "shifts",
        "options": {"x": x},
        "x": theme.x_kind(x, series),
        "time": has_time,
        "webgl": len(series) > theme.WEBGL_FROM,
    }


def shifts_sources(result: TimeResult, spec: dict[str, Any]) -> dict[str, dict]:
    """Column data of the step-change layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import TimeResult
    >>> series = pd.DataFrame({"subgroup": [1, 2, 3], "start": pd.NaT,
    ...                        "mean": [1.0, 1.0, 3.0], "n": 5})
    >>> shifts = pd.DataFrame({"subgroup": [3], "position": [2], "time": pd.NaT,
    ...                        "before": [1.0], "after": [3.0], "p": [0.01]})
    >>> r = TimeResult(pd.DataFrame(), pd.DataFrame(), {}, shifts, series=series)
    >>> steps = shifts_sources(r, shifts_spec(r))["shifts_steps"]
    >>> steps["x0"].tolist(), steps["x1"].tolist()
    ([0.5, 2.5, 2.5], [2.5, 3.5, 2.5])
    """
    series = result.series
    x = (
        theme.time_ms(series["start"])
        if spec["x"] == "time"
        else np.arange(1, len(series) + 1, dtype=float)
    )
    y = series["mean"].to_numpy(dtype=float)
    labels = theme.labels(series["subgroup"])
    points: dict[str, Any] = {
        "x": x,
        "value": y,
        "subgroup": theme.hover_values(series["subgroup"]),
        "n": series["n"].to_numpy(),
    }
    if spec["time"]:
        points["time"] = theme.time_ms(series["start"])
    keep = theme.line_rows(len(series))
    line = theme.segments(x[keep], y[keep], np.zeros(keep.size))
    line.pop("panel")

    shifts = result.shifts
    at = pd.Index(labels).get_indexer(theme.labels(shifts["subgroup"]))
    if (at < 0).any():
        missing = theme.labels(shifts["subgroup"])[at < 0][:5].tolist()
        raise QCDataError(
            f"shifts: subgroup(s) {missing} are not in the series; pass a "
            "TimeResult whose shifts refer to its own series."
        )
    order = np.argsort(at, kind="stable")
    at = at[order]
    left, right = theme.boundaries(x, theme.TIME_PAD if spec["x"] == "time" else theme.POSITION_PAD)
    edge = left[at]
    start = np.concatenate([[left[0]], edge[:-1]]) if at.size else edge
    stop = np.concatenate([edge[1:], [right[-1]]]) if at.size else edge
    before = shifts["before"].to_numpy(dtype=float)[order]
    after = shifts["after"].to_numpy(dtype=float)[order]
    info = {
        "subgroup": theme.labels(shifts["subgroup"])[order],
        "before": before,
        "after": after,
        "p": shifts["p"].to_numpy(dtype=float)[order],
    }
    pieces = [
        (start, before, edge, before),
        (edge, after, stop, after),
        (edge, before, edge, after),
    ]
    steps = {
        "x0": np.concatenate([p[0] for p in pieces]),
        "y0": np.concatenate([p[1] for p in pieces]),
        "x1": np.concatenate([p[2] for p in pieces]),
        "y1": np.concatenate([p[3] for p in pieces]),
        **{k: np.concatenate([v] * len(pieces)) for k, v in info.items()},
    }
    return {"shifts_series": points, "shifts_line": line, "shifts_steps": steps}


def shifts_texts(result: TimeResult, spec: dict[str, Any]) -> dict[str, str]:
    """Title of the step-change figure.

    Examples
    --------
    >>> shifts_texts(None, {})["shifts"][:15]
    'Subgroup means '
    """
    return {
        "shifts": "Subgroup means with the detected step changes "
        "(level before and after each change)"
    }


def shifts_figure(result: TimeResult, *, x: str = "auto") -> LayoutDOM:
    """The subgroup means over time with each detected step change drawn over them.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import TimeResult
    >>> series = pd.DataFrame({"subgroup": [1, 2], "start": pd.NaT, "mean": [1.0, 2.0],
    ...                        "n": 5})
    >>> shifts = pd.DataFrame(columns=["subgroup", "position", "time", "before", "after", "p"])
    >>> shifts_figure(TimeResult(pd.DataFrame(), pd.DataFrame(), {}, shifts,
    ...                          series=series)).name
    'shifts_layout'
    """
    spec = shifts_spec(result, x=x)
    data = shifts_sources(result, spec)
    sources = {name: theme.source(name, cols) for name, cols in data.items()}
    fig = theme.new_figure(
        "shifts",
        shifts_texts(result, spec)["shifts"],
        webgl=spec["webgl"],
        **({"x_axis_type": "datetime"} if spec["x"] == "time" else {}),
    )
    fig.segment(
        "x0",
        "y0",
        "x1",
        "y1",
        source=sources["shifts_line"],
        line_color=theme.LINE,
        line_width=theme.LINE_WIDTH,
    )
    dots = fig.scatter(
        "x", "value", source=sources["shifts_series"], size=theme.POINT_SIZE, color=theme.POINT
    )
    steps = fig.segment(
        "x0",
        "y0",
        "x1",
        "y1",
        source=sources["shifts_steps"],
        line_color=theme.ACCENT,
        line_width=2.5,
    )
    tips = [("time", "@time{%F %H:%M}")] if spec["time"] else []
    fig.add_tools(
        HoverTool(
            renderers=[dots],
            formatters={"@time": "datetime"},
            tooltips=tips
            + [("subgroup", "@subgroup"), ("n", "@n"), ("mean", "@value{0,0.[0000]}")],
        )
    )
    fig.add_tools(
        HoverTool(
            renderers=[steps],
            tooltips=[
                ("first subgroup after the change", "@subgroup"),
                ("before", "@before{0,0.[0000]}"),
                ("after", "@after{0,0.[0000]}"),
                ("p", "@p{0.[0000]}"),
            ],
        )
    )
    fig.xaxis.axis_label = (
        "Subgroup start time" if spec["x"] == "time" else "Subgroup (position in time order)"
    )
    fig.yaxis.axis_label = "Subgroup mean"
    if spec["x"] != "time":
        theme.whole_number_ticks(fig)
    return column(fig, name="shifts_layout", tags=[spec])

"""Figures of the time structure: autocorrelation by lag, and detected step changes.

Names (layout / figures / sources and their columns):

- :func:`acf_figure`: ``"acf_layout"``; figures ``"acf"`` (autocorrelation) above
  ``"pacf"`` (partial autocorrelation) on a shared lag axis; ``"acf_bars"``
  (``lag, acf, pacf, lower, upper``; lags from 1, lag 0 is always 1 and is left out).
  The grey band is the result's ``lower``..``upper`` at each lag, drawn on both panels.
- :func:`shifts_figure`: ``"shifts_layout"``, figure ``"shifts"``; ``"shifts_series"``
  (``x, value, subgroup, n`` + ``time``), ``"shifts_line"`` (``x0, y0, x1, y1``, empty
  above :data:`~qcexplore.draw.parts.LINE_UP_TO` means) and ``"shifts_steps"``
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

from qcexplore.draw import encode, palette, parts
from qcexplore.errors import QCDataError
from qcexplore.stats.results import TimeResult

acf_plan = parts.fixed_plan("acf")


def acf_sources(result: TimeResult, plan: dict[str, Any]) -> dict[str, dict]:
    """Column data of ``"acf_bars"`` (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import AR1Fit, TimeResult
    >>> acf = pd.DataFrame({"lag": [0, 1], "acf": [1.0, 0.4], "pacf": [1.0, 0.4],
    ...                     "lower": [-0.2, -0.2], "upper": [0.2, 0.2]})
    >>> none, nan = pd.DataFrame(), float("nan")
    >>> r = TimeResult(acf, none, AR1Fit(*[nan] * 6), none, series=none, effective_n=nan)
    >>> acf_sources(r, acf_plan(r))["acf_bars"]["lag"].tolist()
    [1.0]
    """
    table = result.acf[result.acf["lag"] >= 1]
    return {
        "acf_bars": {
            c: table[c].to_numpy(dtype=float) for c in ("lag", "acf", "pacf", "lower", "upper")
        }
    }


def acf_texts(result: TimeResult, plan: dict[str, Any]) -> dict[str, str]:
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
    >>> from qcexplore.stats.results import AR1Fit, TimeResult
    >>> acf = pd.DataFrame({"lag": [1, 2], "acf": [0.4, 0.1], "pacf": [0.4, -0.1],
    ...                     "lower": [-0.2, -0.2], "upper": [0.2, 0.2]})
    >>> none, nan = pd.DataFrame(), float("nan")
    >>> acf_figure(TimeResult(acf, none, AR1Fit(*[nan] * 6), none, series=none,
    ...                       effective_n=nan)).name
    'acf_layout'
    """
    plan = acf_plan(result)
    bars = parts.source("acf_bars", acf_sources(result, plan)["acf_bars"])
    texts = acf_texts(result, plan)
    figs = []
    for name in ("acf", "pacf"):
        shared = {"x_range": figs[0].x_range, "y_range": figs[0].y_range} if figs else {}
        fig = parts.new_figure(name, texts[name], height=220, **shared)
        fig.varea(
            x="lag", y1="lower", y2="upper", source=bars, fill_color=palette.BAND, fill_alpha=0.7
        )
        rects = fig.vbar(x="lag", top=name, width=0.3, source=bars, color=palette.POINT)
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
        parts.whole_number_ticks(fig)
        figs.append(fig)
    return column(*figs, name="acf_layout", tags=[plan])


def shifts_plan(result: TimeResult, *, x: str = "auto") -> dict[str, Any]:
    """Build plan of the step-change layout: the kind of x axis.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import AR1Fit, TimeResult
    >>> series = pd.DataFrame({"subgroup": [1, 2], "start": pd.NaT, "mean": [1.0, 2.0],
    ...                        "n": 5})
    >>> none, nan = pd.DataFrame(), float("nan")
    >>> shifts_plan(TimeResult(none, none, AR1Fit(*[nan] * 6), none, series=series,
    ...                        effective_n=nan))["x"]
    'position'
    """
    series = result.series
    has_time = "start" in series and bool(series["start"].notna().any())
    return {
        "figure": "shifts",
        "options": {"x": x},
        "x": parts.x_kind(x, series),
        "time": has_time,
        "webgl": len(series) > parts.WEBGL_FROM,
    }


def shifts_sources(result: TimeResult, plan: dict[str, Any]) -> dict[str, dict]:
    """Column data of the step-change layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import AR1Fit, TimeResult
    >>> series = pd.DataFrame({"subgroup": [1, 2, 3], "start": pd.NaT,
    ...                        "mean": [1.0, 1.0, 3.0], "n": 5})
    >>> shifts = pd.DataFrame({"subgroup": [3], "position": [2], "time": pd.NaT,
    ...                        "before": [1.0], "after": [3.0], "p": [0.01]})
    >>> none, nan = pd.DataFrame(), float("nan")
    >>> r = TimeResult(none, none, AR1Fit(*[nan] * 6), shifts, series=series, effective_n=nan)
    >>> steps = shifts_sources(r, shifts_plan(r))["shifts_steps"]
    >>> steps["x0"].tolist(), steps["x1"].tolist()
    ([0.5, 2.5, 2.5], [2.5, 3.5, 2.5])
    """
    series = result.series
    x = (
        encode.time_ms(series["start"])
        if plan["x"] == "time"
        else np.arange(1, len(series) + 1, dtype=float)
    )
    y = series["mean"].to_numpy(dtype=float)
    labels = encode.labels(series["subgroup"])
    points: dict[str, Any] = {
        "x": x,
        "value": y,
        "subgroup": encode.hover_values(series["subgroup"]),
        "n": series["n"].to_numpy(),
    }
    if plan["time"]:
        points["time"] = encode.time_ms(series["start"])
    keep = parts.line_rows(len(series))
    line = parts.segments(x[keep], y[keep], np.zeros(keep.size))
    line.pop("panel")

    shifts = result.shifts
    at = pd.Index(labels).get_indexer(encode.labels(shifts["subgroup"]))
    if (at < 0).any():
        missing = encode.labels(shifts["subgroup"])[at < 0][:5].tolist()
        raise QCDataError(
            f"shifts: subgroup(s) {missing} are not in the series; pass a "
            "TimeResult whose shifts refer to its own series."
        )
    order = np.argsort(at, kind="stable")
    at = at[order]
    left, right = parts.boundaries(x, parts.TIME_PAD if plan["x"] == "time" else parts.POSITION_PAD)
    edge = left[at]
    start = np.concatenate([[left[0]], edge[:-1]]) if at.size else edge
    stop = np.concatenate([edge[1:], [right[-1]]]) if at.size else edge
    before = shifts["before"].to_numpy(dtype=float)[order]
    after = shifts["after"].to_numpy(dtype=float)[order]
    info = {
        "subgroup": encode.labels(shifts["subgroup"])[order],
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


def shifts_texts(result: TimeResult, plan: dict[str, Any]) -> dict[str, str]:
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
    >>> from qcexplore.stats.results import AR1Fit, TimeResult
    >>> series = pd.DataFrame({"subgroup": [1, 2], "start": pd.NaT, "mean": [1.0, 2.0],
    ...                        "n": 5})
    >>> shifts = pd.DataFrame(columns=["subgroup", "position", "time", "before", "after", "p"])
    >>> none, nan = pd.DataFrame(), float("nan")
    >>> shifts_figure(TimeResult(none, none, AR1Fit(*[nan] * 6), shifts, series=series,
    ...                          effective_n=nan)).name
    'shifts_layout'
    """
    plan = shifts_plan(result, x=x)
    data = shifts_sources(result, plan)
    sources = {name: parts.source(name, cols) for name, cols in data.items()}
    fig = parts.new_figure(
        "shifts",
        shifts_texts(result, plan)["shifts"],
        webgl=plan["webgl"],
        **({"x_axis_type": "datetime"} if plan["x"] == "time" else {}),
    )
    fig.segment(
        "x0",
        "y0",
        "x1",
        "y1",
        source=sources["shifts_line"],
        line_color=palette.LINE,
        line_width=parts.LINE_WIDTH,
    )
    dots = fig.scatter(
        "x", "value", source=sources["shifts_series"], size=parts.POINT_SIZE, color=palette.POINT
    )
    steps = fig.segment(
        "x0",
        "y0",
        "x1",
        "y1",
        source=sources["shifts_steps"],
        line_color=palette.ACCENT,
        line_width=2.5,
    )
    tips = [("time", "@time{%F %H:%M}")] if plan["time"] else []
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
        "Subgroup start time" if plan["x"] == "time" else "Subgroup (position in time order)"
    )
    fig.yaxis.axis_label = "Subgroup mean"
    if plan["x"] != "time":
        parts.whole_number_ticks(fig)
    return column(fig, name="shifts_layout", tags=[plan])

"""The control chart figure: the chart, its secondary chart below, strata overlaid or split.

Layout and names (stable, for :func:`qcexplore.draw.refresh` and for browser tests):

- root layout ``"chart_layout"``; its ``tags`` hold the build description (see
  :func:`chart_spec`);
- overlay (one panel): figures ``"chart"`` and ``"secondary_chart"``;
  split into small multiples (``split=True`` or per-stratum limits): a heading
  ``Div`` ``"chart_title"`` and figures ``"chart_0"``, ``"chart_1"``, ... with
  ``"secondary_chart_0"``, ... below them, one column per stratum level;
- data sources, shared by all panels (each panel shows its rows through a filter on
  the ``panel_code`` column): ``"chart_points"``, ``"chart_signals"``,
  ``"chart_line"``, ``"chart_limits"`` and the same four with the ``"secondary_"``
  prefix; the small lookup sources ``"chart_rules"`` and ``"secondary_rules"``, and
  with strata ``"chart_strata"`` and (overlay only) ``"chart_legend"``;
- the colour mapper ``"chart_colors"`` (a LinearColorMapper) of the points.

The sources with one row per point or segment hold number columns only: bokeh sends
those to the page as binary arrays but text columns element by element, which took
most of a split-by change on a long chart. Texts live in the small lookup sources.

Source columns:

- ``*_points``: ``x, value, subgroup, n, excluded`` (1 for a subgroup left out of the
  limit estimate: drawn crossed out, else 0); with strata ``stratum_code`` (row of the
  level in ``chart_strata``, -1 for none) and ``color_code`` (row of the colour in the
  ``chart_colors`` palette: the colour of a point is ``palette[color_code]``, -1 is the
  neutral colour); ``time`` (milliseconds since the epoch, wall clock) when the points
  have a ``start``; ``panel_code`` (position of the panel, -1 for none) when split.
  ``subgroup`` holds numbers when the subgroups are numbers, milliseconds since the
  epoch when they are times, else text.
- ``*_signals``: exactly the rows with ``signal`` true, the same columns without
  ``color_code``, plus ``rules_code``: the row in ``*_rules``, whose column ``rules``
  holds the rule ids that fired with their plain-words description.
- ``*_line`` (thin joining line, as segments): ``x0, y0, x1, y1`` (+ ``panel_code``).
  Empty above :data:`~qcexplore.draw.theme.LINE_UP_TO` points.
- ``*_limits`` (centre and limits as step lines): ``x0, y0, x1, y1, role_code``, the
  position of the role in :data:`ROLES` (0 centre, 1 limit) (+ ``panel_code``).
- ``"chart_strata"`` (with strata): ``stratum, color``, one row per level in code order.
- ``"chart_legend"`` (overlay with strata only): ``stratum, color, x, value``, one row
  per level shown (positions NaN: it only feeds the legend).

The x position of a point is its subgroup's position 1..k in time order (the code of
the ordered subgroup Categorical, or the order of first appearance), or the
subgroup's start time when every point has one (``x="auto"``).
"""

from __future__ import annotations

import html
from typing import Any

import numpy as np
import pandas as pd
from bokeh.layouts import column, gridplot
from bokeh.models import BoxSelectTool, Div, HoverTool, LayoutDOM, LinearColorMapper, TapTool
from bokeh.transform import transform

from qcexplore.draw import theme
from qcexplore.stats.results import ChartResult

#: Meaning of the ``role_code`` column of the limits sources.
ROLES = ("center", "limit")

_KIND_WORDS = {
    "xbar_r": "Subgroup means (X-bar chart, R-based)",
    "xbar_s": "Subgroup means (X-bar chart, S-based)",
    "imr": "Individual values (I chart)",
    "ewma": "EWMA of subgroup means",
    "cusum": "CUSUM of subgroup means",
    "p": "Proportion nonconforming (p chart)",
    "np": "Number nonconforming (np chart)",
    "c": "Defects per unit inspected (c chart)",
    "u": "Defects per unit (u chart)",
    "r": "Subgroup ranges (R chart)",
    "s": "Subgroup standard deviations (S chart)",
    "mr": "Moving ranges (MR chart)",
}


def chart_spec(result: ChartResult, *, split: bool = False, x: str = "auto") -> dict[str, Any]:
    """Build description of the chart layout: what changes only with a new figure.

    Two results with the same description can share one layout (:func:`refresh` swaps
    the data in place); a different description needs a new figure: another panel
    count or other panel levels (overlay <-> small multiples, another ``by``), a
    secondary chart appearing or disappearing, the x axis switching between positions
    and times, strata appearing or disappearing (legend), or WebGL switching on or off.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> chart_spec(ChartResult("xbar_r", pts, pd.DataFrame()))["panels"]
    ['all']
    """
    points = result.points
    stratum = points["stratum"] if "stratum" in points else pd.Series([None] * len(points))
    strata = bool(stratum.notna().any())
    per_stratum = result.limits_mode == "per_stratum"
    panelled = strata and (split or per_stratum)
    levels = theme.levels_of(stratum) if strata else []
    present = set(stratum.dropna().astype(str)) if panelled else set()
    panels = [str(v) for v in levels if str(v) in present] if panelled else ["all"]
    # Stratum levels are not part of the description in an overlay: their colours
    # travel in the data, so another split factor only re-colours the points.
    return {
        "figure": "chart",
        "options": {"split": bool(split), "x": x},
        "panels": panels,
        "strata": strata,
        "x": theme.x_kind(x, points),
        "time": "start" in points and bool(points["start"].notna().any()),
        "subgroup_time": theme.is_datetime(points["subgroup"]),
        "secondary": result.secondary is not None,
        "webgl": len(points) > theme.WEBGL_FROM,
    }


def _positions(points: pd.DataFrame) -> np.ndarray:
    """Position 1..k of each point's subgroup in time order."""
    sub = points["subgroup"]
    if isinstance(sub.dtype, pd.CategoricalDtype):
        return sub.cat.codes.to_numpy().astype(float) + 1.0
    return pd.factorize(sub)[0].astype(float) + 1.0


def _chart_sources(
    result: ChartResult, spec: dict[str, Any], prefix: str, levels: list[str]
) -> dict[str, dict[str, np.ndarray]]:
    # Only number columns in the per-point sources: the page receives those as binary
    # arrays, text columns element by element (seconds for a long chart). Texts live in
    # the small lookup sources ("chart_strata", "*_rules") that the hover reads.
    points = result.points
    size = len(points)
    stratum = points["stratum"] if "stratum" in points else pd.Series([None] * size)
    codes = theme.codes_for(stratum, levels) if spec["strata"] else np.full(size, -1, np.int32)
    start = theme.time_ms(points["start"]) if spec["time"] else None
    x = start if spec["x"] == "time" else _positions(points)
    y = points["stat"].to_numpy(dtype=float)
    panelled = spec["panels"] != ["all"]
    data: dict[str, Any] = {
        "x": x,
        "value": y,
        "subgroup": theme.hover_values(points["subgroup"]),
        "n": points["n"].to_numpy(),
    }
    if spec["strata"]:
        data["stratum_code"] = codes
        data["color_code"] = theme.color_codes(codes)
    if start is not None:
        data["time"] = start
    # Subgroups left out of the limit estimate (still plotted) are drawn crossed out.
    left_out = points["excluded"].to_numpy(dtype=bool) if "excluded" in points else None
    data["excluded"] = np.zeros(size, np.int8) if left_out is None else left_out.astype(np.int8)
    # Panel of each row: its level's position among the panels shown (-1: none).
    panel = None
    if panelled:
        at = pd.Index(spec["panels"], dtype=object).get_indexer(levels)
        panel = np.append(at, -1).astype(np.int32)[codes]
        data["panel_code"] = panel
    signal = points["signal"].to_numpy(dtype=bool)
    signals = {k: v[signal] for k, v in data.items() if k not in ("color_code", "excluded")}
    rule_codes, rule_sets = theme.code_table(points["rules"].to_numpy(dtype=object)[signal])
    signals["rules_code"] = rule_codes

    # Join within a stratum when strata share positions (a factor that varies inside
    # subgroups), else join all points in time order.
    if panelled or pd.Series(x).duplicated().any():
        group = codes
    else:
        group = np.zeros(size, dtype=np.int32)
    keep = theme.line_rows(size)
    line = theme.segments(x[keep], y[keep], group[keep], None if panel is None else panel[keep])
    line["panel_code"] = line.pop("panel")

    pad = theme.TIME_PAD if spec["x"] == "time" else theme.POSITION_PAD
    limit_cols = {k: points[k].to_numpy(dtype=float) for k in ("center", "lcl", "ucl")}
    rows = [slice(None)] if panel is None else [panel == i for i in range(len(spec["panels"]))]
    parts = []
    for i, r in enumerate(rows):
        part = theme.steps(x[r], {k: v[r] for k, v in limit_cols.items()}, pad)
        part["role_code"] = (part.pop("role") == "limit").astype(np.int32)  # see ROLES
        part["panel_code"] = np.full(part["x0"].size, i, dtype=np.int32)
        parts.append(part)
    limit_data = theme.concat(parts, ("x0", "y0", "x1", "y1", "role_code", "panel_code"))
    if panel is None:
        line.pop("panel_code")
        limit_data.pop("panel_code")
    return {
        f"{prefix}_points": data,
        f"{prefix}_signals": signals,
        f"{prefix}_rules": {"rules": theme.rule_texts(rule_sets)},
        f"{prefix}_line": line,
        f"{prefix}_limits": limit_data,
    }


def chart_sources(result: ChartResult, spec: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Column data of every named source of the chart layout described by ``spec``.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> r = ChartResult("xbar_r", pts, pd.DataFrame())
    >>> sorted(chart_sources(r, chart_spec(r)))
    ['chart_limits', 'chart_line', 'chart_points', 'chart_rules', 'chart_signals']
    """
    # The secondary chart takes the main chart's levels so that colours match.
    stratum = result.points["stratum"] if "stratum" in result.points else pd.Series([])
    levels = [str(v) for v in theme.levels_of(stratum)]
    out = _chart_sources(result, spec, "chart", levels)
    if spec["strata"]:
        out["chart_strata"] = {
            "stratum": np.array(levels, dtype=object),
            "color": theme.colors_for(levels, levels),
        }
    if spec["strata"] and spec["panels"] == ["all"]:
        codes = out["chart_points"]["stratum_code"]
        shown = [levels[i] for i in np.unique(codes[codes >= 0])]
        out["chart_legend"] = {
            "stratum": np.array(shown, dtype=object),
            "color": theme.colors_for(shown, levels),
            "x": np.full(len(shown), np.nan),
            "value": np.full(len(shown), np.nan),
        }
    if result.secondary is not None:
        out.update(_chart_sources(result.secondary, spec, "secondary", levels))
    return out


def _title(result: ChartResult) -> str:
    if result.title:
        return result.title
    what = _KIND_WORDS.get(result.kind, f"{result.kind} chart of the {result.statistic}")
    methods = result.limits["method"].dropna().unique() if "method" in result.limits else []
    method = ", ".join(map(str, methods)) or result.sigma_method
    mode = " per stratum" if result.limits_mode == "per_stratum" else ""
    return f"{what}: limits at ±{result.sigma_level:g} sigma{mode}, sigma from {method}"


def chart_texts(result: ChartResult, spec: dict[str, Any]) -> dict[str, str]:
    """Titles of the chart layout's named figures and heading, by model name.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1], "stratum": [None], "stat": [1.0], "center": 1.0,
    ...     "lcl": 0.0, "ucl": 2.0, "n": 5, "signal": False, "rules": [()]})
    >>> chart_texts(ChartResult("xbar_r", pts, pd.DataFrame(), title="Fill"), chart_spec(
    ...     ChartResult("xbar_r", pts, pd.DataFrame())))
    {'chart': 'Fill'}
    """
    panels = spec["panels"]
    texts: dict[str, str] = {}
    sec = result.secondary
    if len(panels) == 1:
        texts["chart"] = _title(result)
        if sec is not None:
            texts["secondary_chart"] = _title(sec)
        return texts
    texts["chart_title"] = f"<b>{html.escape(_title(result))}</b>" + (
        f"<br>below: {html.escape(_title(sec))}" if sec is not None else ""
    )
    by = result.by or "stratum"
    names = zip(
        theme.panel_names("chart", len(panels)),
        theme.panel_names("secondary_chart", len(panels)),
        panels,
        strict=True,
    )
    for name, sec_name, level in names:
        texts[name] = f"{result.statistic}, {by} = {level}"
        if sec is not None:
            texts[sec_name] = f"{sec.statistic}, {by} = {level}"
    return texts


def _hover(spec: dict[str, Any], sources: dict[str, Any], prefix: str, rules: bool) -> HoverTool:
    """Hover of a points or signals renderer: time, subgroup, stratum, n, value (, rules).

    Dates (the time, a subgroup that is a time) are sent as milliseconds and shown by
    bokeh's datetime formatter; stratum and rules are codes looked up in small sources.
    """
    stamp = "{%F %H:%M}"
    tips = [("time", f"@time{stamp}")] if spec["time"] else []
    tips.append(("subgroup", f"@subgroup{stamp}" if spec["subgroup_time"] else "@subgroup"))
    formatters: dict[str, Any] = {"@time": "datetime", "@subgroup": "datetime"}
    if spec["strata"]:
        tips.append(("stratum", "@stratum_code{custom}"))
        formatters["@stratum_code"] = theme.lookup_hover(sources["chart_strata"], "stratum")
    tips += [("n", "@n"), ("value", "@value{0,0.[0000]}")]
    if rules:
        tips.append(("rules", "@rules_code{custom}"))
        formatters["@rules_code"] = theme.lookup_hover(sources[f"{prefix}_rules"], "rules")
    if not spec["subgroup_time"]:
        formatters.pop("@subgroup")
    return HoverTool(tooltips=tips, formatters=formatters)


def _draw_panel(
    fig: Any,
    sources: dict[str, Any],
    prefix: str,
    panel: str,
    spec: dict,
    colors: LinearColorMapper | None,
) -> None:
    line, limits = sources[f"{prefix}_line"], sources[f"{prefix}_limits"]
    points, signals = sources[f"{prefix}_points"], sources[f"{prefix}_signals"]
    flt = None if panel == "all" else spec["panels"].index(panel)
    fig.segment(
        "x0",
        "y0",
        "x1",
        "y1",
        source=line,
        view=theme.coded_view(panel_code=flt),
        line_color=theme.LINE,
        line_width=theme.LINE_WIDTH,
    )
    dots = fig.scatter(
        "x",
        "value",
        source=points,
        view=theme.coded_view(panel_code=flt),
        size=theme.POINT_SIZE,
        color=transform("color_code", colors) if colors is not None else theme.POINT,
    )
    # Centre and limits above the points: on a dense chart they would vanish below them.
    theme.centre_and_limits(
        fig,
        limits,
        theme.coded_view(panel_code=flt, role_code=ROLES.index("center")),
        theme.coded_view(panel_code=flt, role_code=ROLES.index("limit")),
    )
    fig.scatter(
        "x",
        "value",
        source=points,
        view=theme.coded_view(panel_code=flt, excluded=1),
        marker="x",
        size=theme.SIGNAL_SIZE,
        line_color=theme.LIMIT,
        line_width=2,
    )
    marks = fig.scatter(
        "x",
        "value",
        source=signals,
        view=theme.coded_view(panel_code=flt),
        size=theme.SIGNAL_SIZE,
        fill_color=None,
        line_color=theme.ACCENT,
        line_width=2,
    )
    # The rules that fired are in the signals' hover text (a signal shows both tips).
    for renderer, rules in ((dots, False), (marks, True)):
        hover = _hover(spec, sources, prefix, rules)
        hover.renderers = [renderer]
        fig.add_tools(hover)
    if prefix == "chart":
        # Box or tap selects points (not signals or lines) on the main chart: the explorer
        # shows the selected rows. Built here, with the figure: BokehJS loses a figure's
        # legend and toolbar when tools are added to it once it is on show.
        fig.add_tools(BoxSelectTool(renderers=[dots]), TapTool(renderers=[dots]))
    if spec["strata"] and panel == "all" and prefix == "chart":
        # One legend row per level from the small "chart_legend" source (nothing drawn:
        # its positions are NaN); grouping 250,000 points in the page would be slow. It
        # sits above the main chart only, so the chart below keeps the same x extent.
        fig.scatter(
            "x",
            "value",
            source=sources["chart_legend"],
            color="color",
            size=theme.POINT_SIZE + 3,
            legend_field="stratum",
        )
        fig.legend.orientation = "horizontal"
        fig.legend.border_line_color = None
        fig.add_layout(fig.legend[0], "above")
    fig.xaxis.axis_label = (
        "Subgroup start time" if spec["x"] == "time" else "Subgroup (position in time order)"
    )
    if spec["x"] != "time":
        theme.whole_number_ticks(fig)


def chart_figure(result: ChartResult, *, split: bool = False, x: str = "auto") -> LayoutDOM:
    """The control chart with its secondary chart below on a shared x axis.

    Strata are overlaid in colour (pooled limits), or split into small multiples with a
    shared y axis when ``split=True`` or the limits are per stratum. Signals are hollow
    accent-coloured markers whose hover text names the rules that fired. Above
    :data:`~qcexplore.draw.theme.WEBGL_FROM` points the figures draw through WebGL;
    above :data:`~qcexplore.draw.theme.LINE_UP_TO` points the joining line is left out.
    Model names and source columns: see the module docstring.

    Parameters
    ----------
    result : ChartResult
    split : bool
        Small multiples, one panel per stratum level, instead of one overlaid chart.
    x : {"auto", "position", "time"}
        Position 1..k of the subgroup, or its start time ("auto": time when every point
        has a start).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> chart_figure(ChartResult("xbar_r", pts, pd.DataFrame())).name
    'chart_layout'
    """
    spec = chart_spec(result, split=split, x=x)
    data = chart_sources(result, spec)
    sources = {name: theme.source(name, cols) for name, cols in data.items()}
    colors = theme.strata_color_mapper("chart_colors") if spec["strata"] else None
    texts = chart_texts(result, spec)
    panels = spec["panels"]
    names = theme.panel_names("chart", len(panels))
    sec_names = theme.panel_names("secondary_chart", len(panels))
    width = theme.WIDTH if len(panels) == 1 else max(240, theme.WIDTH // len(panels))
    axis = {"x_axis_type": "datetime"} if spec["x"] == "time" else {}
    mains, seconds = [], []
    for i, panel in enumerate(panels):
        shared = {"x_range": mains[0].x_range, "y_range": mains[0].y_range} if mains else {}
        fig = theme.new_figure(
            names[i], texts[names[i]], width=width, webgl=spec["webgl"], **axis, **shared
        )
        fig.yaxis.axis_label = result.statistic if i == 0 else ""
        _draw_panel(fig, sources, "chart", panel, spec, colors)
        mains.append(fig)
        if result.secondary is not None:
            shared = {"y_range": seconds[0].y_range} if seconds else {}
            sec = theme.new_figure(
                sec_names[i],
                texts[sec_names[i]],
                width=width,
                height=theme.SECONDARY_HEIGHT,
                webgl=spec["webgl"],
                x_range=fig.x_range,
                **axis,
                **shared,
            )
            sec.yaxis.axis_label = result.secondary.statistic if i == 0 else ""
            _draw_panel(sec, sources, "secondary", panel, spec, colors)
            seconds.append(sec)
    if len(panels) == 1:
        return column(*mains, *seconds, name="chart_layout", tags=[spec])
    grid = gridplot([mains, seconds] if seconds else [mains], toolbar_location="right")
    heading = Div(name="chart_title", text=texts["chart_title"])
    return column(heading, grid, name="chart_layout", tags=[spec])

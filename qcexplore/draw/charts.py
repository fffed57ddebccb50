"""The control chart figure: the chart, its secondary chart below, strata overlaid or split.

Layout and names (stable, for :func:`qcexplore.draw.refresh` and for browser tests):

- root layout ``"chart_layout"``; its ``tags`` hold the build plan (see
  :func:`chart_plan`);
- overlay (one panel): figures ``"chart"`` and ``"secondary_chart"``;
  split into small multiples (``split=True`` or per-stratum limits): a heading
  ``Div`` ``"chart_title"`` and figures ``"chart_0"``, ``"chart_1"``, ... with
  ``"secondary_chart_0"``, ... below them, one column per stratum level;
- data sources, shared by all panels (each panel shows its rows through a filter on
  the ``panel_code`` column): ``"chart_points"``, ``"chart_signals"``,
  ``"chart_line"``, ``"chart_limits"``, ``"chart_limit_values"`` and the same five
  with the ``"secondary_"`` prefix; the small lookup sources ``"chart_rules"`` and
  ``"secondary_rules"``, and with strata ``"chart_strata"`` and (overlay only)
  ``"chart_legend"``;
- the colour mapper ``"chart_colors"`` (a LinearColorMapper) of the points.

The sources with one row per point or segment hold number columns only: bokeh sends
those to the page as binary arrays but text columns element by element, which took
most of a split-by change on a long chart. Texts live in the small lookup sources.

Source columns:

- ``*_points``: ``x, value, subgroup, n, point`` (the row of the point in the result's
  ``points``: a selection of source rows maps back through it), ``excluded`` (1 for a
  subgroup left out of the limit estimate: drawn crossed out, else 0); with strata
  ``stratum_code`` (row of the level in ``chart_strata``, -1 for none) and
  ``color_code`` (row of the colour in the ``chart_colors`` palette, see
  :func:`qcexplore.draw.palette.color_codes`; -1 is the neutral colour); ``time``
  (milliseconds since the epoch, wall clock) when the points have a ``start``;
  ``panel_code`` (position of the panel, -1 for none) when split.
  ``subgroup`` holds numbers when the subgroups are numbers, milliseconds since the
  epoch when they are times, else text. A CUSUM chart draws both sums: ``value`` is
  the upper sum C+ (the result's ``stat``, drawn as upward triangles) and ``lower``
  the lower sum C- (``stat_lower``, below zero, downward triangles).
- ``*_signals``: one row for each row with ``signal`` true, the same columns without
  ``color_code``, plus ``rules_code``: the row in ``*_rules``, whose column ``rules``
  holds the rule ids that fired with their plain-words description. On a CUSUM chart
  the ring sits on the sum that lies beyond its limit (``value`` is that sum).
  The signals are never reduced. Above :data:`~qcexplore.draw.parts.REDUCE_FROM`
  points, the points (and the line and limits drawn from them) are a display reduction
  (:func:`~qcexplore.draw.parts.display_rows`): per panel and colour, the lowest and
  highest point of each pixel column, the first and last point, every signal and every
  subgroup left out of the limits; the figure's title (or the split layout's heading)
  says how many points it is drawn from. The result and its tables keep every point.
- ``*_line`` (thin joining line, as segments): ``x0, y0, x1, y1`` (+ ``panel_code``).
  Empty above :data:`~qcexplore.draw.parts.LINE_UP_TO` points.
- ``*_limits`` (centre and limits as step lines): ``x0, y0, x1, y1, role_code``, the
  position of the role in :data:`ROLES` (0 centre, 1 limit) (+ ``panel_code``).
- ``*_limit_values``: ``x, y, text, anchor`` (+ ``panel_code``): the centre and limit
  values, written at the right end of their lines (``anchor``: the text baseline).
- ``"chart_strata"`` (with strata): ``stratum, color``, one row per level in code order.
- ``"chart_legend"`` (overlay with strata only): ``label, color, x, value``, one row per
  level shown, or the highlighted level and "others" beyond eight levels (positions
  NaN: it only feeds the legend).

The x position of a point is its subgroup's position 1..k in time order (the code of
the ordered subgroup Categorical, or the order of first appearance), or the
subgroup's start time when every point has one (``x="auto"``).
"""

from __future__ import annotations

import html
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
from bokeh.layouts import column, gridplot
from bokeh.models import BoxSelectTool, Div, HoverTool, LayoutDOM, LinearColorMapper, TapTool
from bokeh.transform import transform

from qcexplore.draw import encode, palette, parts
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.kinds import CHART_KINDS
from qcexplore.stats.results import ChartResult

#: Meaning of the ``role_code`` column of the limits sources.
ROLES = ("center", "limit")


class _Words(NamedTuple):
    title: str  # what is plotted, for a result without a title of its own
    axis: str  # the y axis label and the start of each small multiple's title


class _Sum(NamedTuple):
    column: str  # column of the points sources
    marker: str
    name: str  # hover text; empty for a chart of one series


#: The series a chart draws from its points: one, or a CUSUM chart's two sums.
_ONE = (_Sum("value", "circle", ""),)
_SUMS = (
    _Sum("value", "triangle", "upper, C+"),
    _Sum("lower", "inverted_triangle", "lower, C\u2212"),
)


def _words(result: ChartResult) -> _Words:
    kind = CHART_KINDS.get(result.kind)
    if kind is None:
        return _Words(f"{result.kind} chart of the {result.statistic}", result.statistic)
    return _Words(kind.title, kind.axis)


def _stratum(points: pd.DataFrame) -> pd.Series:
    return points["stratum"] if "stratum" in points else pd.Series([None] * len(points))


def chart_plan(
    result: ChartResult, *, split: bool = False, x: str = "auto", highlight: Any = None
) -> dict[str, Any]:
    """Build plan of the chart layout: what changes only with a new figure.

    Two results with the same plan can share one layout (:func:`refresh` swaps the
    data in place); a different plan needs a new figure: another panel count or
    other panel levels (overlay <-> small multiples, another ``by``), a secondary
    chart appearing or disappearing, the x axis switching between positions and
    times, strata appearing or disappearing (legend), legend labels too long for the
    legend's columns, a CUSUM chart (two sums) for another kind or back, or WebGL
    switching on or off.

    Raises
    ------
    QCDataError
        When ``highlight`` is not a stratum level, or a CUSUM result has no
        ``stat_lower``.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> chart_plan(ChartResult("xbar_r", pts, pd.DataFrame()))["panels"]
    ['all']
    """
    points = result.points
    stratum = _stratum(points)
    strata = bool(stratum.notna().any())
    per_stratum = result.limits_mode == "per_stratum"
    panelled = strata and (split or per_stratum)
    levels = [str(v) for v in encode.levels_of(stratum)] if strata else []
    chosen = None if highlight is None else str(highlight)
    palette.highlight_index(levels, chosen)
    present = set(stratum.dropna().astype(str)) if panelled else set()
    panels = [v for v in levels if v in present] if panelled else ["all"]
    if result.kind == "cusum" and "stat_lower" not in points:
        raise QCDataError(
            "result: a CUSUM chart without the column 'stat_lower' (the lower sum); "
            "build it with control_chart(kind='cusum')."
        )
    legend = palette.legend_entries(levels, levels, chosen)[0] if strata else []
    # Stratum levels are not part of the plan in an overlay: their colours travel in
    # the data, so another split factor only re-colours the points.
    return {
        "figure": "chart",
        "options": {"split": bool(split), "x": x, "highlight": chosen},
        "sums": result.kind == "cusum",
        "secondary": result.secondary is not None,
        "panels": panels,
        "strata": strata,
        "legend_columns": parts.legend_columns(legend) if panels == ["all"] else 0,
        "x": parts.x_kind(x, points),
        "time": "start" in points and bool(points["start"].notna().any()),
        "subgroup_time": encode.is_datetime(points["subgroup"]),
        "webgl": len(points) > parts.WEBGL_FROM,
    }


def _positions(points: pd.DataFrame) -> np.ndarray:
    """Position 1..k of each point's subgroup in time order."""
    sub = points["subgroup"]
    if isinstance(sub.dtype, pd.CategoricalDtype):
        return sub.cat.codes.to_numpy().astype(float) + 1.0
    return pd.factorize(sub)[0].astype(float) + 1.0


def _signal_rows(points: pd.DataFrame, values: dict[str, np.ndarray]) -> tuple[np.ndarray, ...]:
    """Rows of the signals and the value each ring sits on.

    A CUSUM signal is ringed on the sum beyond its limit: the lower sum where it lies below
    the lower limit, else the upper sum (so that every signal gets its ring).
    """
    signal = points["signal"].to_numpy(dtype=bool)
    if "lower" not in values:
        rows = np.flatnonzero(signal)
        return rows, values["value"][rows]
    lower = signal & (values["lower"] < points["lcl"].to_numpy(dtype=float))
    upper = signal & ((values["value"] > points["ucl"].to_numpy(dtype=float)) | ~lower)
    rows = np.concatenate([np.flatnonzero(upper), np.flatnonzero(lower)])
    return rows, np.concatenate([values["value"][upper], values["lower"][lower]])


def _panel_width(plan: dict[str, Any]) -> int:
    """Width in pixels of each figure of the layout (small multiples share the width)."""
    count = len(plan["panels"])
    return parts.WIDTH if count == 1 else max(240, parts.WIDTH // count)


def _levels(result: ChartResult) -> list[str]:
    return [str(v) for v in encode.levels_of(_stratum(result.points))]


def _point_columns(
    result: ChartResult, plan: dict[str, Any], prefix: str, levels: list[str]
) -> tuple[dict[str, np.ndarray], tuple[str, ...]]:
    """Columns of the points source for every point of the result, and the names of the
    series among them (``value``, and ``lower`` on a CUSUM chart)."""
    # Only number columns in the per-point sources: the page receives those as binary
    # arrays, text columns element by element (seconds for a long chart). Texts live in
    # the small lookup sources ("chart_strata", "*_rules") that the hover reads.
    points = result.points
    size = len(points)
    stratum = _stratum(points)
    codes = encode.codes_for(stratum, levels) if plan["strata"] else np.full(size, -1, np.int32)
    start = encode.time_ms(points["start"]) if plan["time"] else None
    series = {"value": points["stat"].to_numpy(dtype=float)}
    if prefix == "chart" and plan["sums"]:
        series["lower"] = points["stat_lower"].to_numpy(dtype=float)
    data: dict[str, Any] = {
        "x": start if plan["x"] == "time" else _positions(points),
        **series,
        "subgroup": encode.hover_values(points["subgroup"]),
        "n": points["n"].to_numpy(),
        # The row of the result's points: what a selection on the page maps back through.
        "point": np.arange(size, dtype=np.int32),
    }
    if plan["strata"]:
        data["stratum_code"] = codes
        data["color_code"] = palette.color_codes(codes, levels, plan["options"]["highlight"])
    if start is not None:
        data["time"] = start
    # Subgroups left out of the limit estimate (still plotted) are drawn crossed out.
    left_out = points["excluded"].to_numpy(dtype=bool) if "excluded" in points else None
    data["excluded"] = np.zeros(size, np.int8) if left_out is None else left_out.astype(np.int8)
    if plan["panels"] != ["all"]:
        # Panel of each row: its level's position among the panels shown (-1: none).
        at = pd.Index(plan["panels"], dtype=object).get_indexer(levels)
        data["panel_code"] = np.append(at, -1).astype(np.int32)[codes]
    return data, tuple(series)


def _shown_rows(
    points: pd.DataFrame, data: dict[str, np.ndarray], series: tuple[str, ...], width: int
) -> np.ndarray | None:
    """Rows of the points sent to the page: all of them (``None``) up to
    :data:`~qcexplore.draw.parts.REDUCE_FROM` points, else their display reduction
    (:func:`~qcexplore.draw.parts.display_rows`) per panel and colour, with every signal
    and every subgroup left out of the limits."""
    if len(points) <= parts.REDUCE_FROM:
        return None
    keep = points["signal"].to_numpy(dtype=bool) | (data["excluded"] == 1)
    group = data.get("panel_code", data.get("color_code", np.zeros(len(points), np.int32)))
    return parts.display_rows(data["x"], [data[s] for s in series], keep, group, width)


def _reduction_words(result: ChartResult) -> str:
    """What a reduced chart says about the points it draws (empty when it draws all).

    Without the count of the points drawn, so that titles cost nothing to write.
    """
    if len(result.points) <= parts.REDUCE_FROM:
        return ""
    return (
        f"drawn from {len(result.points):,} points by the lowest and highest per pixel "
        "column and every signal"
    )


def _chart_sources(
    result: ChartResult, plan: dict[str, Any], prefix: str, levels: list[str]
) -> dict[str, dict[str, np.ndarray]]:
    points = result.points
    data, names = _point_columns(result, plan, prefix, levels)
    series = {k: data[k] for k in names}
    rows, ringed = _signal_rows(points, series)
    points_only = ("color_code", "excluded", "lower")
    signals = {k: v[rows] for k, v in data.items() if k not in points_only}
    signals["value"] = ringed
    rule_codes, rule_sets = encode.code_table(points["rules"].to_numpy(dtype=object)[rows])
    signals["rules_code"] = rule_codes

    limit_cols = {k: points[k].to_numpy(dtype=float) for k in ("center", "lcl", "ucl")}
    shown = _shown_rows(points, data, names, _panel_width(plan))
    if shown is not None:
        data = {k: v[shown] for k, v in data.items()}
        series = {k: data[k] for k in names}
        limit_cols = {k: v[shown] for k, v in limit_cols.items()}
    size = data["x"].size
    x = data["x"]
    codes = data.get("stratum_code", np.full(size, -1, np.int32))
    panel = data.get("panel_code")
    panelled = panel is not None

    # Join within a stratum when strata share positions (a factor that varies inside
    # subgroups), else join all points in time order.
    if panelled or (not parts.increasing(x) and pd.Series(x).duplicated().any()):
        group = codes
    else:
        group = np.zeros(size, dtype=np.int32)
    keep = parts.line_rows(size)
    line = parts.concat(
        [
            parts.segments(x[keep], y[keep], group[keep], None if panel is None else panel[keep])
            for y in series.values()
        ],
        ("x0", "y0", "x1", "y1", "panel"),
    )
    line["panel_code"] = line.pop("panel")

    pad = parts.TIME_PAD if plan["x"] == "time" else parts.POSITION_PAD
    rows_of = [slice(None)] if panel is None else [panel == i for i in range(len(plan["panels"]))]
    pieces, ends = [], []
    for i, r in enumerate(rows_of):
        lines = {k: v[r] for k, v in limit_cols.items()}
        piece = parts.steps(x[r], lines, pad)
        piece["role_code"] = (piece.pop("role") == "limit").astype(np.int32)  # see ROLES
        piece["panel_code"] = np.full(piece["x0"].size, i, dtype=np.int32)
        pieces.append(piece)
        end = parts.line_ends(x[r], lines, pad)
        end["panel_code"] = np.full(end["x"].size, i, dtype=np.int32)
        ends.append(end)
    limit_data = parts.concat(pieces, ("x0", "y0", "x1", "y1", "role_code", "panel_code"))
    values = parts.concat(ends, ("x", "y", "text", "anchor", "panel_code"))
    if panel is None:
        for table in (line, limit_data, values):
            table.pop("panel_code")
    return {
        f"{prefix}_points": data,
        f"{prefix}_signals": signals,
        f"{prefix}_rules": {"rules": encode.rule_texts(rule_sets)},
        f"{prefix}_line": line,
        f"{prefix}_limits": limit_data,
        f"{prefix}_limit_values": values,
    }


def chart_sources(result: ChartResult, plan: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Column data of every named source of the chart layout built to ``plan``.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> r = ChartResult("xbar_r", pts, pd.DataFrame())
    >>> sorted(chart_sources(r, chart_plan(r)))[:3]
    ['chart_limit_values', 'chart_limits', 'chart_line']
    """
    # The secondary chart takes the main chart's levels so that colours match.
    levels = _levels(result)
    highlight = plan["options"]["highlight"]
    out = _chart_sources(result, plan, "chart", levels)
    if plan["strata"]:
        out["chart_strata"] = {
            "stratum": np.array(levels, dtype=object),
            "color": palette.colors_for(levels, levels, highlight),
        }
    if plan["strata"] and plan["panels"] == ["all"]:
        codes = out["chart_points"]["stratum_code"]
        shown = [levels[i] for i in np.unique(codes[codes >= 0])]
        labels, colours = palette.legend_entries(levels, shown, highlight)
        out["chart_legend"] = {
            "label": np.array(labels, dtype=object),
            "color": np.array(colours, dtype=object),
            "x": np.full(len(labels), np.nan),
            "value": np.full(len(labels), np.nan),
        }
    secondary = result.secondary
    if secondary is not None:
        out.update(_chart_sources(secondary, plan, "secondary", levels))
    return out


def _title(result: ChartResult) -> str:
    if result.title:
        return result.title
    limits = result.limits
    methods = limits["method"].dropna().unique() if "method" in limits else []
    method = ", ".join(map(str, methods)) or result.sigma_method
    mode = " per stratum" if result.limits_mode == "per_stratum" else ""
    return (
        f"{_words(result).title}: limits at ±{result.sigma_level:g} sigma{mode}, "
        f"sigma from {method}"
    )


def chart_texts(result: ChartResult, plan: dict[str, Any]) -> dict[str, str]:
    """Titles of the chart layout's figures and heading, and the y axis labels of its
    first panels (axes named ``<figure>_y_axis``), by model name.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1], "stratum": [None], "stat": [1.0], "center": 1.0,
    ...     "lcl": 0.0, "ucl": 2.0, "n": 1, "signal": False, "rules": [()]})
    >>> chart_texts(ChartResult("imr", pts, pd.DataFrame(), title="Fill"), chart_plan(
    ...     ChartResult("imr", pts, pd.DataFrame())))
    {'chart_y_axis': 'Single value', 'chart': 'Fill'}
    """
    panels = plan["panels"]
    names = parts.panel_names("chart", len(panels))
    sec_names = parts.panel_names("secondary_chart", len(panels))
    sec = result.secondary
    texts = {f"{names[0]}_y_axis": _words(result).axis}
    if sec is not None:
        texts[f"{sec_names[0]}_y_axis"] = _words(sec).axis
    # A long chart is drawn from a display reduction of its points: its title says so.
    title = ", ".join(filter(None, [_title(result), _reduction_words(result)]))
    sec_title = (
        None if sec is None else ", ".join(filter(None, [_title(sec), _reduction_words(sec)]))
    )
    if len(panels) == 1:
        texts["chart"] = title
        if sec is not None:
            texts["secondary_chart"] = sec_title
        return texts
    texts["chart_title"] = f"<b>{html.escape(title)}</b>" + (
        f"<br>below: {html.escape(sec_title)}" if sec is not None else ""
    )
    by = result.by or "stratum"
    for name, sec_name, level in zip(names, sec_names, panels, strict=True):
        texts[name] = f"{_words(result).axis}, {by} = {level}"
        if sec is not None:
            texts[sec_name] = f"{_words(sec).axis}, {by} = {level}"
    return texts


def _hover(
    plan: dict[str, Any], sources: dict[str, Any], prefix: str, series: _Sum | None, renderer: Any
) -> HoverTool:
    """Hover of a points renderer (``series``) or of the signals (``None``): time,
    subgroup, stratum, (the sum,) n, value (, rules).

    Dates (the time, a subgroup that is a time) are sent as milliseconds and shown by
    bokeh's datetime formatter; stratum and rules are codes looked up in small sources.
    """
    rules = series is None
    stamp = "{%F %H:%M}"
    tips = [("time", f"@time{stamp}")] if plan["time"] else []
    tips.append(("subgroup", f"@subgroup{stamp}" if plan["subgroup_time"] else "@subgroup"))
    formatters: dict[str, Any] = {"@time": "datetime", "@subgroup": "datetime"}
    if plan["strata"]:
        tips.append(("stratum", "@stratum_code{custom}"))
        formatters["@stratum_code"] = parts.lookup_hover(sources["chart_strata"], "stratum")
    if series is not None and series.name:
        tips.append(("sum", series.name))
    shown = "value" if series is None else series.column  # a ring sits on the sum it marks
    tips += [("n", "@n"), ("value", f"@{shown}{{0,0.[0000]}}")]
    if rules:
        tips.append(("rules", "@rules_code{custom}"))
        formatters["@rules_code"] = parts.lookup_hover(sources[f"{prefix}_rules"], "rules")
    if not plan["subgroup_time"]:
        formatters.pop("@subgroup")
    return HoverTool(renderers=[renderer], tooltips=tips, formatters=formatters)


def _draw_panel(
    fig: Any,
    sources: dict[str, Any],
    prefix: str,
    panel: str,
    plan: dict,
    colors: LinearColorMapper | None,
) -> None:
    line, limits = sources[f"{prefix}_line"], sources[f"{prefix}_limits"]
    points, signals = sources[f"{prefix}_points"], sources[f"{prefix}_signals"]
    flt = None if panel == "all" else plan["panels"].index(panel)
    cusum = prefix == "chart" and plan["sums"]
    series = _SUMS if cusum else _ONE
    fig.segment(
        "x0",
        "y0",
        "x1",
        "y1",
        source=line,
        view=parts.coded_view(panel_code=flt),
        line_color=palette.LINE,
        line_width=parts.LINE_WIDTH,
    )
    dots = [
        fig.scatter(
            "x",
            s.column,
            source=points,
            view=parts.coded_view(panel_code=flt),
            marker=s.marker,
            size=parts.POINT_SIZE + (2 if cusum else 0),
            color=transform("color_code", colors) if colors is not None else palette.POINT,
        )
        for s in series
    ]
    # Centre and limits above the points: on a dense chart they would vanish below them.
    parts.centre_and_limits(
        fig,
        limits,
        parts.coded_view(panel_code=flt, role_code=ROLES.index("center")),
        parts.coded_view(panel_code=flt, role_code=ROLES.index("limit")),
    )
    parts.end_values(fig, sources[f"{prefix}_limit_values"], parts.coded_view(panel_code=flt))
    for s in series:
        fig.scatter(
            "x",
            s.column,
            source=points,
            view=parts.coded_view(panel_code=flt, excluded=1),
            marker="x",
            size=parts.SIGNAL_SIZE,
            line_color=palette.LIMIT,
            line_width=2,
        )
    marks = fig.scatter(
        "x",
        "value",
        source=signals,
        view=parts.coded_view(panel_code=flt),
        size=parts.SIGNAL_SIZE,
        fill_color=None,
        line_color=palette.ACCENT,
        line_width=2,
    )
    # The rules that fired are in the signals' hover text (a signal shows both tips).
    for renderer, s in (*zip(dots, series, strict=True), (marks, None)):
        fig.add_tools(_hover(plan, sources, prefix, s, renderer))
    if prefix == "chart":
        # Box or tap selects points (not signals or lines) on the main chart: the explorer
        # shows the selected rows. Built here, with the figure: BokehJS loses a figure's
        # legend and toolbar when tools are added to it once it is on show.
        fig.add_tools(BoxSelectTool(renderers=dots), TapTool(renderers=dots))
    if plan["strata"] and panel == "all" and prefix == "chart":
        # Above the main chart only, so the chart below keeps the same x extent.
        parts.legend_above(fig, sources["chart_legend"], plan["legend_columns"])
    fig.xaxis.axis_label = (
        "Subgroup start time" if plan["x"] == "time" else "Subgroup (position in time order)"
    )
    if plan["x"] != "time":
        parts.whole_number_ticks(fig)


def _name_y_axis(fig: Any, texts: dict[str, str]) -> None:
    """Name the y axis (so that :func:`refresh` finds its label) and label it."""
    axis = fig.yaxis[0]
    axis.name = f"{fig.name}_y_axis"
    axis.axis_label = texts.get(axis.name, "")


def chart_figure(
    result: ChartResult, *, split: bool = False, x: str = "auto", highlight: Any = None
) -> LayoutDOM:
    """The control chart with its secondary chart below on a shared x axis.

    Strata are overlaid in colour (pooled limits), or split into small multiples with a
    shared y axis when ``split=True`` or the limits are per stratum. Signals are hollow
    accent-coloured markers whose hover text names the rules that fired; centre and
    limit values are written at the right end of their lines. A CUSUM chart draws the
    upper sum above zero and the lower sum below it. Above
    :data:`~qcexplore.draw.parts.WEBGL_FROM` points the figures draw through WebGL;
    above :data:`~qcexplore.draw.parts.REDUCE_FROM` points they draw a display reduction
    of the points (every signal kept), stated in the title; above
    :data:`~qcexplore.draw.parts.LINE_UP_TO` drawn points the joining line is left out.
    Model names and source columns: see the module docstring.

    Parameters
    ----------
    result : ChartResult
    split : bool
        Small multiples, one panel per stratum level, instead of one overlaid chart.
    x : {"auto", "position", "time"}
        Position 1..k of the subgroup, or its start time ("auto": time when every point
        has a start).
    highlight : optional
        The stratum level to colour when there are more than eight levels (the others
        are grey); default the first level.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> chart_figure(ChartResult("xbar_r", pts, pd.DataFrame())).name
    'chart_layout'
    """
    plan = chart_plan(result, split=split, x=x, highlight=highlight)
    data = chart_sources(result, plan)
    sources = {name: parts.source(name, cols) for name, cols in data.items()}
    colors = palette.strata_color_mapper("chart_colors") if plan["strata"] else None
    texts = chart_texts(result, plan)
    panels = plan["panels"]
    names = parts.panel_names("chart", len(panels))
    sec_names = parts.panel_names("secondary_chart", len(panels))
    width = _panel_width(plan)
    axis = {"x_axis_type": "datetime"} if plan["x"] == "time" else {}
    secondary = result.secondary
    mains, seconds = [], []
    for i, panel in enumerate(panels):
        shared = {"x_range": mains[0].x_range, "y_range": mains[0].y_range} if mains else {}
        fig = parts.new_figure(
            names[i], texts[names[i]], width=width, webgl=plan["webgl"], **axis, **shared
        )
        _name_y_axis(fig, texts)
        _draw_panel(fig, sources, "chart", panel, plan, colors)
        mains.append(fig)
        if secondary is not None:
            shared = {"y_range": seconds[0].y_range} if seconds else {}
            sec = parts.new_figure(
                sec_names[i],
                texts[sec_names[i]],
                width=width,
                height=parts.SECONDARY_HEIGHT,
                webgl=plan["webgl"],
                x_range=fig.x_range,
                **axis,
                **shared,
            )
            _name_y_axis(sec, texts)
            _draw_panel(sec, sources, "secondary", panel, plan, colors)
            seconds.append(sec)
    if len(panels) == 1:
        return column(*mains, *seconds, name="chart_layout", tags=[plan])
    grid = gridplot([mains, seconds] if seconds else [mains], toolbar_location="right")
    heading = Div(name="chart_title", text=texts["chart_title"])
    return column(heading, grid, name="chart_layout", tags=[plan])

"""The bokeh pieces every figure shares: figures, sources, views, step lines, titles.

Quiet and legible on a projector: light background, small filled circles joined by
a thin grey line, a solid centre line, dashed limits in a muted colour with their
values written at their right end, and signals as a larger hollow marker in the
accent colour (colours: :mod:`qcexplore.draw.palette`). Every figure function stores
its build plan (what changes only with a new figure) in its layout's ``tags``, where
:func:`plan_of` finds it.

Nothing here computes a statistic: the helpers only turn result columns into
positions, lines and labels.
"""

from __future__ import annotations

import textwrap
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from bokeh.core.properties import field
from bokeh.models import (
    AdaptiveTicker,
    CDSView,
    ColumnDataSource,
    CustomJSFilter,
    CustomJSHover,
    GroupFilter,
    LayoutDOM,
)
from bokeh.plotting import figure

from qcexplore.draw import palette
from qcexplore.draw.encode import value_texts
from qcexplore.errors import QCDataError

POINT_SIZE = 5
SIGNAL_SIZE = 12
LINE_WIDTH = 1.0

#: Above this many points a figure draws through WebGL.
WEBGL_FROM = 5_000
#: Above this many points the joining line is left out: at that density the points
#: read as a band, and a quarter of a million line segments would slow every redraw.
LINE_UP_TO = 20_000

#: Half-width of a point's slot at either end of a step line: half a position, or half
#: an hour on a time axis with a single point (in milliseconds).
POSITION_PAD = 0.5
TIME_PAD = 30 * 60 * 1000.0

WIDTH = 900
HEIGHT = 300
SECONDARY_HEIGHT = 180


def lookup_hover(table: ColumnDataSource, column: str) -> CustomJSHover:
    """Hover text of a code column: the text at that row of ``table[column]`` (-1: none).

    Examples
    --------
    >>> lookup_hover(source("demo_strata", {"stratum": ["A"]}), "stratum").args["column"]
    'stratum'
    """
    return CustomJSHover(
        args={"table": table, "column": column},
        code="const text = value >= 0 ? table.data[column][value] : null;\n"
        "return text == null ? '' : String(text);",
    )


def x_kind(x: str, frame: pd.DataFrame) -> str:
    """The x axis to draw: ``"position"`` (1..k in time order) or ``"time"`` (``start``).

    ``x="auto"`` takes the start times when every row of ``frame`` has one.

    Examples
    --------
    >>> x_kind("auto", pd.DataFrame({"start": pd.to_datetime(["2026-01-01"])}))
    'time'
    """
    if x not in ("auto", "position", "time"):
        raise QCDataError(f"x: {x!r} is not one of 'auto', 'position', 'time'.")
    has_time = len(frame) > 0 and "start" in frame and bool(frame["start"].notna().all())
    if x == "time" and not has_time:
        raise QCDataError(
            "x='time': not every subgroup has a 'start' time; use x='position' or give the "
            "study a time column."
        )
    return ("time" if has_time else "position") if x == "auto" else x


def boundaries(x: np.ndarray, pad: float) -> tuple[np.ndarray, np.ndarray]:
    """Left and right edge of each sorted position: halfway to its neighbours.

    The first and last edges reach half a gap beyond the end points (``pad`` when there
    is a single point), so a limit drawn over ``[left, right]`` covers each point's slot.

    Examples
    --------
    >>> boundaries(np.array([1.0, 2.0, 4.0]), 0.5)
    (array([0.5, 1.5, 3. ]), array([1.5, 3. , 5. ]))
    """
    if x.size == 0:
        return x.copy(), x.copy()
    mids = (x[1:] + x[:-1]) / 2.0
    first = x[0] - (mids[0] - x[0] if x.size > 1 else pad)
    last = x[-1] + (x[-1] - mids[-1] if x.size > 1 else pad)
    return np.concatenate([[first], mids]), np.concatenate([mids, [last]])


def wrapped_title(text: str, width: int = WIDTH) -> str:
    """Break a long title at its commas, else between words, so that it fits the figure.

    Titles say what is plotted and how the limits were computed, which can be
    longer than the figure is wide; a cut-off title loses the part that matters.
    About 8 pixels a character at the 12 pt title size, beside the toolbar.

    Examples
    --------
    >>> print(wrapped_title("Subgroup means of net_g, limits from R-bar/d2, 3 sigma", 300))
    Subgroup means of net_g,
    limits from R-bar/d2, 3 sigma
    >>> print(wrapped_title("Analysis of means: crew level means with decision limits", 300))
    Analysis of means: crew level
    means with decision limits
    """
    limit = max(30, (width - 40) // 8)
    lines: list[str] = []
    line = ""
    for part in text.split(", "):
        candidate = f"{line}, {part}" if line else part
        if line and len(candidate) > limit:
            lines.append(line + ",")
            line = part
        else:
            line = candidate
    lines.append(line)
    # Words stay whole (a long column name, "R-bar/d2"): better a little long than cut.
    words = {"break_long_words": False, "break_on_hyphens": False}
    return "\n".join(
        piece for line in lines for piece in textwrap.wrap(line, limit, **words) or [line]
    )


def new_figure(
    name: str,
    title: str,
    *,
    width: int = WIDTH,
    height: int = HEIGHT,
    webgl: bool = False,
    **kwargs: Any,
) -> figure:
    """A figure in our style: light background, light grid, a few plain tools.

    Examples
    --------
    >>> new_figure("demo", "A title").name
    'demo'
    """
    fig = figure(
        name=name,
        title=wrapped_title(title, width),
        width=width,
        height=height,
        output_backend="webgl" if webgl else "canvas",
        tools="pan,box_zoom,wheel_zoom,reset,save",
        toolbar_location="right",
        background_fill_color=palette.BACKGROUND,
        border_fill_color=palette.BACKGROUND,
        **kwargs,
    )
    fig.title.text_font_size = "12pt"
    fig.title.text_font_style = "normal"
    fig.xgrid.grid_line_color = palette.GRID
    fig.ygrid.grid_line_color = palette.GRID
    fig.outline_line_color = None
    fig.axis.axis_label_text_font_style = "normal"
    fig.axis.minor_tick_line_color = None
    return fig


def centre_and_limits(
    fig: figure, source: ColumnDataSource, centre: CDSView, limits: CDSView
) -> None:
    """Draw the centre line solid and the limits dashed, from one segments source.

    ``centre`` and ``limits`` pick each one's rows of ``source`` (columns ``x0, y0,
    x1, y1``). Drawn after the points, so that a dense chart cannot hide them.

    Examples
    --------
    >>> fig = new_figure("demo", "A title")
    >>> src = source("demo_limits", {"x0": [0.0], "y0": [1.0], "x1": [1.0], "y1": [1.0]})
    >>> centre_and_limits(fig, src, CDSView(), CDSView())
    >>> [r.glyph.line_dash for r in fig.renderers]
    ['solid', 'dashed']
    """
    for view_, colour, dash in (
        (centre, palette.CENTER, "solid"),
        (limits, palette.LIMIT, "dashed"),
    ):
        fig.segment(
            "x0",
            "y0",
            "x1",
            "y1",
            source=source,
            view=view_,
            line_color=colour,
            line_width=1.5,
            line_dash=dash,
        )


def whole_number_ticks(fig: figure) -> None:
    """Ticks on whole numbers only (subgroup positions, lags).

    Examples
    --------
    >>> fig = new_figure("demo", "A title"); whole_number_ticks(fig)
    """
    fig.xaxis.ticker = AdaptiveTicker(min_interval=1, mantissas=[1, 2, 5], num_minor_ticks=0)


def source(name: str, data: Mapping[str, Any]) -> ColumnDataSource:
    """A named ColumnDataSource (the names are what :func:`refresh` looks up).

    Examples
    --------
    >>> source("demo_points", {"x": [1]}).name
    'demo_points'
    """
    return ColumnDataSource(data=dict(data), name=name)


def panel_names(base: str, count: int) -> list[str]:
    """Figure names of a layout's panels: ``base`` alone, else ``base_0``, ``base_1``, ...

    Examples
    --------
    >>> panel_names("chart", 1), panel_names("chart", 2)
    (['chart'], ['chart_0', 'chart_1'])
    """
    return [base] if count == 1 else [f"{base}_{i}" for i in range(count)]


def fixed_plan(name: str) -> Callable[[Any], dict[str, Any]]:
    """The plan function of a layout that nothing in the data changes (a refresh always fits).

    Examples
    --------
    >>> fixed_plan("acf")(None)
    {'figure': 'acf', 'options': {}}
    """

    def plan(result: Any) -> dict[str, Any]:
        return {"figure": name, "options": {}}

    plan.__doc__ = f"Build plan of the {name} layout (nothing in it depends on the data)."
    return plan


def plan_of(layout: LayoutDOM) -> dict[str, Any] | None:
    """The build plan a figure function stored in its layout's ``tags``.

    Examples
    --------
    >>> from bokeh.layouts import column
    >>> plan_of(column(name="x", tags=[{"figure": "chart"}]))
    {'figure': 'chart'}
    """
    for tag in layout.tags:
        if isinstance(tag, dict) and "figure" in tag:
            return tag
    return None


def line_rows(size: int) -> np.ndarray:
    """Rows joined by the thin line: all of them, or none above :data:`LINE_UP_TO`.

    Examples
    --------
    >>> line_rows(3).tolist(), line_rows(LINE_UP_TO + 1).size
    ([0, 1, 2], 0)
    """
    return np.arange(size if size <= LINE_UP_TO else 0)


#: Above this many points a chart sends a display reduction of them (:func:`display_rows`):
#: a figure about :data:`WIDTH` pixels wide cannot show more, and every point sent
#: costs page size and redraw time.
REDUCE_FROM = 5_000


def _extremes(key: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Rows of the lowest and the highest of ``values`` for each distinct ``key`` (codes
    0..m-1; the first such row of each; missing values never count)."""
    missing = np.isnan(values)
    found = []
    for fill, extreme in ((np.inf, np.minimum), (-np.inf, np.maximum)):
        ranked = np.where(missing, fill, values)
        best = np.full(int(key.max()) + 1, fill)
        extreme.at(best, key, ranked)
        at = np.flatnonzero((ranked == best[key]) & ~missing)
        found.append(at[np.unique(key[at], return_index=True)[1]])
    return np.concatenate(found)


def display_rows(
    x: np.ndarray,
    series: Sequence[np.ndarray],
    keep: np.ndarray,
    group: np.ndarray,
    columns: int = WIDTH,
) -> np.ndarray:
    """Rows that draw a long series: in each of ``columns`` equal slices of the x range
    (the pixel columns of the figure) and each ``group``, the rows of the lowest and the
    highest value of each of ``series``; the first and the last row (by x) of each group;
    and every row where ``keep`` is true (the signals). Sorted row numbers.

    Missing values are never a lowest or highest one; rows whose x is missing are left out
    unless kept.

    Examples
    --------
    >>> x = np.arange(8.0); y = np.array([5.0, 1.0, 7.0, 3.0, 2.0, 9.0, 4.0, 4.0])
    >>> display_rows(x, [y], x == 3, np.zeros(8), columns=2).tolist()
    [0, 1, 2, 3, 4, 5, 7]
    """
    x = np.asarray(x, dtype=float)
    kept = [np.flatnonzero(keep)]
    finite = np.flatnonzero(np.isfinite(x))
    if finite.size:
        xs = x[finite]
        low, high = xs.min(), xs.max()
        # Divide first: columns / (high - low) overflows for spans near the smallest double.
        share = (xs - low) / (high - low) if high > low else np.zeros_like(xs)
        column = np.clip((share * columns).astype(np.int64), 0, columns - 1)
        codes = pd.factorize(np.asarray(group)[finite])[0].astype(np.int64)
        kept.append(finite[_extremes(codes, xs)])
        key = codes * columns + column
        kept += [finite[_extremes(key, np.asarray(v, dtype=float)[finite])] for v in series]
    return np.unique(np.concatenate(kept))


def segments(
    x: np.ndarray, y: np.ndarray, group: np.ndarray, panel: np.ndarray | None = None
) -> dict[str, np.ndarray]:
    """Segments joining consecutive points (in x order) that belong to the same group.

    Drawn with a segment glyph rather than a line so that panels can share one source
    through a filter (bokeh does not filter connected glyphs). The ``panel`` column of
    the result is each segment's ``panel`` label (default: its group).

    Examples
    --------
    >>> s = segments(np.array([2.0, 1.0, 3.0]), np.array([5.0, 4.0, 6.0]),
    ...              np.array(["a", "a", "b"], dtype=object))
    >>> s["x0"].tolist(), s["x1"].tolist(), s["panel"].tolist()
    ([1.0], [2.0], ['a'])
    """
    codes = pd.factorize(group)[0]
    order = np.lexsort((x, codes))
    xs, ys, gs = x[order], y[order], codes[order]
    same = gs[1:] == gs[:-1]
    labels = (group if panel is None else panel)[order]
    return {
        "x0": xs[:-1][same],
        "y0": ys[:-1][same],
        "x1": xs[1:][same],
        "y1": ys[1:][same],
        "panel": labels[:-1][same],
    }


def _changed(a: np.ndarray) -> np.ndarray:
    """Where a value differs from the one before (two NaNs count as equal)."""
    return ~((a[1:] == a[:-1]) | (np.isnan(a[1:]) & np.isnan(a[:-1])))


def increasing(x: np.ndarray) -> bool:
    """Whether positions strictly increase: in time order, and no two at one position.

    Examples
    --------
    >>> increasing(np.array([1.0, 2.0, 5.0])), increasing(np.array([1.0, 1.0]))
    (True, False)
    """
    return bool(np.all(x[1:] > x[:-1]))


def steps(x: np.ndarray, lines: Mapping[str, np.ndarray], pad: float) -> dict[str, np.ndarray]:
    """Centre and limit lines as steps: one piece per run of equal values, plus risers.

    ``lines`` maps ``"center"`` and any limit names to one value per point. On each line,
    each run of points with equal values becomes one horizontal piece,
    reaching from its first point's left edge to its last point's right edge (see
    :func:`boundaries`); consecutive runs are joined by vertical risers. Returns the
    columns ``x0, y0, x1, y1, role`` (``"center"`` or ``"limit"``).

    Examples
    --------
    >>> s = steps(np.array([1.0, 2.0, 3.0]), {"center": np.array([0.0, 0.0, 1.0])}, 0.5)
    >>> s["x0"].tolist(), s["x1"].tolist(), s["y0"].tolist(), s["y1"].tolist()
    ([0.5, 2.5, 2.5], [2.5, 3.5, 2.5], [0.0, 1.0, 0.0], [0.0, 1.0, 1.0])
    """
    # Positions in time order are usually increasing already: no need to sort them.
    xu, first = (x, np.arange(x.size)) if increasing(x) else np.unique(x, return_index=True)
    left, right = boundaries(xu, pad)
    parts = []
    for key, column in lines.items():
        v = np.asarray(column, dtype=float)[first]
        starts = np.flatnonzero(np.concatenate([[True], _changed(v)]))[: xu.size]
        ends = np.concatenate([starts[1:] - 1, [xu.size - 1]])[: starts.size]
        level = v[starts]
        role = "center" if key == "center" else "limit"
        parts.append(
            {"x0": left[starts], "y0": level, "x1": right[ends], "y1": level, "role": role}
        )
        rise = left[starts][1:]
        parts.append({"x0": rise, "y0": level[:-1], "x1": rise, "y1": level[1:], "role": role})
    for part in parts:
        part["role"] = np.full(part["x0"].size, part["role"], dtype=object)
    return concat(parts, ("x0", "y0", "x1", "y1", "role"))


def line_ends(x: np.ndarray, lines: Mapping[str, np.ndarray], pad: float) -> dict:
    """Where each line's value is written: at its right end, the value as text.

    One row per line of ``lines`` (as in :func:`steps`): ``x`` the right edge of the
    last point, ``y`` the line's value there, ``text`` that value to the precision
    that the spread of the lines calls for (:func:`~qcexplore.draw.encode.value_texts`),
    and ``anchor``, the text baseline: the lowest line's value is written below it, the
    others above theirs, so that close lines do not stack their values.

    Examples
    --------
    >>> ends = line_ends(np.array([1.0, 2.0]), {"center": np.array([10.0, 10.0]),
    ...                  "ucl": np.array([13.0, 13.5])}, 0.5)
    >>> ends["x"].tolist(), ends["y"].tolist(), ends["text"].tolist(), ends["anchor"].tolist()
    ([2.5, 2.5], [10.0, 13.5], ['10.00', '13.50'], ['top', 'bottom'])
    """
    columns = ("x", "y", "text", "anchor")
    if x.size == 0:
        return {c: np.array([], dtype=float if c in "xy" else object) for c in columns}
    last = int(np.argmax(x))  # the first point at the greatest x, as steps() takes it
    y = np.array([np.asarray(v, dtype=float)[last] for v in lines.values()])
    # The last right edge of boundaries(), without sorting every position.
    top, before = x[last], x[x < x[last]]
    right = top + (top - (top + before.max()) / 2.0 if before.size else pad)
    finite = np.isfinite(y)
    span = float(np.max(y[finite]) - np.min(y[finite])) if finite.any() else np.nan
    anchor = np.full(y.size, "bottom", dtype=object)
    if y.size > 1 and finite.any():
        anchor[np.nanargmin(y)] = "top"
    return {"x": np.full(y.size, right), "y": y, "text": value_texts(y, span), "anchor": anchor}


def write(fig: figure, source: ColumnDataSource, view_: CDSView | None = None, **at: Any) -> None:
    """Text from ``source`` in the style of every label on a figure (10 pt, dark grey).

    ``at`` names the columns (``x``, ``y``, ``text``) and the placement.

    Examples
    --------
    >>> fig = new_figure("demo", "A title")
    >>> write(fig, source("demo_labels", {"x": [1.0], "y": [2.0], "t": ["2"]}), x="x", y="y",
    ...       text="t")
    >>> fig.renderers[0].glyph.text_font_size
    '10pt'
    """
    fig.text(
        source=source,
        view=view_ or CDSView(),
        text_font_size="10pt",
        text_color=palette.CENTER,
        **at,
    )


def end_values(fig: figure, source: ColumnDataSource, view_: CDSView) -> None:
    """Write the values of :func:`line_ends` just above each line's right end, on a light
    background so that the points behind them do not blur them.

    Examples
    --------
    >>> fig = new_figure("demo", "A title")
    >>> end_values(fig, source("demo_values", {"x": [1.0], "y": [2.0], "text": ["2"],
    ...                                        "anchor": ["bottom"]}), CDSView())
    >>> fig.renderers[0].glyph.text_align
    'right'
    """
    write(
        fig,
        source,
        view_,
        x="x",
        y="y",
        text="text",
        text_align="right",
        text_baseline=field("anchor"),
        x_offset=-3,
        background_fill_color=palette.BACKGROUND,
        background_fill_alpha=0.7,
    )


def legend_columns(labels: Sequence[str], width: int = WIDTH) -> int:
    """How many legend entries fit side by side across ``width`` pixels.

    About 8 pixels a character at the legend's 13 px text, plus the marker and the
    gaps; at least one entry a row, so a long label wraps the legend into more rows
    instead of running off the figure.

    Examples
    --------
    >>> legend_columns(["A", "B", "C"]), legend_columns(["a long name of a level" * 3], 600)
    (8, 1)
    """
    longest = max((len(str(label)) for label in labels), default=1)
    entry = 40 + 8 * longest
    return int(max(1, min(palette.COLOURED, (width - 60) // entry)))


def legend_above(fig: figure, source: ColumnDataSource, columns: int) -> None:
    """A legend above the figure with one entry per row of ``source`` (``label, color``).

    The entries come from a small source whose positions ``x, value`` are NaN, so
    nothing is drawn and the page groups a handful of rows, not every point.

    Examples
    --------
    >>> fig = new_figure("demo", "A title")
    >>> legend_above(fig, source("demo_legend", {"label": ["A"], "color": ["#000000"],
    ...              "x": [np.nan], "value": [np.nan]}), 8)
    >>> fig.above[-1].ncols
    8
    """
    fig.scatter(
        "x", "value", source=source, color="color", size=POINT_SIZE + 3, legend_field="label"
    )
    legend = fig.legend[0]
    legend.orientation = "horizontal"
    legend.ncols = columns
    legend.border_line_color = None
    fig.add_layout(legend, "above")


def concat(parts: Sequence[Mapping[str, np.ndarray]], columns: Sequence[str]) -> dict:
    """Stack the columns of several source pieces (empty float columns when none).

    Examples
    --------
    >>> concat([{"a": np.array([1])}, {"a": np.array([2])}], ["a"])["a"].tolist()
    [1, 2]
    """
    return {
        c: np.concatenate([p[c] for p in parts]) if parts else np.array([], dtype=float)
        for c in columns
    }


def view(panel: str | None = None, role: str | None = None) -> CDSView:
    """The rows of a shared source that one renderer draws: its panel and/or role.

    ``None`` means no filter on that column (a layout with a single panel).

    Examples
    --------
    >>> view().filter.__class__.__name__, view("A", "center").filter.__class__.__name__
    ('AllIndices', 'IntersectionFilter')
    """
    filters = [
        GroupFilter(column_name=c, group=g)
        for c, g in (("panel", panel), ("role", role))
        if g is not None
    ]
    if not filters:
        return CDSView()
    combined = filters[0]
    for extra in filters[1:]:
        combined = combined & extra
    return CDSView(filter=combined)


def coded_view(**codes: int | None) -> CDSView:
    """The rows of a shared source whose number columns hold the given codes.

    The number twin of :func:`view` (bokeh's GroupFilter compares texts only), for
    sources that carry codes instead of texts (see :mod:`qcexplore.draw.charts`).
    ``None`` means no condition on that column.

    Examples
    --------
    >>> coded_view(panel_code=1, role_code=None).filter.args["columns"]
    ['panel_code']
    >>> coded_view().filter.__class__.__name__
    'AllIndices'
    """
    wanted = {c: v for c, v in codes.items() if v is not None}
    if not wanted:
        return CDSView()
    return CDSView(
        filter=CustomJSFilter(
            args={"columns": list(wanted), "codes": list(wanted.values())},
            code="""
const n = source.get_length() ?? 0;
const keep = new Array(n).fill(true);
columns.forEach((name, j) => {
  const column = source.data[name];
  for (let i = 0; i < n; i++) if (column[i] != codes[j]) keep[i] = false;
});
return keep;
""",
        )
    )

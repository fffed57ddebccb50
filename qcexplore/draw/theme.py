"""Our visual language: colours, sizes and the few helpers every figure shares.

Quiet and legible on a projector: light background, small filled circles joined
by a thin grey line, a solid centre line, dashed limits in a muted colour and
signals as a larger hollow marker in one accent colour. Strata take their colour
from the Okabe-Ito colour-blind-safe set (Okabe and Ito, "Color Universal
Design", 2008), in a fixed order, so the same level keeps its colour on every
panel that is given the same ordered levels.

Nothing here computes a statistic: the helpers only turn result columns into
positions, colours and labels.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from bokeh.models import (
    AdaptiveTicker,
    CDSView,
    ColumnDataSource,
    CustomJSFilter,
    CustomJSHover,
    GroupFilter,
    LayoutDOM,
    LinearColorMapper,
)
from bokeh.plotting import figure

from qcexplore.errors import QCDataError
from qcexplore.stats.rules import RULE_TEXT

#: Strata colours: the Okabe-Ito set without its vermillion (kept for signals), with the
#: yellow last because it is the weakest on a light background.
STRATA_COLORS: tuple[str, ...] = (
    "#0072B2",  # blue
    "#E69F00",  # orange
    "#009E73",  # bluish green
    "#CC79A7",  # reddish purple
    "#56B4E9",  # sky blue
    "#000000",  # black
    "#F0E442",  # yellow
)
ACCENT = "#D55E00"  # Okabe-Ito vermillion: signals and detected steps only
# Values when there are no strata, and bars and curves that are not a level of a factor:
# a palette colour there would read as that level (the first crew, the first nozzle).
POINT = "#3b3b3b"
LINE = "#b0b0b0"  # thin joining line
CENTER = "#3b3b3b"
LIMIT = "#8a8a8a"
BAND = "#d9d9d9"
BACKGROUND = "#ffffff"
GRID = "#ececec"

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


def palette_for(levels: Iterable[Any]) -> dict[Any, str]:
    """Colour of each stratum level, in the order given.

    The i-th distinct level gets the i-th colour of :data:`STRATA_COLORS`, so the same
    ordered list of levels always gives the same colours. With more levels than colours
    the colours repeat (the panel titles and hover text still name each level).

    Parameters
    ----------
    levels : iterable
        The levels in their display order (for a pandas Categorical, its categories).

    Returns
    -------
    dict
        ``{level: "#rrggbb"}``.

    Examples
    --------
    >>> palette_for(["crew A", "crew B"])
    {'crew A': '#0072B2', 'crew B': '#E69F00'}
    """
    out: dict[Any, str] = {}
    for level in levels:
        if level not in out:
            out[level] = STRATA_COLORS[len(out) % len(STRATA_COLORS)]
    return out


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


def colors_for(column: Sequence[Any], levels: Sequence[Any]) -> np.ndarray:
    """One colour per row: its level's colour, or :data:`POINT` where it is not a level.

    Examples
    --------
    >>> colors_for(["b", None], ["a", "b"]).tolist()
    ['#E69F00', '#3b3b3b']
    """
    palette = palette_for(levels)
    codes = pd.Index(list(palette), dtype=object).get_indexer(np.asarray(column, dtype=object))
    colours = np.array([*palette.values(), POINT], dtype=object)
    return colours[np.where(codes >= 0, codes, len(palette))]


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


def color_codes(codes: np.ndarray) -> np.ndarray:
    """Index into :data:`STRATA_COLORS` of each level code (the colours repeat as in
    :func:`palette_for`); -1 (no level) stays -1 and is drawn in :data:`POINT` by
    :func:`strata_color_mapper`.

    Examples
    --------
    >>> color_codes(np.array([0, 8, -1])).tolist()
    [0, 1, -1]
    """
    return np.where(codes >= 0, codes % len(STRATA_COLORS), -1).astype(np.int32)


def strata_color_mapper(name: str) -> LinearColorMapper:
    """Colour of a ``color_code`` column: code i is ``STRATA_COLORS[i]``, -1 is :data:`POINT`.

    The palette is fixed, so re-colouring for another split factor changes only the
    codes in the data.

    Examples
    --------
    >>> m = strata_color_mapper("demo_colors"); m.palette[0] == STRATA_COLORS[0]
    True
    """
    # Edges half a code beyond each end: every whole code falls in the middle of its bin.
    return LinearColorMapper(
        name=name,
        palette=list(STRATA_COLORS),
        low=-0.5,
        high=len(STRATA_COLORS) - 0.5,
        low_color=POINT,
        high_color=POINT,
        nan_color=POINT,
    )


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
    """Break a long title at its commas so that it fits the figure on a projector.

    Titles say what is plotted and how the limits were computed, which can be
    longer than the figure is wide; a cut-off title loses the part that matters.
    About 8 pixels a character at the 12 pt title size.

    Examples
    --------
    >>> print(wrapped_title("Subgroup means of net_g, limits from R-bar/d2, 3 sigma", 300))
    Subgroup means of net_g,
    limits from R-bar/d2, 3 sigma
    """
    limit = max(30, width // 8)
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
    return "\n".join(lines)


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
        background_fill_color=BACKGROUND,
        border_fill_color=BACKGROUND,
        **kwargs,
    )
    fig.title.text_font_size = "12pt"
    fig.title.text_font_style = "normal"
    fig.xgrid.grid_line_color = GRID
    fig.ygrid.grid_line_color = GRID
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
    for view_, colour, dash in ((centre, CENTER, "solid"), (limits, LIMIT, "dashed")):
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


def spec_of(layout: LayoutDOM) -> dict[str, Any] | None:
    """The build description a figure function stored in its layout's ``tags``.

    Examples
    --------
    >>> from bokeh.layouts import column
    >>> spec_of(column(name="x", tags=[{"figure": "chart"}]))
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


def steps(
    x: np.ndarray, lines: Mapping[str, np.ndarray], pad: float, panel: str = "all"
) -> dict[str, np.ndarray]:
    """Centre and limit lines as steps: one piece per run of equal values, plus risers.

    ``lines`` maps ``"center"`` and any limit names to one value per point. On each line,
    each run of points with equal values becomes one horizontal piece,
    reaching from its first point's left edge to its last point's right edge (see
    :func:`boundaries`); consecutive runs are joined by vertical risers. Returns the
    columns ``x0, y0, x1, y1, role`` (``"center"`` or ``"limit"``) and ``panel``.

    Examples
    --------
    >>> s = steps(np.array([1.0, 2.0, 3.0]), {"center": np.array([0.0, 0.0, 1.0])}, 0.5)
    >>> s["x0"].tolist(), s["x1"].tolist(), s["y0"].tolist(), s["y1"].tolist()
    ([0.5, 2.5, 2.5], [2.5, 3.5, 2.5], [0.0, 1.0, 0.0], [0.0, 1.0, 1.0])
    """
    xu, first = np.unique(x, return_index=True)
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
        part["panel"] = np.full(part["x0"].size, panel, dtype=object)
    return concat(parts, ("x0", "y0", "x1", "y1", "role", "panel"))


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

"""Figures of the sources of variation: multi-vari chart, analysis of means, components.

Names (layout / figures / sources and their columns):

- :func:`multivari_figure`: ``"multivari_layout"``; one panel per factor, named
  ``"multivari"`` (one factor) or ``"multivari_0"``, ``"multivari_1"``, ...;
  ``"multivari_points"`` (``x, value, subgroup, factor, level, n, color`` + ``panel``
  with several factors), ``"multivari_line"`` (``x0, y0, x1, y1`` + ``panel``) and
  one legend source per panel, ``"multivari_legend"`` or ``"multivari_legend_0"``, ...
  (``label, color, x, value``: each level, or the highlighted level and "others").
  Within each subgroup the level means sit side by side (in level order, the x offset
  is only for legibility) and are joined by a thin line. The result's rows of the
  subgroup means (``factor == "subgroup"``) are not drawn.
- :func:`anom_figure`: ``"anom_layout"``, figure ``"anom"``; ``"anom_points"``
  (``x, value, level, lower, upper, p, color``), ``"anom_signals"`` (the levels that
  the result's ``signal`` column marks: their mean lies outside its decision limits),
  ``"anom_limits"`` (``x0, y0, x1, y1, role``: decision limits dashed, their
  midpoint solid) and ``"anom_limit_values"`` (``x, y, text, anchor``: the values
  written at the right end of those lines). Levels sit at x = 1..L.
- :func:`components_figure`: ``"components_layout"``, figure ``"components"``;
  ``"components_bars"`` (``source, share, variance, sd, label, color``).

Levels are coloured as on every other panel (:mod:`qcexplore.draw.palette`): beyond
eight levels, the ``highlight`` level is coloured and the others are grey.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
from bokeh.layouts import column
from bokeh.models import FixedTicker, HoverTool, LayoutDOM, NumeralTickFormatter

from qcexplore.draw import encode, palette, parts
from qcexplore.errors import QCDataError
from qcexplore.stats.results import VariationResult

_DODGE = 0.6  # width of a subgroup's slot taken by its level means
#: The ``factor`` of the multi-vari rows that hold the subgroup means (not drawn).
SUBGROUP_MEANS = "subgroup"


def _factor_levels(frame: pd.DataFrame) -> list[str]:
    present = set(frame["level"].dropna().astype(str))
    return [str(v) for v in encode.levels_of(frame["level"]) if str(v) in present]


def _level_means(result: VariationResult) -> pd.DataFrame:
    # The rows with factor "subgroup" hold the subgroup means (see
    # stats.variation.multivari_table), not a factor's levels: a panel of them would
    # colour hundreds of subgroups with a repeating palette.
    mv = result.multivari
    return mv[encode.labels(mv["factor"]) != SUBGROUP_MEANS].reset_index(drop=True)


def _legend_data(levels: list[str], highlight: Any) -> dict[str, np.ndarray]:
    labels, colours = palette.legend_entries(levels, levels, highlight)
    return {
        "label": np.array(labels, dtype=object),
        "color": np.array(colours, dtype=object),
        "x": np.full(len(labels), np.nan),
        "value": np.full(len(labels), np.nan),
    }


def multivari_plan(
    result: VariationResult, *, highlight: Mapping[str, Any] | None = None
) -> dict[str, Any]:
    """Build plan of the multi-vari layout (a new figure when it changes).

    Raises
    ------
    QCDataError
        Without level means, or when ``highlight`` names a factor or level not shown.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> mv = pd.DataFrame({"subgroup": [1, 1], "factor": "crew", "level": ["A", "B"],
    ...                    "mean": [1.0, 2.0], "n": 3})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), multivari=mv)
    >>> multivari_plan(r)["panels"]
    ['crew']
    """
    mv = _level_means(result)
    if mv.empty:
        raise QCDataError(
            "multivari: the result holds no level means; ask for "
            "variation(...) with at least one factor."
        )
    factors = [str(f) for f in pd.unique(mv["factor"])]
    chosen = {str(f): str(level) for f, level in (highlight or {}).items()}
    unknown = sorted(set(chosen) - set(factors))
    if unknown:
        raise QCDataError(
            f"highlight: factor(s) {unknown} have no panel here; use one of {factors}."
        )
    factor = encode.labels(mv["factor"])
    columns = []
    for name in factors:
        levels = _factor_levels(mv[factor == name])
        labels = palette.legend_entries(levels, levels, chosen.get(name))[0]
        columns.append(parts.legend_columns(labels))
    return {
        "figure": "multivari",
        "options": {"highlight": chosen or None},
        "panels": factors,
        "legend_columns": columns,
        "webgl": len(mv) > parts.WEBGL_FROM,
    }


def multivari_sources(result: VariationResult, plan: dict[str, Any]) -> dict[str, dict]:
    """Column data of the multi-vari layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> mv = pd.DataFrame({"subgroup": [1, 1], "factor": "crew", "level": ["A", "B"],
    ...                    "mean": [1.0, 2.0], "n": 3})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), multivari=mv)
    >>> multivari_sources(r, multivari_plan(r))["multivari_points"]["x"].tolist()
    [0.85, 1.15]
    """
    mv = _level_means(result)
    sub = mv["subgroup"]
    position = (
        sub.cat.codes.to_numpy()
        if isinstance(sub.dtype, pd.CategoricalDtype)
        else pd.factorize(sub)[0]
    ).astype(float) + 1.0
    x = np.empty(len(mv))
    color = np.empty(len(mv), dtype=object)
    factor = encode.labels(mv["factor"])
    level = encode.labels(mv["level"])
    chosen = plan["options"]["highlight"] or {}
    panels = plan["panels"]
    out: dict[str, dict] = {}
    for name, legend in zip(
        panels, parts.panel_names("multivari_legend", len(panels)), strict=True
    ):
        rows = factor == name
        levels = _factor_levels(mv[rows])
        index = pd.Index(levels).get_indexer(level[rows])
        count = len(levels)
        x[rows] = position[rows] + (index - (count - 1) / 2.0) * _DODGE / max(count, 1)
        color[rows] = palette.colors_for(level[rows], levels, chosen.get(name))
        out[legend] = _legend_data(levels, chosen.get(name))
    panel = factor if len(panels) > 1 else np.full(len(mv), "all", dtype=object)
    y = mv["mean"].to_numpy(dtype=float)
    points = {
        "x": x,
        "value": y,
        "subgroup": encode.labels(sub),
        "factor": factor,
        "level": level,
        "n": mv["n"].to_numpy(),
        "color": color,
        "panel": panel,
    }
    # One group per (factor, subgroup): the level means of a subgroup are joined.
    group = pd.factorize(factor)[0] * (position.max(initial=0.0) + 1.0) + position
    keep = parts.line_rows(len(mv))
    line = parts.segments(x[keep], y[keep], group[keep], panel[keep])
    if len(panels) == 1:
        points.pop("panel")
        line.pop("panel")
    return {"multivari_points": points, "multivari_line": line, **out}


def multivari_texts(result: VariationResult, plan: dict[str, Any]) -> dict[str, str]:
    """Titles of the multi-vari panels by figure name.

    Examples
    --------
    >>> multivari_texts(None, {"panels": ["crew"]})
    {'multivari': 'Mean of each crew level within each subgroup (multi-vari chart)'}
    """
    names = parts.panel_names("multivari", len(plan["panels"]))
    return {
        name: f"Mean of each {factor} level within each subgroup (multi-vari chart)"
        for name, factor in zip(names, plan["panels"], strict=True)
    }


def multivari_figure(
    result: VariationResult, *, highlight: Mapping[str, Any] | None = None
) -> LayoutDOM:
    """Multi-vari chart: each factor's level means within each subgroup, over time.

    One panel per factor, stacked, sharing both axes, each with its legend above; a
    level keeps its colour (:func:`~qcexplore.draw.palette.palette_for` of the factor's
    levels in order).

    Parameters
    ----------
    result : VariationResult
    highlight : mapping, optional
        ``{factor: level}``: the level to colour in the panel of a factor with more
        than eight levels (the others are grey); default each factor's first level.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> mv = pd.DataFrame({"subgroup": [1, 1], "factor": "crew", "level": ["A", "B"],
    ...                    "mean": [1.0, 2.0], "n": 3})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), multivari=mv)
    >>> multivari_figure(r).select_one({"name": "multivari"}) is not None
    True
    """
    plan = multivari_plan(result, highlight=highlight)
    data = multivari_sources(result, plan)
    sources = {name: parts.source(name, cols) for name, cols in data.items()}
    texts = multivari_texts(result, plan)
    panels = plan["panels"]
    figs = []
    height = parts.HEIGHT if len(panels) == 1 else max(200, 2 * parts.HEIGHT // len(panels))
    names = zip(
        parts.panel_names("multivari", len(panels)),
        parts.panel_names("multivari_legend", len(panels)),
        panels,
        plan["legend_columns"],
        strict=True,
    )
    for name, legend, panel, columns in names:
        shared = {"x_range": figs[0].x_range, "y_range": figs[0].y_range} if figs else {}
        fig = parts.new_figure(name, texts[name], height=height, webgl=plan["webgl"], **shared)
        fig.segment(
            "x0",
            "y0",
            "x1",
            "y1",
            source=sources["multivari_line"],
            view=parts.view(panel if len(panels) > 1 else None),
            line_color=palette.LINE,
            line_width=parts.LINE_WIDTH,
        )
        dots = fig.scatter(
            "x",
            "value",
            source=sources["multivari_points"],
            view=parts.view(panel if len(panels) > 1 else None),
            size=parts.POINT_SIZE + 2,
            color="color",
            line_color="color",
        )
        fig.add_tools(
            HoverTool(
                renderers=[dots],
                tooltips=[
                    ("subgroup", "@subgroup"),
                    ("factor", "@factor"),
                    ("level", "@level"),
                    ("n", "@n"),
                    ("mean", "@value{0,0.[0000]}"),
                ],
            )
        )
        parts.legend_above(fig, sources[legend], columns)
        fig.xaxis.axis_label = "Subgroup (position in time order)"
        fig.yaxis.axis_label = "Level mean"
        parts.whole_number_ticks(fig)
        figs.append(fig)
    return column(*figs, name="multivari_layout", tags=[plan])


def _anom_rows(result: VariationResult, factor: str) -> pd.DataFrame:
    table = result.comparisons.get(factor)
    if table is None or not (table["test"] == "anom").any():
        known = [f for f, t in result.comparisons.items() if (t["test"] == "anom").any()]
        raise QCDataError(
            f"factor: no analysis of means for {factor!r} in the result; "
            f"factors with one: {known or 'none'}."
        )
    if "signal" not in table:
        raise QCDataError(
            f"result: the comparisons of {factor!r} have no 'signal' column (which levels lie "
            "outside their decision limits); compute them with variation(...)."
        )
    return table[table["test"] == "anom"].reset_index(drop=True)


def anom_plan(result: VariationResult, *, factor: str, highlight: Any = None) -> dict[str, Any]:
    """Build plan of the ANOM layout: the factor and its levels on the x axis.

    Raises
    ------
    QCDataError
        When the result has no analysis of means of ``factor``, or ``highlight`` is not
        one of its levels.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> cmp = pd.DataFrame({"test": "anom", "level": ["A", "B"], "versus": "overall",
    ...     "estimate": [1.0, 2.0], "statistic": 0.0, "p": 0.5, "lower": 0.5, "upper": 2.5,
    ...     "signal": False})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), {"crew": cmp})
    >>> anom_plan(r, factor="crew")["levels"]
    ['A', 'B']
    """
    rows = _anom_rows(result, factor)
    levels = [str(v) for v in encode.labels(rows["level"])]
    chosen = None if highlight is None else str(highlight)
    palette.highlight_index(levels, chosen)
    return {
        "figure": "anom",
        "options": {"factor": factor, "highlight": chosen},
        "levels": levels,
    }


def anom_sources(result: VariationResult, plan: dict[str, Any]) -> dict[str, dict]:
    """Column data of the ANOM layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> cmp = pd.DataFrame({"test": "anom", "level": ["A", "B"], "versus": "overall",
    ...     "estimate": [1.0, 3.0], "statistic": 0.0, "p": 0.5, "lower": 0.5, "upper": 2.5,
    ...     "signal": [False, True]})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), {"crew": cmp})
    >>> anom_sources(r, anom_plan(r, factor="crew"))["anom_signals"]["level"].tolist()
    ['B']
    """
    rows = _anom_rows(result, plan["options"]["factor"])
    levels = plan["levels"]
    x = np.arange(1, len(rows) + 1, dtype=float)
    lower = rows["lower"].to_numpy(dtype=float)
    upper = rows["upper"].to_numpy(dtype=float)
    points = {
        "x": x,
        "value": rows["estimate"].to_numpy(dtype=float),
        "level": np.array(levels, dtype=object),
        "lower": lower,
        "upper": upper,
        "p": rows["p"].to_numpy(dtype=float),
        "color": palette.colors_for(levels, levels, plan["options"]["highlight"]),
    }
    signal = rows["signal"].to_numpy(dtype=bool)
    # The solid line between the decision limits marks where they are centred.
    lines = {"center": (lower + upper) / 2.0, "lower": lower, "upper": upper}
    return {
        "anom_points": points,
        "anom_signals": {k: v[signal] for k, v in points.items()},
        "anom_limits": parts.steps(x, lines, parts.POSITION_PAD),
        "anom_limit_values": parts.line_ends(x, lines, parts.POSITION_PAD),
    }


def anom_texts(result: VariationResult, plan: dict[str, Any]) -> dict[str, str]:
    """Title of the ANOM figure.

    Examples
    --------
    >>> anom_texts(None, {"options": {"factor": "crew"}})["anom"][:24]
    'Analysis of means: crew '
    """
    factor = plan["options"]["factor"]
    return {
        "anom": f"Analysis of means: {factor} level means with decision limits "
        "around the overall mean"
    }


def anom_figure(result: VariationResult, factor: str, *, highlight: Any = None) -> LayoutDOM:
    """Analysis of means: each level's mean with its decision limits.

    A level that the result marks as a signal (``signal`` in ``comparisons[factor]``,
    ``test == "anom"``: its mean lies outside its decision limits) gets the accent
    ring. The decision limits come from the same rows; their values are written at the
    right end of their lines.

    Parameters
    ----------
    result : VariationResult
    factor : str
    highlight : optional
        The level to colour when the factor has more than eight levels (the others are
        grey); default the first level.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> cmp = pd.DataFrame({"test": "anom", "level": ["A", "B"], "versus": "overall",
    ...     "estimate": [1.0, 2.0], "statistic": 0.0, "p": 0.5, "lower": 0.5, "upper": 2.5,
    ...     "signal": False})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), {"crew": cmp})
    >>> anom_figure(r, "crew").name
    'anom_layout'
    """
    plan = anom_plan(result, factor=factor, highlight=highlight)
    data = anom_sources(result, plan)
    sources = {name: parts.source(name, cols) for name, cols in data.items()}
    fig = parts.new_figure(
        "anom",
        anom_texts(result, plan)["anom"],
        width=min(parts.WIDTH, max(640, 200 + 80 * len(plan["levels"]))),
    )
    parts.centre_and_limits(
        fig, sources["anom_limits"], parts.view(role="center"), parts.view(role="limit")
    )
    parts.end_values(fig, sources["anom_limit_values"], parts.view())
    dots = fig.scatter(
        "x",
        "value",
        source=sources["anom_points"],
        size=parts.POINT_SIZE + 4,
        color="color",
        line_color="color",
    )
    marks = fig.scatter(
        "x",
        "value",
        source=sources["anom_signals"],
        size=parts.SIGNAL_SIZE + 4,
        fill_color=None,
        line_color=palette.ACCENT,
        line_width=2,
    )
    fig.add_tools(
        HoverTool(
            renderers=[dots, marks],
            tooltips=[
                ("level", "@level"),
                ("mean", "@value{0,0.[0000]}"),
                ("decision limits", "@lower{0,0.[0000]} to @upper{0,0.[0000]}"),
                ("p", "@p{0.[0000]}"),
            ],
        )
    )
    ticks = list(range(1, len(plan["levels"]) + 1))
    fig.xaxis.ticker = FixedTicker(ticks=ticks)
    fig.xaxis.major_label_overrides = dict(zip(ticks, plan["levels"], strict=True))
    fig.xaxis.axis_label = factor
    fig.yaxis.axis_label = "Level mean"
    fig.x_range.range_padding = 0.3
    return column(fig, name="anom_layout", tags=[plan])


def components_plan(result: VariationResult) -> dict[str, Any]:
    """Build plan of the components layout: the sources, in order, on the y axis.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> comp = pd.DataFrame({"source": ["crew", "residual"], "variance": [1.0, 3.0],
    ...                      "sd": [1.0, 3.0 ** 0.5], "share": [0.25, 0.75]})
    >>> components_plan(VariationResult(pd.DataFrame(), pd.DataFrame(), comp))["sources"]
    ['crew', 'residual']
    """
    return {
        "figure": "components",
        "options": {},
        "sources": [str(s) for s in encode.labels(result.components["source"])],
    }


def components_sources(result: VariationResult, plan: dict[str, Any]) -> dict[str, dict]:
    """Column data of ``"components_bars"`` (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> comp = pd.DataFrame({"source": ["crew", "residual"], "variance": [1.0, 3.0],
    ...                      "sd": [1.0, 3.0 ** 0.5], "share": [0.25, 0.75]})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), comp)
    >>> components_sources(r, components_plan(r))["components_bars"]["label"].tolist()
    ['25%', '75%']
    """
    comp = result.components
    share = comp["share"].to_numpy(dtype=float)
    names = np.array(plan["sources"], dtype=object)
    color = np.where(names == "residual", palette.LIMIT, palette.POINT).astype(object)
    return {
        "components_bars": {
            "source": names,
            "share": share,
            "variance": comp["variance"].to_numpy(dtype=float),
            "sd": comp["sd"].to_numpy(dtype=float),
            "label": np.array([f"{v:.0%}" if np.isfinite(v) else "" for v in share], dtype=object),
            "color": color,
        }
    }


def components_texts(result: VariationResult, plan: dict[str, Any]) -> dict[str, str]:
    """Title of the components figure (names the estimation method of the result).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), method="REML")
    >>> components_texts(r, {})["components"]
    'Share of the total variance by source (variance components, REML)'
    """
    how = f", {result.method}" if result.method else ""
    return {"components": f"Share of the total variance by source (variance components{how})"}


def components_figure(result: VariationResult) -> LayoutDOM:
    """Horizontal bars of each source's share of the total variance.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> comp = pd.DataFrame({"source": ["crew", "residual"], "variance": [1.0, 3.0],
    ...                      "sd": [1.0, 3.0 ** 0.5], "share": [0.25, 0.75]})
    >>> components_figure(VariationResult(pd.DataFrame(), pd.DataFrame(), comp)).name
    'components_layout'
    """
    plan = components_plan(result)
    data = components_sources(result, plan)
    bars = parts.source("components_bars", data["components_bars"])
    fig = parts.new_figure(
        "components",
        components_texts(result, plan)["components"],
        height=max(160, 60 + 36 * len(plan["sources"])),
        y_range=list(reversed(plan["sources"])),
        x_range=(0, 1.12),
    )
    rects = fig.hbar(y="source", right="share", height=0.6, source=bars, color="color")
    parts.write(fig, bars, x="share", y="source", text="label", x_offset=4, text_baseline="middle")
    fig.add_tools(
        HoverTool(
            renderers=[rects],
            tooltips=[
                ("source", "@source"),
                ("share", "@share{0.0%}"),
                ("variance", "@variance{0,0.[0000]}"),
                ("sd", "@sd{0,0.[0000]}"),
            ],
        )
    )
    fig.xaxis.axis_label = "Share of total variance"
    fig.xaxis.formatter = NumeralTickFormatter(format="0%")
    fig.ygrid.grid_line_color = None
    return column(fig, name="components_layout", tags=[plan])

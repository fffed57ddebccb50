"""Figures of the sources of variation: multi-vari chart, analysis of means, components.

Names (layout / figures / sources and their columns):

- :func:`multivari_figure`: ``"multivari_layout"``; one panel per factor, named
  ``"multivari"`` (one factor) or ``"multivari_0"``, ``"multivari_1"``, ...;
  ``"multivari_points"`` (``x, value, subgroup, factor, level, n, color`` + ``panel``
  with several factors) and ``"multivari_line"`` (``x0, y0, x1, y1`` + ``panel``).
  Within each subgroup the level means sit side by side (in level order, the x offset
  is only for legibility) and are joined by a thin line. The result's rows of the
  subgroup means (``factor == "subgroup"``) are not drawn.
- :func:`anom_figure`: ``"anom_layout"``, figure ``"anom"``; ``"anom_points"``
  (``x, value, level, lower, upper, p, color``), ``"anom_signals"`` (the levels whose
  mean lies outside its decision limits) and ``"anom_limits"`` (``x0, y0, x1, y1, role,
  panel``: decision limits dashed, their midpoint solid). Levels sit at x = 1..L.
- :func:`components_figure`: ``"components_layout"``, figure ``"components"``;
  ``"components_bars"`` (``source, share, variance, sd, label, color``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from bokeh.layouts import column
from bokeh.models import FixedTicker, HoverTool, LayoutDOM, NumeralTickFormatter

from qcexplore.draw import theme
from qcexplore.errors import QCDataError
from qcexplore.stats.results import VariationResult

_DODGE = 0.6  # width of a subgroup's slot taken by its level means
#: The ``factor`` of the multi-vari rows that hold the subgroup means (not drawn).
SUBGROUP_MEANS = "subgroup"


def _factor_levels(frame: pd.DataFrame) -> list[str]:
    present = set(frame["level"].dropna().astype(str))
    return [str(v) for v in theme.levels_of(frame["level"]) if str(v) in present]


def _level_means(result: VariationResult) -> pd.DataFrame:
    # The rows with factor "subgroup" hold the subgroup means (see
    # stats.variation.multivari_table), not a factor's levels: a panel of them would
    # colour hundreds of subgroups with a repeating palette.
    mv = result.multivari
    return mv[theme.labels(mv["factor"]) != SUBGROUP_MEANS].reset_index(drop=True)


def multivari_spec(result: VariationResult) -> dict[str, Any]:
    """Build description of the multi-vari layout (a new figure when it changes).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> mv = pd.DataFrame({"subgroup": [1, 1], "factor": "crew", "level": ["A", "B"],
    ...                    "mean": [1.0, 2.0], "n": 3})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), multivari=mv)
    >>> multivari_spec(r)["panels"]
    ['crew']
    """
    mv = _level_means(result)
    if mv.empty:
        raise QCDataError(
            "multivari: the result holds no level means; ask for "
            "variation(...) with at least one factor."
        )
    factors = [str(f) for f in pd.unique(mv["factor"])]
    return {
        "figure": "multivari",
        "options": {},
        "panels": factors,
        "webgl": len(mv) > theme.WEBGL_FROM,
    }


def multivari_sources(result: VariationResult, spec: dict[str, Any]) -> dict[str, dict]:
    """Column data of the multi-vari layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> mv = pd.DataFrame({"subgroup": [1, 1], "factor": "crew", "level": ["A", "B"],
    ...                    "mean": [1.0, 2.0], "n": 3})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), multivari=mv)
    >>> multivari_sources(r, multivari_spec(r))["multivari_points"]["x"].tolist()
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
    factor = theme.labels(mv["factor"])
    level = theme.labels(mv["level"])
    for name in spec["panels"]:
        rows = factor == name
        levels = _factor_levels(mv[rows])
        index = pd.Index(levels).get_indexer(level[rows])
        count = len(levels)
        x[rows] = position[rows] + (index - (count - 1) / 2.0) * _DODGE / max(count, 1)
        color[rows] = theme.colors_for(pd.Series(level[rows]), levels)
    panel = factor if len(spec["panels"]) > 1 else np.full(len(mv), "all", dtype=object)
    y = mv["mean"].to_numpy(dtype=float)
    points = {
        "x": x,
        "value": y,
        "subgroup": theme.labels(sub),
        "factor": factor,
        "level": level,
        "n": mv["n"].to_numpy(),
        "color": color,
        "panel": panel,
    }
    # One group per (factor, subgroup): the level means of a subgroup are joined.
    group = pd.factorize(factor)[0] * (position.max(initial=0.0) + 1.0) + position
    keep = theme.line_rows(len(mv))
    line = theme.segments(x[keep], y[keep], group[keep], panel[keep])
    if len(spec["panels"]) == 1:
        points.pop("panel")
        line.pop("panel")
    return {"multivari_points": points, "multivari_line": line}


def multivari_texts(result: VariationResult, spec: dict[str, Any]) -> dict[str, str]:
    """Titles of the multi-vari panels by figure name.

    Examples
    --------
    >>> multivari_texts(None, {"panels": ["crew"]})
    {'multivari': 'Mean of each crew level within each subgroup (multi-vari chart)'}
    """
    names = theme.panel_names("multivari", len(spec["panels"]))
    return {
        name: f"Mean of each {factor} level within each subgroup (multi-vari chart)"
        for name, factor in zip(names, spec["panels"], strict=True)
    }


def multivari_figure(result: VariationResult) -> LayoutDOM:
    """Multi-vari chart: each factor's level means within each subgroup, over time.

    One panel per factor, stacked, sharing both axes; a level keeps its colour
    (:func:`~qcexplore.draw.theme.palette_for` of the factor's levels in order).

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
    spec = multivari_spec(result)
    data = multivari_sources(result, spec)
    sources = {name: theme.source(name, cols) for name, cols in data.items()}
    texts = multivari_texts(result, spec)
    panels = spec["panels"]
    figs = []
    height = theme.HEIGHT if len(panels) == 1 else max(200, 2 * theme.HEIGHT // len(panels))
    for name, panel in zip(theme.panel_names("multivari", len(panels)), panels, strict=True):
        shared = {"x_range": figs[0].x_range, "y_range": figs[0].y_range} if figs else {}
        fig = theme.new_figure(name, texts[name], height=height, webgl=spec["webgl"], **shared)
        fig.segment(
            "x0",
            "y0",
            "x1",
            "y1",
            source=sources["multivari_line"],
            view=theme.view(panel if len(panels) > 1 else None),
            line_color=theme.LINE,
            line_width=theme.LINE_WIDTH,
        )
        dots = fig.scatter(
            "x",
            "value",
            source=sources["multivari_points"],
            view=theme.view(panel if len(panels) > 1 else None),
            size=theme.POINT_SIZE + 2,
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
        fig.xaxis.axis_label = "Subgroup (position in time order)"
        fig.yaxis.axis_label = "Level mean"
        theme.whole_number_ticks(fig)
        figs.append(fig)
    return column(*figs, name="multivari_layout", tags=[spec])


def _anom_rows(result: VariationResult, factor: str) -> pd.DataFrame:
    table = result.comparisons.get(factor)
    if table is None or not (table["test"] == "anom").any():
        known = [f for f, t in result.comparisons.items() if (t["test"] == "anom").any()]
        raise QCDataError(
            f"factor: no analysis of means for {factor!r} in the result; "
            f"factors with one: {known or 'none'}."
        )
    return table[table["test"] == "anom"].reset_index(drop=True)


def anom_spec(result: VariationResult, *, factor: str) -> dict[str, Any]:
    """Build description of the ANOM layout: the factor and its levels on the x axis.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> cmp = pd.DataFrame({"test": "anom", "level": ["A", "B"], "versus": "overall",
    ...     "estimate": [1.0, 2.0], "statistic": 0.0, "p": 0.5, "lower": 0.5, "upper": 2.5})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), {"crew": cmp})
    >>> anom_spec(r, factor="crew")["levels"]
    ['A', 'B']
    """
    rows = _anom_rows(result, factor)
    return {
        "figure": "anom",
        "options": {"factor": factor},
        "levels": [str(v) for v in theme.labels(rows["level"])],
    }


def anom_sources(result: VariationResult, spec: dict[str, Any]) -> dict[str, dict]:
    """Column data of the ANOM layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> cmp = pd.DataFrame({"test": "anom", "level": ["A", "B"], "versus": "overall",
    ...     "estimate": [1.0, 3.0], "statistic": 0.0, "p": 0.5, "lower": 0.5, "upper": 2.5})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), {"crew": cmp})
    >>> anom_sources(r, anom_spec(r, factor="crew"))["anom_signals"]["level"].tolist()
    ['B']
    """
    rows = _anom_rows(result, spec["options"]["factor"])
    levels = spec["levels"]
    x = np.arange(1, len(rows) + 1, dtype=float)
    y = rows["estimate"].to_numpy(dtype=float)
    lower = rows["lower"].to_numpy(dtype=float)
    upper = rows["upper"].to_numpy(dtype=float)
    points = {
        "x": x,
        "value": y,
        "level": np.array(levels, dtype=object),
        "lower": lower,
        "upper": upper,
        "p": rows["p"].to_numpy(dtype=float),
        "color": theme.colors_for(pd.Series(levels), levels),
    }
    outside = (y < lower) | (y > upper)
    limits = theme.steps(x, {"center": (lower + upper) / 2.0, "lower": lower, "upper": upper}, 0.5)
    return {
        "anom_points": points,
        "anom_signals": {k: v[outside] for k, v in points.items()},
        "anom_limits": limits,
    }


def anom_texts(result: VariationResult, spec: dict[str, Any]) -> dict[str, str]:
    """Title of the ANOM figure.

    Examples
    --------
    >>> anom_texts(None, {"options": {"factor": "crew"}})["anom"][:24]
    'Analysis of means: crew '
    """
    factor = spec["options"]["factor"]
    return {
        "anom": f"Analysis of means: {factor} level means with decision limits "
        "around the overall mean"
    }


def anom_figure(result: VariationResult, factor: str) -> LayoutDOM:
    """Analysis of means: each level's mean with its decision limits.

    A level whose mean lies outside its decision limits gets the accent ring. The
    decision limits come from the result (``comparisons[factor]``, ``test == "anom"``).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> cmp = pd.DataFrame({"test": "anom", "level": ["A", "B"], "versus": "overall",
    ...     "estimate": [1.0, 2.0], "statistic": 0.0, "p": 0.5, "lower": 0.5, "upper": 2.5})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), {"crew": cmp})
    >>> anom_figure(r, "crew").name
    'anom_layout'
    """
    spec = anom_spec(result, factor=factor)
    data = anom_sources(result, spec)
    sources = {name: theme.source(name, cols) for name, cols in data.items()}
    fig = theme.new_figure(
        "anom",
        anom_texts(result, spec)["anom"],
        width=min(theme.WIDTH, max(640, 200 + 80 * len(spec["levels"]))),
    )
    theme.centre_and_limits(
        fig, sources["anom_limits"], theme.view(role="center"), theme.view(role="limit")
    )
    dots = fig.scatter(
        "x",
        "value",
        source=sources["anom_points"],
        size=theme.POINT_SIZE + 4,
        color="color",
        line_color="color",
    )
    marks = fig.scatter(
        "x",
        "value",
        source=sources["anom_signals"],
        size=theme.SIGNAL_SIZE + 4,
        fill_color=None,
        line_color=theme.ACCENT,
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
    ticks = list(range(1, len(spec["levels"]) + 1))
    fig.xaxis.ticker = FixedTicker(ticks=ticks)
    fig.xaxis.major_label_overrides = dict(zip(ticks, spec["levels"], strict=True))
    fig.xaxis.axis_label = factor
    fig.yaxis.axis_label = "Level mean"
    fig.x_range.range_padding = 0.3
    return column(fig, name="anom_layout", tags=[spec])


def components_spec(result: VariationResult) -> dict[str, Any]:
    """Build description of the components layout: the sources, in order, on the y axis.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> comp = pd.DataFrame({"source": ["crew", "residual"], "variance": [1.0, 3.0],
    ...                      "sd": [1.0, 3.0 ** 0.5], "share": [0.25, 0.75]})
    >>> components_spec(VariationResult(pd.DataFrame(), pd.DataFrame(), comp))["sources"]
    ['crew', 'residual']
    """
    return {
        "figure": "components",
        "options": {},
        "sources": [str(s) for s in theme.labels(result.components["source"])],
    }


def components_sources(result: VariationResult, spec: dict[str, Any]) -> dict[str, dict]:
    """Column data of ``"components_bars"`` (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import VariationResult
    >>> comp = pd.DataFrame({"source": ["crew", "residual"], "variance": [1.0, 3.0],
    ...                      "sd": [1.0, 3.0 ** 0.5], "share": [0.25, 0.75]})
    >>> r = VariationResult(pd.DataFrame(), pd.DataFrame(), comp)
    >>> components_sources(r, components_spec(r))["components_bars"]["label"].tolist()
    ['25%', '75%']
    """
    comp = result.components
    share = comp["share"].to_numpy(dtype=float)
    names = np.array(spec["sources"], dtype=object)
    color = np.where(names == "residual", theme.LIMIT, theme.POINT).astype(object)
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


def components_texts(result: VariationResult, spec: dict[str, Any]) -> dict[str, str]:
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
    spec = components_spec(result)
    data = components_sources(result, spec)
    bars = theme.source("components_bars", data["components_bars"])
    fig = theme.new_figure(
        "components",
        components_texts(result, spec)["components"],
        height=max(160, 60 + 36 * len(spec["sources"])),
        y_range=list(reversed(spec["sources"])),
        x_range=(0, 1.12),
    )
    rects = fig.hbar(y="source", right="share", height=0.6, source=bars, color="color")
    fig.text(
        x="share",
        y="source",
        text="label",
        source=bars,
        x_offset=4,
        text_baseline="middle",
        text_font_size="10pt",
        text_color=theme.CENTER,
    )
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
    return column(fig, name="components_layout", tags=[spec])

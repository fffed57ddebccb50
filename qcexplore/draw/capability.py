"""The capability figure: histogram of the values, specification lines, fitted normal curve.

Names: layout ``"capability_layout"``, figure ``"capability"``; sources
``"capability_histogram"`` (``left, right, count``), ``"capability_curve"`` (``x,
density``, already scaled to counts per bin by the statistics) and
``"capability_spec"`` (``x, y0, y1, label, role``: one vertical line per given
specification limit (role ``"limit"``), the target (``"target"``) and the mean
(``"mean"``), reaching from 0 to just above the tallest bar or curve point).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from bokeh.layouts import column
from bokeh.models import HoverTool, LayoutDOM

from qcexplore.draw import palette, parts
from qcexplore.stats.results import CapabilityResult

capability_plan = parts.fixed_plan("capability")


def capability_sources(result: CapabilityResult, plan: dict[str, Any]) -> dict[str, dict]:
    """Column data of the capability layout's sources (see the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import CapabilityResult
    >>> hist = pd.DataFrame({"left": [0.0, 1.0], "right": [1.0, 2.0], "count": [3, 5]})
    >>> curve = pd.DataFrame({"x": [0.0, 2.0], "density": [1.0, 1.0]})
    >>> r = CapabilityResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), lsl=0.2,
    ...                      mean=1.1, histogram=hist, curve=curve)
    >>> capability_sources(r, capability_plan(r))["capability_spec"]["label"].tolist()
    ['LSL 0.2', 'mean 1.1']
    """
    hist, curve = result.histogram, result.curve
    counts = hist["count"].to_numpy(dtype=float)
    density = curve["density"].to_numpy(dtype=float)
    top = 1.08 * max(np.nanmax(counts, initial=0.0), np.nanmax(density, initial=0.0), 1.0)
    marks = [
        ("LSL", result.lsl, "limit"),
        ("USL", result.usl, "limit"),
        ("target", result.target, "target"),
        ("mean", result.mean, "mean"),
    ]
    given = [(name, float(v), role) for name, v, role in marks if v is not None and np.isfinite(v)]
    lines = {
        "x": np.array([v for _, v, _ in given], dtype=float),
        "y0": np.zeros(len(given)),
        "y1": np.full(len(given), top),
        "label": np.array([f"{name} {v:.6g}" for name, v, _ in given], dtype=object),
        "role": np.array([role for _, _, role in given], dtype=object),
    }
    return {
        "capability_histogram": {
            c: hist[c].to_numpy(dtype=float) for c in ("left", "right", "count")
        },
        "capability_curve": {"x": curve["x"].to_numpy(dtype=float), "density": density},
        "capability_spec": lines,
    }


def capability_texts(result: CapabilityResult, plan: dict[str, Any]) -> dict[str, str]:
    """Title of the capability figure (n, mean and the within-subgroup sd of the curve).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import CapabilityResult
    >>> r = CapabilityResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(), mean=500.0,
    ...                      sigma_within=2.0, n=120)
    >>> capability_texts(r, {})["capability"]
    'Distribution of 120 values against the specification; normal curve: mean 500, sd 2'
    """
    return {
        "capability": f"Distribution of {result.n} values against the specification; "
        f"normal curve: mean {result.mean:.6g}, sd {result.sigma_within:.6g}"
    }


def capability_figure(result: CapabilityResult) -> LayoutDOM:
    """Histogram of the values with specification lines and the fitted normal curve.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import CapabilityResult
    >>> hist = pd.DataFrame({"left": [0.0, 1.0], "right": [1.0, 2.0], "count": [3, 5]})
    >>> curve = pd.DataFrame({"x": [0.0, 2.0], "density": [1.0, 1.0]})
    >>> capability_figure(CapabilityResult(pd.DataFrame(), pd.DataFrame(), pd.DataFrame(),
    ...                   usl=2.0, histogram=hist, curve=curve)).name
    'capability_layout'
    """
    plan = capability_plan(result)
    data = capability_sources(result, plan)
    sources = {name: parts.source(name, cols) for name, cols in data.items()}
    fig = parts.new_figure("capability", capability_texts(result, plan)["capability"])
    bars = fig.quad(
        left="left",
        right="right",
        bottom=0,
        top="count",
        source=sources["capability_histogram"],
        fill_color=palette.BAND,
        line_color="#ffffff",
    )
    fig.line(
        "x",
        "density",
        source=sources["capability_curve"],
        line_color=palette.POINT,
        line_width=2,
    )
    spec_lines = sources["capability_spec"]
    styles = {
        "limit": {"line_color": palette.CENTER, "line_width": 2},
        "target": {"line_color": palette.CENTER, "line_dash": "dashed"},
        "mean": {"line_color": palette.LIMIT, "line_dash": "dotted"},
    }
    for role, style in styles.items():
        fig.segment("x", "y0", "x", "y1", source=spec_lines, view=parts.view(role=role), **style)
    parts.write(
        fig, spec_lines, x="x", y="y1", text="label", text_align="center", text_baseline="bottom"
    )
    fig.add_tools(
        HoverTool(
            renderers=[bars],
            tooltips=[
                ("from", "@left{0,0.[0000]}"),
                ("to", "@right{0,0.[0000]}"),
                ("count", "@count"),
            ],
        )
    )
    fig.xaxis.axis_label = "Value"
    fig.yaxis.axis_label = "Count"
    fig.y_range.start = 0
    fig.y_range.range_padding = 0.12
    return column(fig, name="capability_layout", tags=[plan])

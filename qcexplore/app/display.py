"""Results as the last line of a notebook cell: the figure that shows them and a compact table.

``qcexplore/__init__.py`` registers :func:`bundle` with IPython by type name, so bokeh is
imported only when the first result is shown. BokehJS comes inline from the installed
package, once per kernel.
"""

from __future__ import annotations

from typing import Any

from bokeh.embed import components

from qcexplore import draw
from qcexplore.app.resources import load_bokehjs

#: The figures of each result type, by class name (the views draw the same ones).
_FIGURES = {
    "ChartResult": lambda r: [draw.chart_figure(r)],
    "VariationResult": lambda r: [draw.components_figure(r), draw.multivari_figure(r)],
    "TimeResult": lambda r: [draw.acf_figure(r), draw.shifts_figure(r)],
    "CapabilityResult": lambda r: [draw.capability_figure(r)],
}


def bundle(result: Any) -> dict[str, str]:
    """The notebook output of a result: its figures, then its compact table (HTML)."""
    load_bokehjs()
    figures = _FIGURES[type(result).__name__](result)
    script, divs = components(figures)
    html = "".join(divs) + script + result._repr_html_()
    return {"text/html": html, "text/plain": repr(result)}

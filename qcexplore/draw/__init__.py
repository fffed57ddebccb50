"""Bokeh figures built from results: pure functions, no statistics, no state.

Each ``*_figure(result, ...)`` returns a bokeh layout whose figures and data sources
carry stable ``name``s (see each module's docstring); :func:`refresh` swaps a new
result's data into such a layout in place, and :func:`needs_rebuild` says when a new
figure is needed instead. Colours are in :mod:`~qcexplore.draw.palette`, the bokeh
pieces the figures share in :mod:`~qcexplore.draw.parts`, and the conversion of result
columns into page data in :mod:`~qcexplore.draw.encode`. Nothing here loads BokehJS:
the explorer and the report load it inline (never from a CDN).
"""

from qcexplore.draw.capability import capability_figure
from qcexplore.draw.charts import chart_figure
from qcexplore.draw.palette import palette_for
from qcexplore.draw.refresh import needs_rebuild, refresh
from qcexplore.draw.timeseries import acf_figure, shifts_figure
from qcexplore.draw.variation import anom_figure, components_figure, multivari_figure

__all__ = [
    "acf_figure",
    "anom_figure",
    "capability_figure",
    "chart_figure",
    "components_figure",
    "multivari_figure",
    "needs_rebuild",
    "palette_for",
    "refresh",
    "shifts_figure",
]

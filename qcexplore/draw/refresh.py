"""Live updates: swap new data into an existing layout's named sources.

Every figure function stores a build plan in its layout's ``tags`` (the ``*_plan``
functions). A new result that gives the same plan can be shown by assigning new
``.data`` to the layout's named ColumnDataSources and new title and axis texts
(:func:`refresh`); the explorer then updates in place through jupyter_bokeh's
BokehModel. A different plan needs a new figure (:func:`needs_rebuild`):

- chart: another number or set of panels (overlay <-> small multiples, another
  ``by``, per-stratum limits switched on or off, a stratum level appearing), the
  secondary chart appearing or disappearing, strata appearing or disappearing, the x
  axis switching between positions and times, legend labels that need other legend
  columns, CUSUM (two sums) for another kind or back, or the point count crossing
  :data:`~qcexplore.draw.parts.WEBGL_FROM` (WebGL on/off);
- multi-vari: another set of factors, legend labels that need other legend columns,
  or WebGL on/off; ANOM: another factor or other levels; components: other sources;
  step changes: the x axis switching between positions and times, or WebGL on/off;
- ACF and capability: never (their layout does not depend on the data);
- a result of another type than the one the layout was built from.

A long chart's sources hold a display reduction of its points (see
:mod:`qcexplore.draw.charts`): a refresh swaps in the new result's reduction, however many
points it keeps, and its title's statement of it; the ``point`` column maps the rows of
the points source back to the rows of the result's points.

Re-colouring (another split factor with the same panel structure, more or fewer
levels than colours) is data only: the colours travel as codes in the ``color_code``
column of the sources (see :mod:`qcexplore.draw.charts`). The figure options (split,
x, highlight) stay those the layout was built with.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable
from typing import Any, NamedTuple

from bokeh.models import Axis, Div, LayoutDOM

from qcexplore.draw import capability, charts, parts, timeseries, variation
from qcexplore.errors import QCDataError
from qcexplore.stats.results import CapabilityResult, ChartResult, TimeResult, VariationResult


class _Figure(NamedTuple):
    result_type: type
    plan: Callable[..., dict[str, Any]]
    sources: Callable[[Any, dict[str, Any]], dict[str, dict]]
    texts: Callable[[Any, dict[str, Any]], dict[str, str]]


_FIGURES: dict[str, _Figure] = {
    "chart": _Figure(ChartResult, charts.chart_plan, charts.chart_sources, charts.chart_texts),
    "multivari": _Figure(
        VariationResult,
        variation.multivari_plan,
        variation.multivari_sources,
        variation.multivari_texts,
    ),
    "anom": _Figure(
        VariationResult, variation.anom_plan, variation.anom_sources, variation.anom_texts
    ),
    "components": _Figure(
        VariationResult,
        variation.components_plan,
        variation.components_sources,
        variation.components_texts,
    ),
    "acf": _Figure(TimeResult, timeseries.acf_plan, timeseries.acf_sources, timeseries.acf_texts),
    "shifts": _Figure(
        TimeResult, timeseries.shifts_plan, timeseries.shifts_sources, timeseries.shifts_texts
    ),
    "capability": _Figure(
        CapabilityResult,
        capability.capability_plan,
        capability.capability_sources,
        capability.capability_texts,
    ),
}


def _new_plan(layout: LayoutDOM, result: Any) -> tuple[_Figure, dict[str, Any]] | None:
    old = parts.plan_of(layout)
    if old is None or old["figure"] not in _FIGURES:
        return None
    fig = _FIGURES[old["figure"]]
    if not isinstance(result, fig.result_type):
        return None
    try:
        new = fig.plan(result, **old["options"])
    except QCDataError:  # e.g. the factor of an ANOM layout is not in the new result
        return None
    return (fig, new) if new == old else None


#: Named models of each layout seen by :func:`refresh`. Walking a layout's references
#: takes a long time for a big chart, and refresh never adds or removes models.
_NAMED: weakref.WeakKeyDictionary[LayoutDOM, dict[str, Any]] = weakref.WeakKeyDictionary()


def _named(layout: LayoutDOM) -> dict[str, Any]:
    if layout not in _NAMED:
        _NAMED[layout] = {m.name: m for m in layout.references() if m.name}
    return _NAMED[layout]


def needs_rebuild(layout: LayoutDOM, result: Any) -> bool:
    """Whether showing ``result`` needs a new figure rather than :func:`refresh`.

    See the module docstring for the changes that need one.

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> from qcexplore.draw.charts import chart_figure
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> r = ChartResult("xbar_r", pts, pd.DataFrame())
    >>> needs_rebuild(chart_figure(r), r)
    False
    """
    return _new_plan(layout, result) is None


def refresh(layout: LayoutDOM, result: Any) -> None:
    """Show ``result`` in ``layout`` by assigning new data to its named sources in place.

    The models keep their ids, so a layout inside a jupyter_bokeh BokehModel updates
    without a new figure. Titles and axis labels are updated too.

    Raises
    ------
    QCDataError
        When the result needs a new figure (see :func:`needs_rebuild`).

    Examples
    --------
    >>> import pandas as pd
    >>> from qcexplore.stats.results import ChartResult
    >>> from qcexplore.draw.charts import chart_figure
    >>> pts = pd.DataFrame({"subgroup": [1, 2], "stratum": [None, None], "stat": [1.0, 2.0],
    ...     "center": 1.5, "lcl": 0.0, "ucl": 3.0, "n": 5, "signal": False, "rules": [(), ()]})
    >>> layout = chart_figure(ChartResult("xbar_r", pts, pd.DataFrame()))
    >>> refresh(layout, ChartResult("xbar_r", pts.assign(stat=[3.0, 4.0]), pd.DataFrame()))
    >>> layout.select_one({"name": "chart_points"}).data["value"].tolist()
    [3.0, 4.0]
    """
    found = _new_plan(layout, result)
    if found is None:
        old = parts.plan_of(layout)
        what = old["figure"] if old else "unknown"
        raise QCDataError(
            f"result: a {type(result).__name__} that does not fit this {what} layout (other "
            f"panels, axis or figure type); build a new figure with {what}_figure(...) "
            "(check with needs_rebuild first)."
        )
    fig, plan = found
    named = _named(layout)
    for name, data in fig.sources(result, plan).items():
        named[name].data = data
    for name, text in fig.texts(result, plan).items():
        model = named[name]
        if isinstance(model, Div):
            model.text = text
        elif isinstance(model, Axis):
            model.axis_label = text
        else:
            model.title.text = parts.wrapped_title(text, model.width)

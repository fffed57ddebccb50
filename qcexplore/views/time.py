"""The over-time view: autocorrelation, step changes, and the charts to read when the means
are autocorrelated (residuals about the fitted AR(1) and the moving centre line)."""

from __future__ import annotations

from typing import Any

import pandas as pd

from qcexplore import draw
from qcexplore.options import Options, TimeOptions
from qcexplore.study import Study
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.text import notes_html, table_html
from qcexplore.words import plural


class TimeView(View):
    """The time structure of the subgroup means (measurement offsets removed)."""

    name = "time"
    title = "Over time"
    options_type = TimeOptions

    def compute(self, study: Study, options: Options | None) -> Any:
        return study.time_structure_of(options)

    def show(self, study: Study, result: Any) -> Shown:
        figures = [
            Figure("acf", lambda: draw.acf_figure(result), result),
            Figure("shifts", lambda: draw.shifts_figure(result), result),
        ]
        for slot, chart in (
            ("residuals", result.residual_chart),
            ("moving_centre", result.moving_center_chart),
        ):
            if chart is not None:
                figures.append(Figure(slot, lambda c=chart: draw.chart_figure(c), chart))
        html = (
            table_html(result.ljung_box, "Ljung-Box tests of autocorrelation")
            + table_html(pd.DataFrame([dict(result.ar1)]), "First-order autoregressive fit")
            + table_html(result.shifts, "Step changes")
            + notes_html(result.notes)
        )
        summary = f"{plural(len(result.acf), 'lag')}, {plural(len(result.shifts), 'step change')}"
        return Shown(figures=tuple(figures), html=html, summary=summary)

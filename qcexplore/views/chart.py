"""The control chart view: the chart with its limits, split by a factor if asked."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import pandas as pd

from qcexplore import draw
from qcexplore.options import ChartOptions, Options
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.log import ExplorerState
from qcexplore.views.text import notes_html, plural, table_html

#: The report prints the chart split by a factor when it has at most this many levels.
SPLIT_LEVELS = 12


class ChartView(View):
    """The control chart of the subgroups, with the investigation's exclusions."""

    name = "chart"
    title = "Chart"
    options_type = ChartOptions
    uses_exclusions = True

    def options_for(self, study: Any, state: ExplorerState) -> ChartOptions:
        options = state.options_for(self.name, ChartOptions)
        changes: dict[str, Any] = {}
        if options.by is not None and options.by not in study.available_factors:
            changes.update(by=None, limits="pooled")
        if options.adjust_for and not study.measured_by:
            changes["adjust_for"] = False
        # Exclusions are kept by their text label; labels not in this study (outside the date
        # window, say) are left out.
        categories = study.levels(study.subgroup_column)
        position = pd.Index(categories.astype(str)).get_indexer(list(state.excluded))
        changes["exclude"] = tuple(categories[i] for i in position if i >= 0)
        return options.replace(**changes)  # type: ignore[return-value]

    def live_choices(self, study: Any) -> Mapping[str, Mapping[Any, str]]:
        return {"by": {factor: factor for factor in study.available_factors}}

    def inactive(self, study: Any, options: Options | None) -> Mapping[str, str]:
        idle = {}
        if options is None or getattr(options, "by", None) is None:
            idle["limits"] = "needs a split"
        if not study.measured_by:
            idle["adjust_for"] = "no measured_by factor"
        return idle

    def compute(self, study: Any, options: Options | None) -> Any:
        return study.chart_of(options)

    def show(self, study: Any, result: Any) -> Shown:
        signals = int(result.points["signal"].sum())
        split = f", split by {result.by}" if result.by else ""
        return Shown(
            figures=(Figure("chart", lambda: draw.chart_figure(result), result),),
            html=table_html(result.limits, "Limits") + notes_html(result.notes),
            summary=f"{result.kind} chart of {plural(len(result.points), 'point')}{split}, "
            f"{plural(signals, 'signal')}",
        )

    def report_variants(self, study: Any, options: Options | None) -> list[tuple[str, Options]]:
        assert isinstance(options, ChartOptions)
        return [
            (f"Split by {factor}", options.replace(by=factor))
            for factor in study.factors
            if len(study.levels(factor)) <= SPLIT_LEVELS
        ]

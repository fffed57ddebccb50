"""The control chart view: the chart with its limits, split by a factor if asked.

A factor that changes inside each subgroup (a nozzle, a cavity) cannot colour a subgroup's
mean: splitting by it keeps the subgroup chart as it is and adds each level as its own series
with its own limits, where a drift in one level shows.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import pandas as pd

from qcexplore import draw
from qcexplore.investigation import Investigation
from qcexplore.options import KIND_LABELS, ChartOptions, Options
from qcexplore.stats.results import ChartResult
from qcexplore.study import Study
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.text import notes_html, table_html
from qcexplore.words import plural

#: The report prints the chart split by a factor when it has at most this many levels.
SPLIT_LEVELS = 12
#: Beyond this many levels one chosen level is coloured and the rest grey (draw.palette).
COLOURED_LEVELS = 8


@dataclass(frozen=True)
class Charts:
    """The chart on show, and the per-level chart of a factor that changes inside subgroups."""

    main: ChartResult
    levels: ChartResult | None = None
    highlight: str | None = None


def varies_within_subgroups(study: Study, factor: str) -> bool:
    """Whether a factor changes inside subgroups (it is then no column of ``study.subgroups``,
    which lists the factors constant within every subgroup)."""
    return study.subgroup is not None and factor not in study.subgroups.columns


class ChartView(View):
    """The control chart of the subgroups, with the investigation's exclusions."""

    name = "chart"
    title = "Chart"
    options_type = ChartOptions
    uses_exclusions = True

    def options_for(self, study: Study, state: Investigation) -> ChartOptions:
        options = state.options_for(self.name, ChartOptions)
        changes: dict[str, Any] = {}
        if options.by is not None and options.by not in study.available_factors:
            changes.update(by=None, limits="pooled")
        if options.adjust_for and not study.measured_by:
            changes["adjust_for"] = False
        by = changes.get("by", options.by)
        if options.highlight is not None and (
            by is None or options.highlight not in set(study.levels(by).astype(str))
        ):
            changes["highlight"] = None
        # Exclusions are kept by their text label; labels not in this study (outside the date
        # window, say) are left out.
        categories = study.levels(study.subgroup_column)
        position = pd.Index(categories.astype(str)).get_indexer(list(state.excluded))
        changes["exclude"] = tuple(categories[i] for i in position if i >= 0)
        return options.replace(**changes)  # type: ignore[return-value]

    def live_choices(
        self, study: Study, options: Options | None
    ) -> Mapping[str, Mapping[Any, str]]:
        assert isinstance(options, ChartOptions)
        choices: dict[str, Mapping[Any, str]] = {
            "by": {factor: factor for factor in study.available_factors},
            "kind": {**KIND_LABELS, "auto": self._auto_words(study, options)},
        }
        if options.by is not None:
            choices["highlight"] = {str(level): str(level) for level in study.levels(options.by)}
        return choices

    @staticmethod
    def _auto_words(study: Study, options: ChartOptions) -> str:
        """The automatic choice names what it draws (the kind chosen by subgroup size)."""
        if options.kind != "auto":
            return KIND_LABELS["auto"]
        try:
            drawn = study.chart_of(options.replace(by=None, limits="pooled")).kind
        except ValueError:  # a chart that cannot be drawn: its control says why, elsewhere
            return KIND_LABELS["auto"]
        return f"{KIND_LABELS['auto']}: {KIND_LABELS[drawn]}"

    def inactive(self, study: Study, options: Options | None) -> Mapping[str, str]:
        idle = {}
        by = getattr(options, "by", None)
        if by is None:
            idle["limits"] = "needs a split"
        if by is None or len(study.levels(by)) <= COLOURED_LEVELS:
            idle["highlight"] = f"for splits of more than {COLOURED_LEVELS} levels"
        if not study.measured_by:
            idle["adjust_for"] = "no measured_by factor"
        return idle

    def compute(self, study: Study, options: Options | None) -> Charts:
        assert isinstance(options, ChartOptions)
        if options.by is not None and varies_within_subgroups(study, options.by):
            main = study.chart_of(options.replace(by=None, limits="pooled", highlight=None))
            levels = study.chart_of(options.replace(limits="per_stratum"))
            return Charts(main, levels, options.highlight)
        return Charts(study.chart_of(options), None, options.highlight)

    def show(self, study: Study, result: Charts) -> Shown:
        main, levels, chosen = result.main, result.levels, result.highlight
        signals = int(main.points["signal"].sum())
        figures = [
            Figure("chart", lambda: draw.chart_figure(main, highlight=chosen), main, (chosen,))
        ]
        html = table_html(main.limits, "Limits") + notes_html(main.notes)
        split = f", split by {main.by}" if main.by else ""
        if levels is not None:
            factor = levels.by
            figures.append(
                Figure(
                    "chart_levels",
                    lambda: draw.chart_figure(levels, split=True, highlight=chosen),
                    levels,
                    (chosen,),
                )
            )
            html = (
                f"<p>{factor} changes inside each subgroup, so the chart of the subgroups stays "
                f"as it is; below it, each {factor} is its own series with its own limits, "
                "where a drift in one of them shows.</p>" + html
            )
            split = f"; each {factor} as its own series below"
        return Shown(
            figures=tuple(figures),
            html=html,
            summary=f"{KIND_LABELS[main.kind]}, {plural(len(main.points), 'point')}{split}, "
            f"{plural(signals, 'signal')}",
        )

    def report_variants(self, study: Study, options: Options | None) -> list[tuple[str, Options]]:
        assert isinstance(options, ChartOptions)
        return [
            (f"Split by {factor}", options.replace(by=factor))
            for factor in study.factors
            if len(study.levels(factor)) <= SPLIT_LEVELS
        ]

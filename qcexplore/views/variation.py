"""The sources-of-variation view: components, multi-vari chart, level comparisons, tables."""

from __future__ import annotations

from typing import Any

from qcexplore import draw
from qcexplore.options import Options, VariationOptions
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.text import notes_html, plural, table_html


class VariationView(View):
    """The variance taken apart into its sources, with the error term each test uses."""

    name = "variation"
    title = "Where the variation comes from"
    options_type = VariationOptions
    choice_label = "Compare levels of"

    def compute(self, study: Any, options: Options | None) -> Any:
        return study.variation_of(options)

    def choices(self, study: Any, result: Any) -> tuple[str, ...]:
        return tuple(result.comparisons)

    def show(self, study: Any, result: Any) -> Shown:
        tables = [
            table_html(result.structure, "How the factors relate to the subgroups"),
            table_html(result.anova, "Analysis of variance (with the error term each test uses)"),
            table_html(result.components, "Variance components"),
        ]
        if len(result.offsets):
            tables.append(table_html(result.offsets, "Sampling and measurement offsets"))
        if len(result.spread):
            tables.append(table_html(result.spread, "Equal spread between levels?"))
        figures = [
            Figure("components", lambda: draw.components_figure(result), result),
            Figure("multivari", lambda: draw.multivari_figure(result), result),
        ]
        return Shown(
            figures=tuple(figures),
            html="".join(tables) + notes_html(result.notes),
            summary=plural(len(result.components), "variance component"),
        )

    def show_choice(self, study: Any, result: Any, choice: str) -> Shown:
        return Shown(
            figures=(Figure("anom", lambda: draw.anom_figure(result, choice), result, (choice,)),),
            html=table_html(result.comparisons[choice], f"Comparisons of the levels of {choice}"),
        )

"""The sources-of-variation view: components, multi-vari chart, level comparisons, tables."""

from __future__ import annotations

import html
from typing import Any

from qcexplore import draw
from qcexplore.options import Options, VariationOptions
from qcexplore.study import Study
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.text import notes_html, p_words, table_html
from qcexplore.words import plural


class VariationView(View):
    """The variance taken apart into its sources, with the error term each test uses."""

    name = "variation"
    title = "Where the variation comes from"
    options_type = VariationOptions
    choice_label = "Compare levels of"

    def compute(self, study: Study, options: Options | None) -> Any:
        return study.variation_of(options)

    def choices(self, study: Study, result: Any) -> tuple[str, ...]:
        return tuple(result.comparisons)

    def show(self, study: Study, result: Any) -> Shown:
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

    def show_choice(self, study: Study, result: Any, choice: str) -> Shown:
        return Shown(
            figures=(Figure("anom", lambda: draw.anom_figure(result, choice), result, (choice,)),),
            html=_agreement(result, choice)
            + table_html(result.comparisons[choice], f"Comparisons of the levels of {choice}"),
        )


def _agreement(result: Any, factor: str, alpha: float = 0.05) -> str:
    """Say so on the panel when the analysis of means marks a level of a factor that the
    analysis of variance finds no difference for (or the other way round), and why."""
    table = result.comparisons[factor]
    anom = table[table["test"] == "anom"]
    rows = result.anova[result.anova["source"] == factor]
    if not len(anom) or not len(rows) or "signal" not in anom:
        return ""
    marked = bool(anom["signal"].any())
    p = float(rows["p"].iloc[0])
    if p != p or marked == (p < alpha):
        return ""
    error = str(rows["error_term"].iloc[0]) if "error_term" in rows else "its error term"
    if marked:
        why = (
            f"The analysis of means marks a level of {factor}, but the analysis of variance "
            f"finds no difference between the {factor} levels (p = {p_words(p)}, tested "
            f"against {error}). The two ask different questions: the analysis of means "
            "compares each level with the overall mean, one level at a time; the analysis of "
            "variance asks whether the levels differ at all, against the variation the design "
            "calls for. Read the marked level as a lead to check, not as a finding."
        )
    else:
        why = (
            f"The analysis of variance finds the {factor} levels differ (p = {p_words(p)}), "
            "but no single level stands outside the decision limits of the analysis of means: "
            "the difference is spread over several levels."
        )
    return f"<p class='qcx-agreement'>{html.escape(why)}</p>"

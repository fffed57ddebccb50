"""The capability view: the values against the specification, indices with intervals, ppm."""

from __future__ import annotations

from typing import Any

from qcexplore import draw
from qcexplore.options import Options
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.text import notes_html, plural, table_html


class CapabilityView(View):
    """Capability against the study's specification."""

    name = "capability"
    title = "Against the specification"

    def available(self, study: Any) -> str:
        if study.spec is None:
            return (
                "No specification was given, so capability is not computed: give the lower "
                "and/or upper limit to see it."
            )
        return ""

    def compute(self, study: Any, options: Options | None) -> Any:
        return study.capability()

    def show(self, study: Any, result: Any) -> Shown:
        return Shown(
            figures=(Figure("capability", lambda: draw.capability_figure(result), result),),
            html=table_html(result.indices, "Capability indices")
            + table_html(result.ppm, "Parts per million outside the specification")
            + table_html(result.normality, "Normality")
            + notes_html(result.warnings),
            summary=plural(len(result.indices), "index", "indices"),
        )

"""The capability view: the values against the specification, indices with intervals, ppm."""

from __future__ import annotations

from typing import Any

from qcexplore import draw
from qcexplore.investigation import Investigation
from qcexplore.options import Options, SpecOptions
from qcexplore.study import Study
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.text import notes_html, table_html
from qcexplore.words import plural


class CapabilityView(View):
    """Capability against the study's specification."""

    name = "capability"
    title = "Against the specification"
    options_type = SpecOptions

    def settings(self, study: Study, state: Investigation) -> SpecOptions:
        # The specification is a role of the Study, which study_for built from the
        # investigation: it is read from there, never kept twice.
        return SpecOptions.of(study.spec, study.units)

    def available(self, study: Study) -> str:
        if study.spec is None:
            return (
                "No specification was given, so capability is not computed: type the lower "
                "and/or upper limit above to see it."
            )
        return ""

    def compute(self, study: Study, options: Options | None) -> Any:
        return study.capability()

    def show(self, study: Study, result: Any) -> Shown:
        return Shown(
            figures=(Figure("capability", lambda: draw.capability_figure(result), result),),
            html=table_html(result.indices, "Capability indices")
            + table_html(
                result.ppm,
                "Parts per million outside the specification",
                whole_numbers=("observed", "expected"),
            )
            + table_html(result.normality, "Normality")
            + notes_html(result.warnings),
            summary=plural(len(result.indices), "index", "indices"),
        )

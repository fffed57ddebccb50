"""The capability view: the values against the specification, indices with intervals, ppm."""

from __future__ import annotations

from typing import Any

from qcexplore import draw
from qcexplore.options import Options, SpecOptions
from qcexplore.views.base import Figure, Shown, View
from qcexplore.views.log import ExplorerState
from qcexplore.views.text import notes_html, plural, table_html


class CapabilityView(View):
    """Capability against the study's specification."""

    name = "capability"
    title = "Against the specification"
    options_type = SpecOptions

    def options_for(self, study: Any, state: ExplorerState) -> SpecOptions:
        stored = dict(state.options).get(self.name)
        return stored if stored is not None else SpecOptions.of(study.spec, study.units)

    def study_roles(self, options: SpecOptions) -> dict[str, Any]:
        """The Study's roles these options set: the specification and the units."""
        return {"spec": options.spec(), "units": options.units}

    def available(self, study: Any) -> str:
        if study.spec is None:
            return (
                "No specification was given, so capability is not computed: type the lower "
                "and/or upper limit above to see it."
            )
        return ""

    def compute(self, study: Any, options: Options | None) -> Any:
        return study.capability()

    def show(self, study: Any, result: Any) -> Shown:
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

"""The findings view: what the data say, ranked, in plain words, with the caution."""

from __future__ import annotations

from typing import Any

from qcexplore.caution import caution
from qcexplore.options import Options
from qcexplore.views.base import Shown, View
from qcexplore.views.text import findings_html, plural


class FindingsView(View):
    """The ranked findings of the study."""

    name = "findings"
    title = "What the data say"

    def compute(self, study: Any, options: Options | None) -> Any:
        return tuple(study.findings())

    def show(self, study: Any, result: Any) -> Shown:
        return Shown(
            html=findings_html(result, caution(study.units, study.spec)),
            summary=plural(len(result), "finding"),
        )

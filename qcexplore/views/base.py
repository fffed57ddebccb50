"""What a view is: one description of an analysis that the explorer and the report both show.

A view names its options type, computes its result from a Study, and says what to show of the
result: figures (built by ``qcexplore.draw``), and HTML of tables and captions formatted for
people. The explorer hosts every registered view as a tab and the report prints each as a
section, so no table or caption is written twice.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

from bokeh.models import LayoutDOM

from qcexplore.investigation import Investigation
from qcexplore.options import Options
from qcexplore.study import Study


@dataclass(frozen=True)
class Figure:
    """One figure of a view: its place (``slot``), how to build it, and what it shows.

    ``result`` is handed to ``draw.refresh`` to update a figure already built in place;
    ``variant`` tells apart layouts of one slot that cannot be refreshed into each other
    (the comparison chart of one factor or another).
    """

    slot: str
    build: Callable[[], LayoutDOM]
    result: Any
    variant: tuple = ()


@dataclass(frozen=True)
class Card:
    """One finding as the room sees it: headline and sentence, its picture, the statistics
    and the next step behind a disclosure, and the settings that open the full view."""

    html: str
    figure: Figure | None
    details: str
    action: tuple[tuple[str, Any], ...] = ()


@dataclass(frozen=True)
class Shown:
    """What a view shows of one result: cards, figures, HTML (tables, captions), a status line.

    Hosts show the cards first (one under the other), then the figures, then the HTML.
    """

    figures: tuple[Figure, ...] = ()
    html: str = ""
    summary: str = ""
    cards: tuple[Card, ...] = ()


class View:
    """One analysis as people see it. Subclasses set the class attributes and :meth:`compute`.

    ``choice_label``: the label of the control that picks what to show of the result
    (:meth:`choices`), or empty when there is nothing to pick.
    """

    name: ClassVar[str]
    title: ClassVar[str]
    options_type: ClassVar[type[Options] | None] = None
    choice_label: ClassVar[str] = ""
    #: Depends on the exclusions (they change the limits): recompute when they change.
    uses_exclusions: ClassVar[bool] = False

    def settings(self, study: Study, state: Investigation) -> Options | None:
        """The options as the investigation keeps them: what the controls show and change."""
        if self.options_type is None:
            return None
        return state.options_for(self.name, self.options_type)

    def options_for(self, study: Study, state: Investigation) -> Options | None:
        """The options this view computes with, for a study and an investigation (its settings
        made to fit the study)."""
        return self.settings(study, state)

    def live_choices(
        self, study: Study, options: Options | None
    ) -> Mapping[str, Mapping[Any, str]]:
        """Choices of option fields that depend on the study (e.g. the factors to split by)."""
        return {}

    def inactive(self, study: Study, options: Options | None) -> Mapping[str, str]:
        """Option fields that would do nothing now, each with the reason in words."""
        return {}

    def compute(self, study: Study, options: Options | None) -> Any:
        """The result of the analysis (from the Study, which caches it)."""
        raise NotImplementedError

    def available(self, study: Study) -> str:
        """Empty when the view can be computed for this study, else why not (in words)."""
        return ""

    def choices(self, study: Study, result: Any) -> tuple[str, ...]:
        """What can be picked to show of the result (empty: nothing to pick)."""
        return ()

    def show(self, study: Study, result: Any) -> Shown:
        """The figures and HTML of a result."""
        raise NotImplementedError

    def show_choice(self, study: Study, result: Any, choice: str) -> Shown:
        """What is shown of the result for one of :meth:`choices` (besides :meth:`show`)."""
        return Shown()

    def report_variants(self, study: Study, options: Options | None) -> list[tuple[str, Options]]:
        """More settings the report prints figures for (e.g. the chart split by each factor)."""
        return []

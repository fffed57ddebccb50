"""The findings board: each finding a card with the picture that proves it and the next step.

The board is the first view of the explorer and the first section of the report. A card says
the finding in one headline and one sentence, shows its evidence figure (drawn from the results
the finding cites), keeps the statistics behind a disclosure, says what would settle it, and
offers the explorer settings that show the full view.
"""

from __future__ import annotations

import html
import math
from collections.abc import Callable
from dataclasses import dataclass

from bokeh.models import LayoutDOM

from qcexplore import draw
from qcexplore.caution import caution
from qcexplore.options import Options
from qcexplore.stats.results import Evidence, Finding
from qcexplore.study import Study
from qcexplore.views.base import Card, Figure, Shown, View
from qcexplore.views.text import p_words
from qcexplore.words import plural


@dataclass(frozen=True)
class Board:
    """The ranked findings with the evidence they cite."""

    findings: tuple[Finding, ...]
    evidence: Evidence


def _level_figure(ev: Evidence, f: Finding) -> LayoutDOM | None:
    if ev.variation is None or f.factor not in ev.variation.comparisons:
        return None
    return draw.anom_figure(ev.variation, f.factor, highlight=f.level)


#: The evidence figure of each kind of finding, drawn from the results it cites.
FIGURES: dict[str, Callable[[Evidence, Finding], LayoutDOM | None]] = {
    "measurement_offset": _level_figure,
    "stream_difference": _level_figure,
    "spread_difference": _level_figure,
    "process_shift": lambda ev, f: None if ev.time is None else draw.shifts_figure(ev.time),
    "autocorrelation": lambda ev, f: None if ev.time is None else draw.acf_figure(ev.time),
    "out_of_control": lambda ev, f: draw.chart_figure(ev.chart),
    "capability": lambda ev, f: (
        None if ev.capability is None else draw.capability_figure(ev.capability)
    ),
    "variance_split": lambda ev, f: (
        None if ev.variation is None else draw.components_figure(ev.variation)
    ),
    "stratified_subgroups": lambda ev, f: (
        None if ev.variation is None else draw.multivari_figure(ev.variation)
    ),
    "confounded": lambda ev, f: (
        None if ev.variation is None else draw.multivari_figure(ev.variation)
    ),
}


def _statistics(f: Finding) -> str:
    rows = [("what was tested", f.detail)]
    if not math.isnan(f.p):
        rows.append(("p", p_words(f.p)))
    if not math.isnan(f.p_adjusted):
        rows.append(("p, adjusted for the number of tests (Holm)", p_words(f.p_adjusted)))
    if not math.isnan(f.share):
        rows.append(("share of the total variance", f"{f.share:.0%}"))
    if f.caveat:
        rows.append(("what the design cannot tell", f.caveat))
    body = "".join(
        f"<tr><th>{html.escape(k)}</th><td>{html.escape(str(v))}</td></tr>" for k, v in rows
    )
    return (
        "<details class='qcx-card-statistics'><summary>The statistics behind it</summary>"
        f"<table>{body}</table></details>"
    )


def card(ev: Evidence, f: Finding, number: int) -> Card:
    """The card of one finding (``number`` makes its figure's place unique on the board)."""
    build = FIGURES.get(f.kind)
    figure = None
    if build is not None and build(ev, f) is not None:
        figure = Figure(f"finding-{number}", lambda: build(ev, f), f, (f.kind, f.factor))
    headline = (
        f"<div class='qcx-card-headline'>{html.escape(f.title)}</div>"
        f"<p class='qcx-card-sentence'>{html.escape(f.sentence)}</p>"
    )
    next_step = (
        f"<p class='qcx-card-next'><b>Next step:</b> {html.escape(f.next_step)}</p>"
        if f.next_step
        else ""
    )
    return Card(headline, figure, _statistics(f) + next_step, f.view)


class FindingsView(View):
    """The ranked findings of the study, each a card."""

    name = "findings"
    title = "What the data say"

    def compute(self, study: Study, options: Options | None) -> Board:
        return Board(tuple(study.findings()), study.evidence())

    def show(self, study: Study, result: Board) -> Shown:
        cards = tuple(card(result.evidence, f, i) for i, f in enumerate(result.findings))
        empty = "" if cards else "<p>No findings: nothing stands out beyond chance.</p>"
        cautioned = html.escape(caution(study.units, study.spec))
        return Shown(
            cards=cards,
            html=f"{empty}<p class='qcx-caution'><i>{cautioned}</i></p>",
            summary=plural(len(cards), "finding"),
        )

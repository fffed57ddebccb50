"""The findings told to a team: one sentence each, the view that shows it, and the variance split.

``findings.findings`` ranks and words the tests; this module adds what a workshop needs on top:
a sentence a team understands, the explorer settings that show the evidence
(``Finding.view``), and, whenever the variance components are estimable, a finding that says
where most of the variation comes from. It reads results only and computes nothing new.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace

from qcexplore.errors import QCDataError
from qcexplore.stats import plans
from qcexplore.stats.results import Evidence, Finding

#: Components smaller than this share are not named in the variance split.
NAMED_SHARE = 0.05


def _amount(x: float, unit: str) -> str:
    return f"{abs(x):.3g}{unit}"


def _other(factor: str) -> str:
    # Level names are never made plural by adding letters: a column may be called Linie.
    return f"the other {factor} levels"


def _change(f: Finding, unit: str) -> str:
    """The change of a level's difference over time in plain words (empty for an offset)."""
    if f.shape == "drift" and f.slope is not None:
        return f" Its output moves by {_amount(f.slope, unit)} a day from the time shown on."
    if f.shape == "step":
        return " Its difference began at the time shown: something changed then."
    return ""


def _sentence(f: Finding, unit: str, individuals: bool) -> str:
    """One sentence a team understands, in plain words, for a finding of each kind."""
    factor, level = f.factor or "", f.level or ""
    way = "higher" if f.effect > 0 else "lower"
    if f.explained_by:
        return f"This comes from another finding ({f.explained_by}): act on that one first."
    averages = "single values" if individuals else "subgroup averages"
    together = (
        f"Consecutive {averages} move together, so the process wanders; limits that assume "
        "independent points flag too many of them: look for a slow cause."
        if f.effect >= 0
        else f"Consecutive {averages} alternate, a high one after a low one: a sign of "
        "adjusting the process after every reading (common practice), or of two streams taken "
        "in turn."
    )
    words = {
        "measurement_offset": (
            f"{factor.capitalize()} {level} reads {_amount(f.effect, unit)} {way} than "
            f"{_other(factor)}. {factor.capitalize()} describes how the samples are taken or "
            "measured, so the readings move, not necessarily the product." + _change(f, unit)
        ),
        "stream_difference": (
            f"{factor.capitalize()} {level} puts out {_amount(f.effect, unit)} {way} on average "
            f"than {_other(factor)}: a difference in the product itself." + _change(f, unit)
        ),
        "spread_difference": (
            f"{factor.capitalize()} {level} varies more than {_other(factor)}: "
            "look at what is different about it."
        ),
        "process_shift": (
            f"The process average moved by {_amount(f.effect, unit)}: find out what changed "
            "at that time."
        ),
        "autocorrelation": together,
        "stratified_subgroups": (
            f"Each subgroup mixes {factor} levels that differ, which widens the ranges and "
            "hides changes between subgroups."
        ),
        "confounded": "Two causes change together in these data: they cannot be told apart.",
        "out_of_control": "The process is not stable over time: some points lie beyond the "
        "limits that its own short-term variation sets.",
        "capability": "This is how the output compares with the specification if the process "
        "runs as it did.",
    }
    return words.get(f.kind, "")


def _view(f: Finding) -> tuple[tuple[str, object], ...]:
    """The explorer settings that show a finding's evidence (view name first)."""
    if f.kind in ("measurement_offset", "stratified_subgroups") and f.factor:
        return (("view", "chart"), ("by", f.factor))
    if f.kind in ("stream_difference", "spread_difference") and f.factor:
        return (("view", "variation"), ("choice", f.factor))
    if f.kind in ("process_shift", "autocorrelation"):
        return (("view", "time"),)
    if f.kind == "capability":
        return (("view", "capability"),)
    if f.kind in ("confounded", "variance_split"):
        return (("view", "variation"),)
    return (("view", "chart"),)


def _component_sd(evidence: Evidence, source: str) -> float:
    v = evidence.variation
    if v is None:
        return math.nan
    rows = v.components[v.components["source"] == source]
    return float(rows["sd"].iloc[0]) if len(rows) else math.nan


def _typical_size(evidence: Evidence) -> int:
    return max(1, int(round(float(evidence.chart.points["n"].median()))))


def _levels_of(evidence: Evidence, factor: str) -> int:
    v = evidence.variation
    if v is None or factor not in v.comparisons:
        return 0
    table = v.comparisons[factor]
    return int(table.loc[table["test"] == "anom", "level"].nunique())


def _next_step(f: Finding, evidence: Evidence) -> str:
    """What study would settle the finding, sized from the measured variation (stats.plans).

    The variation within subgroups stands in for the repeatability of one reading: it holds
    the product's own variation too, so the numbers err on the side of enough.
    """
    unit = evidence.units
    within = _component_sd(evidence, "residual")
    try:
        if f.kind == "measurement_offset" and math.isfinite(within) and f.effect:
            return plans.comparison_plan(
                "paired", f.effect, within, smallest=abs(f.effect) / 2, units=unit,
                where=f"with {f.factor} {f.level} and with another {f.factor}",
            ).sentence  # fmt: skip
        if f.kind == "stream_difference" and math.isfinite(within) and f.effect:
            return plans.comparison_plan(
                "two_sample", f.effect, within, units=unit,
                where=f"from {f.factor} {f.level} and from another {f.factor}, side by side",
            ).sentence  # fmt: skip
        if f.kind == "confounded" and f.factor and evidence.variation is not None:
            other = next(iter(evidence.variation.confounded_with(f.factor)), None)
            a, b = _levels_of(evidence, f.factor), _levels_of(evidence, other or "")
            between = _component_sd(evidence, "subgroup")
            if other and a > 1 and b > 1 and math.isfinite(within):
                return plans.rotation_plan(
                    (f.factor, other), (a, b), within, units=unit,
                    between_variance=0.0 if not math.isfinite(between) else between**2,
                    within_sd=within, subgroup_size=_typical_size(evidence),
                    subgroup_word=evidence.subgroup or "subgroup",
                ).sentence  # fmt: skip
        if f.kind == "process_shift" and evidence.time is not None and len(evidence.time.shifts):
            series, shift = evidence.time.series, evidence.time.shifts.iloc[0]
            starts = series["start"] if "start" in series else None
            return plans.step_lookup(
                list(series["subgroup"]), int(shift["position"]), starts=starts,
                subgroup_word=evidence.subgroup or "subgroup",
            ).sentence  # fmt: skip
    except QCDataError:  # a difference too small to plan for: no plan is better than a wrong one
        return ""
    return _STEPS.get(f.kind, "")


#: The next step of findings whose plan needs no sizing.
_STEPS = {
    "autocorrelation": "Read the chart of the residuals about the fitted AR(1) and the moving "
    "centre line (Over time), and look for a slow cause: temperature, material lots, wear.",
    "out_of_control": "Look at the first points beyond the limits on the chart: what was "
    "different then? Leave out of the limits only what has a known cause.",
    "spread_difference": "Take a short run from that level alone and compare its spread with "
    "the others'; check its wear, setting or cleaning.",
    "stratified_subgroups": "Chart each level as its own series (split by it) so that the "
    "limits come from like with like.",
    "capability": "Settle the special causes first; then centre the process and reduce the "
    "largest source of variation.",
}


def _source_words(source: str, evidence: Evidence) -> str:
    if source == "residual":
        return "within subgroups (from one value to the next in the same subgroup)"
    if source == "subgroup":
        name = evidence.subgroup or "subgroup"
        return f"between {name}s (from one subgroup to the next)"
    return f"between {source} levels"


def variance_split(evidence: Evidence) -> list[Finding]:
    """Where most of the variation comes from, as one finding, when components are estimable.

    Examples
    --------
    >>> from qcexplore.demo import ROLES, filling_line
    >>> from qcexplore.study import Study
    >>> split = variance_split(Study(filling_line(days=7)[0], **ROLES).evidence())
    >>> split[0].kind, split[0].title.startswith("Most of the variation")
    ('variance_split', True)
    """
    v = evidence.variation
    if v is None or not len(v.components):
        return []
    table = v.components[v.components["share"].notna()]
    if not len(table) or not math.isfinite(float(table["share"].sum())):
        return []
    table = table.sort_values("share", ascending=False)
    top = table.iloc[0]
    rest = [
        f"{_source_words(r.source, evidence)} {r.share:.0%}"
        for r in table.iloc[1:].itertuples()
        if r.share >= NAMED_SHARE
    ]
    most = "Most of the variation" if top["share"] >= 0.5 else "The largest part of the variation"
    title = (
        f"{most} comes from {_source_words(top.source, evidence)}: {top['share']:.0%} of the total"
    )
    detail = (
        f"Variance components ({v.method or 'random-effects model'}): "
        f"{_source_words(top.source, evidence)} {top['share']:.0%}"
        + (f"; {'; '.join(rest)}" if rest else "")
        + "."
    )
    if top.source == "residual":
        step = (
            "Take the variation within subgroups apart: which stream, head or reading adds to "
            "it? A measurement-system study (qx.gauge_study) tells the measurement's share."
        )
    elif top.source == "subgroup":
        step = "Look at what changes from one subgroup to the next that no factor records yet."
    else:
        step = f"Compare the {top.source} levels (Where the variation comes from)."
    return [
        Finding(
            kind="variance_split",
            title=title,
            detail=detail,
            factor=None if top.source in ("residual", "subgroup") else str(top.source),
            effect=float(top["sd"]),
            share=float(top["share"]),
            strength=float(top["share"]),
            sentence="The largest source is where a change pays off most.",
            next_step=step,
            view=(("view", "variation"),),
        )
    ]


#: The board in the order a team should act: the causes the design can separate, then what
#: the data cannot separate, then the context (where the variation comes from, the time
#: structure, the chart's signals, and the findings another one accounts for), then the
#: specification.
CAUSES = (
    "measurement_offset", "stream_difference", "process_shift", "spread_difference",
    "stratified_subgroups",
)  # fmt: skip


def rank_group(f: Finding) -> int:
    """The finding's place in the order of the board (0 first; see ``CAUSES``)."""
    if f.kind in CAUSES and f.explained_by is None:
        return 0
    if f.kind == "confounded":
        return 1
    if f.kind == "capability":
        return 3
    return 2


def told(found: Sequence[Finding], evidence: Evidence) -> list[Finding]:
    """The findings with their sentence and view, in the board's order (:func:`rank_group`:
    the variance split opens the context)."""
    unit = f" {evidence.units}" if evidence.units else ""
    out = [
        replace(
            f,
            sentence=f.sentence or _sentence(f, unit, evidence.subgroup is None),
            view=f.view or _view(f),
            next_step=f.next_step or _next_step(f, evidence),
        )
        for f in found
    ]
    return sorted(variance_split(evidence) + out, key=rank_group)

"""Plain-language findings: what the evidence of a Study says, strongest first.

``findings(evidence)`` reads an :class:`~qcexplore.stats.results.Evidence` bundle (the
chart, the sources of variation, the time structure, capability and the tests computed
on them in ``qcexplore.stats.evidence``) and turns it into a short ranked list of
``Finding`` objects, each with a one-line title, the evidence in its detail (the effect
in the value's units and in within-subgroup sigma, the share of variance, the p-value,
the design caveat) and the factor and level it is about. It selects, ranks and words:
every test it cites was computed in ``qcexplore.stats``.

How a finding is decided
------------------------
Every candidate finding rests on one gate test of ``Evidence.tests`` (see
``qcexplore.stats.evidence``), all held at ``alpha`` together by Holm's method
(``p_adjusted``):

==================  ======================================================================
kind                gate test
==================  ======================================================================
measurement_offset  the factor's F test (``anova``)
stream_difference   the factor's F test (``anova``)
spread_difference   the factor's Brown-Forsythe test (``brown_forsythe``)
process_shift       each step of the time structure (``step``)
autocorrelation     the AR(1) coefficient (``ar1``)
out_of_control      points beyond the chart's limits (``beyond_limits``)
==================  ======================================================================

Inside a factor that passes its gate, the levels are named from the level tests
(``Evidence.levels``: offsets for measured_by factors, effects against the overall mean
for process factors, Holm-adjusted among that factor's levels); a level's
``p_adjusted`` is the larger of its factor's and its own adjusted p-value, so it is
reported only when both reject. Levels are named from the most extreme down, each
compared with the levels not yet named, and naming stops at the first level whose
difference from the rest is smaller than ``min_effect`` (this keeps the other nozzles
from being reported as "low" merely because one nozzle is high). A named level of a
process factor that varies within subgroups is dated by its onset
(``Evidence.onset``) when the onset test passes at ``alpha``. ``stratified_subgroups``
follows from a within-subgroup factor that passed its gate. ``confounded`` and
``capability`` are notes: they are not tests and carry no p-value.

Ranking
-------
``strength`` is the ranking key: for effects in the value's units (offsets, stream
differences, steps, the extra spread of one level) it is the absolute effect in
within-subgroup sigma (``effect_sd``); for autocorrelation the absolute lag-1
coefficient |phi|; for stratified subgroups the relative inflation of the
within-subgroup sigma; for out-of-control points the excess share of points beyond
the limits (a symptom whose causes rank above it). Notes have strength 0 and follow
every tested finding. The within-subgroup sigma is the one the default control chart
uses (R-bar/d2, s-bar/c4 or the moving range).

Findings support an investigation; product disposition and net-content compliance
follow local weights-and-measures rules and the site's quality system.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields, replace
from typing import Any

import numpy as np
import pandas as pd

from qcexplore.caution import caution
from qcexplore.data.coding import real_number
from qcexplore.stats.results import Evidence, Finding, Onset
from qcexplore.stats.results import p_text as _p
from qcexplore.stats.shape import ShapeFit
from qcexplore.story import rank_group, told

__all__ = ["KINDS", "Finding", "findings", "findings_frame"]

KINDS = (
    "measurement_offset",
    "process_shift",
    "stream_difference",
    "spread_difference",
    "autocorrelation",
    "stratified_subgroups",
    "confounded",
    "out_of_control",
    "capability",
    "variance_split",
)


#: The smallest effect worth reporting, in within-subgroup sigma, when min_effect is None.
DEFAULT_MIN_EFFECT_SD = 0.2
#: Ljung-Box lag quoted in the autocorrelation finding (or the largest lag computed).
_LJUNG_BOX_LAG = 10


def findings_frame(items: Sequence[Finding]) -> pd.DataFrame:
    """The findings as one tidy table, one row per finding, in the given order.

    Examples
    --------
    >>> findings_frame([Finding("confounded", "a", "b")])[["kind", "title"]].values.tolist()
    [['confounded', 'a']]
    """
    names = [f.name for f in fields(Finding)]
    return pd.DataFrame([item.to_dict() for item in items], columns=names)


# --------------------------------------------------------------------------- wording


def _num(x: float, digits: int = 3) -> str:
    return f"{x:.{digits}g}"


def _plural(name: str) -> str:
    """The other levels of a factor named without inventing a plural of its name (a column
    may be called Prüfer or Linie)."""
    return f"{name.replace('_', ' ')} levels"


def _label(factor: str, level: str) -> str:
    return f"{factor.replace('_', ' ')} {level}"


def _cap(text: str) -> str:
    return text[:1].upper() + text[1:]


def _when(start: Any, what: str = "subgroup") -> str:
    """A time as a day (and clock time), else ``what`` and the label (subgroup, time)."""
    if isinstance(start, (pd.Timestamp, np.datetime64)):
        t = pd.Timestamp(start)
        return f"{t:%a %d %b %Y}" if t == t.normalize() else f"{t:%a %d %b %Y %H:%M}"
    return f"{what} {start}"


@dataclass(frozen=True)
class _Context:
    evidence: Evidence
    alpha: float
    min_effect: float
    sigma: float
    unit: str
    n_tests: int

    @property
    def v(self) -> Any:
        return self.evidence.variation

    @property
    def ts(self) -> Any:
        return self.evidence.time

    def amount(self, x: float) -> str:
        return f"{_num(abs(x))}{self.unit}"

    def in_sigma(self, x: float) -> float:
        return x / self.sigma if self.sigma > 0 else math.nan


# --------------------------------------------------------------------------- factors


def _share(v: Any, name: str) -> float:
    row = v.components[v.components["source"] == name]
    return float(row["share"].iloc[0]) if len(row) else math.nan


def _named_levels(table: pd.DataFrame, ctx: _Context) -> list[tuple[int, float, float, float]]:
    """(row, effect, its se, Holm p among the factor's levels) for each level to name.

    The first level is the most extreme one (largest |estimate / se|), its effect taken
    against the mean of all other levels; each next level is compared with the levels
    not yet named. Naming stops at the first level that is not significant, differs
    from the rest by less than ``min_effect`` or has turned sign. The se is exact for
    balanced data: se * m / (m - 1) for m levels compared.
    """
    est = table["estimate"].to_numpy(dtype=np.float64)
    se = table["se"].to_numpy(dtype=np.float64)
    adjusted = table["p_adjusted"].to_numpy(dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        order = np.argsort(-np.nan_to_num(np.abs(est / se)), kind="stable")
    rest = list(range(est.size))
    out = []
    for i in order:
        others = [j for j in rest if j != i]
        if not others or not adjusted[i] < ctx.alpha:
            break
        effect = float(est[i] - est[others].mean())
        against_all = float(est[i] - np.delete(est, i).mean())
        if abs(effect) < ctx.min_effect or effect * against_all <= 0:
            break
        m = len(others) + 1
        out.append((int(i), effect, float(se[i] * m / (m - 1)), float(adjusted[i])))
        rest.remove(i)
    return out


def _design_caveat(ctx: _Context, factor: str, measured: bool) -> str:
    parts = []
    if ctx.evidence.subgroup is None:
        parts.append(
            f"Individual values: {factor} is tested against the value-to-value variation, "
            "which treats the values as independent"
            + ("" if measured else "; the level effects are not adjusted for other factors")
            + "."
        )
    elif ctx.v.relation(factor) == "between_subgroups":
        parts.append(
            f"{_cap(factor)} is constant within each subgroup, so it is tested against the "
            "subgroup-to-subgroup variation, not against single values"
            + ("" if measured else "; the level effects are not adjusted for other factors")
            + "."
        )
    else:
        parts.append(
            f"{_cap(factor)} changes inside the subgroups, so it is compared within subgroups "
            "(the subgroup as a block): what the subgroup shares cancels."
        )
        term = _error_term(ctx, factor)
        if term.startswith("subgroup x "):
            parts.append(
                f"It is tested against how its differences vary from subgroup to subgroup "
                f"({term}), so repeated values in one subgroup do not count as independent "
                "evidence."
            )
    for other in ctx.v.confounded_with(factor):
        parts.append(
            f"{_cap(factor)} is confounded with {other}: the data cannot tell {factor} from "
            f"{other} (see the confounded finding)."
        )
    return " ".join(parts)


def _error_term(ctx: _Context, factor: str) -> str:
    rows = ctx.v.anova[ctx.v.anova["source"] == factor]
    return str(rows["error_term"].iloc[0]) if len(rows) else ""


def _time_words(ctx: _Context, factor: str, level: str) -> tuple[str, str, bool]:
    """A title tail, a sentence, and whether the level cannot be told apart from a change
    of the process in time (``Evidence.time_confounding``); empty when it spans the record."""
    rows = ctx.evidence.time_rows(factor, level)
    if not len(rows):
        return "", "", False
    row = rows.sort_values("r2", ascending=False).iloc[0]
    start = row["start"] if pd.notna(row["start"]) else row["subgroup"]
    when = _when(start, "subgroup")
    label = _label(factor, level)
    side = "after" if row["share_after"] >= 0.5 else "before"
    if np.isfinite(row["offset_joint_se"]) and np.isfinite(row["step_joint_se"]):
        offset_se = f"se {_num(row['offset_joint_se'], 2)}; "
        step_se = f" (se {_num(row['step_joint_se'], 2)}, p = {_p(float(row['p_step_joint']))})"
    else:  # as many parameters as subgroups: nothing is left to estimate the noise
        offset_se, step_se = "", " (too few subgroups for a standard error)"
    fit = (
        f"estimated together with a step there, its offset is {row['offset_joint']:+.3g}"
        f"{ctx.unit} ({offset_se}{row['offset_alone']:+.3g}{ctx.unit} on its own) and the "
        f"step {row['step_joint']:+.3g}{ctx.unit}{step_se}"
    )
    if row["confounded"]:
        return (
            f", or the process changed around {when}: the data cannot tell them apart",
            f"{_cap(label)} appears only {side} {when}, and the levels of {factor} go with "
            f"that period (R^2 = {row['r2']:.2f}): a difference of {label} and a change of "
            f"the process at that time explain the same data ({fit}). Both explanations "
            "stand until a period where they are crossed is recorded.",
            True,
        )
    return (
        "",
        f"{_cap(label)} appears only {side} {when}; {fit}, so the comparison rests on the "
        f"other {_plural(factor)} seen on both sides (R^2 = {row['r2']:.2f}).",
        False,
    )


def _onset_words(ctx: _Context, found: Onset | None) -> tuple[str, Any]:
    """Words and start of the onset of one level's difference, if the change is clear.

    The onset model (step or ramp, ``stats.onset``) must beat a constant difference:
    its p-value, allowing for the search over onsets, below ``alpha``.
    """
    if found is None or not np.isfinite(found.p):
        return "", None
    p = found.p
    if not p < ctx.alpha:
        return (
            " The difference shows no clear onset within the record "
            f"(best {found.model} fit p = {_p(p)}, searched over the onsets).",
            None,
        )
    start = pd.Timestamp(found.start) if found.scale == "day" else found.start
    per = "per day" if found.scale == "day" else "per subgroup"
    shape = (
        f"as a ramp of {_num(found.change)}{ctx.unit} {per}"
        if found.model == "ramp"
        else f"as a step of {found.change:+.3g}{ctx.unit}"
    )
    return (
        f" Compared within subgroups, the difference appears to start around "
        f"{_when(start)}, {shape} (least-squares {found.model} fit of the "
        f"within-subgroup contrast; better than a constant difference, p = {_p(p)} "
        "after allowing for the search over onsets).",
        start,
    )


def _shape_told(ctx: _Context, fit: ShapeFit | None) -> tuple[str, Any, float | None, str]:
    """How a level's difference changes over time: a title tail for a step or a drift, its
    start and slope, and the words behind the choice of shape (``stats.changes``)."""
    if fit is None:
        return "", None, None, ""
    behind = (
        f" Of a constant difference, a step and a drift, the {fit.shape} fits best "
        f"({fit.CRITERION}; {fit.margin:.1f} better than the next; AR(1) phi {fit.phi:.2f}, "
        f"noise sd {fit.noise_sd:.3g}{ctx.unit})."
    )
    if fit.shape == "drift" and fit.slope is not None:
        word = "up" if fit.slope > 0 else "down"
        per = "day" if fit.slope_unit == "day" else "subgroup"
        return (
            f"drifts {word} by {abs(fit.slope):.2g}{ctx.unit} a {per} from around "
            f"{_when(fit.start)}",
            fit.start,
            fit.slope,
            behind,
        )
    if fit.shape == "step" and fit.step is not None:
        word = "up" if fit.step > 0 else "down"
        return (
            f"stepped {word} by {abs(fit.step):.3g}{ctx.unit} around {_when(fit.start)}",
            fit.start,
            None,
            behind,
        )
    return "", None, None, behind


def _level_finding(
    ctx: _Context,
    factor: str,
    table: pd.DataFrame,
    named: tuple[int, float, float, float],
    p_gate: float,
    measured: bool,
) -> Finding:
    i, effect, se, p_level = named
    level = str(table["level"].iloc[i])
    estimate = float(table["estimate"].iloc[i])
    k = len(table)
    label, plural = _label(factor, level), _plural(factor)
    word = "higher" if effect > 0 else "lower"
    share = _share(ctx.v, factor)
    effect_sd = ctx.in_sigma(effect)
    p_adjusted = max(p_gate, p_level)
    caveat = _design_caveat(ctx, factor, measured)
    if _time_words(ctx, factor, level)[2]:
        caveat += f" {_cap(_label(factor, level))} cannot be told apart from a change in time."
    evidence = (
        f"{_cap(label)} differs by {effect:+.3g}{ctx.unit} (se {_num(se, 2)}) from the mean of the "
        f"other {plural}, {effect_sd:+.2f} within-subgroup sigma"
    )
    time_tail, time_sentence, in_time = _time_words(ctx, factor, level)
    fit = ctx.evidence.shapes.of(factor, level) if ctx.evidence.shapes is not None else None
    changing, start, slope, shape_detail = _shape_told(ctx, fit)
    if measured:
        title = (
            f"{_cap(label)}'s readings {changing}"
            if changing
            else f"{_cap(label)}'s readings are {ctx.amount(effect)} {word} than those of the "
            f"other {plural}"
        )
        twins = ctx.v.confounded_with(factor)
        if twins:
            # The data cannot say whether the sampling or the confounded factor moved the
            # readings: the title must not claim a measurement offset on its own.
            title += f", or {' and '.join(twins)} did it: the data cannot tell them apart"
        evidence += (
            f"; its sum-to-zero offset against the average of all {k} {plural} is "
            f"{estimate:+.3g}{ctx.unit}, and the difference from the others is that offset "
            f"times {k}/{k - 1}."
            + (
                " If it is the process that changed, the product changed too."
                if in_time
                else " A measurement offset moves the readings, not the product."
            )
        )
        onset = ""
    else:
        title = (
            f"{_cap(label)} {changing}"
            if changing
            else f"{_cap(label)} runs {ctx.amount(effect)} {word} than the other {plural}"
        )
        evidence += f"; its effect against the overall mean is {estimate:+.3g}{ctx.unit}."
        onset = ""
        if fit is None and ctx.v.relation(factor) == "within_subgroup":
            onset, start = _onset_words(ctx, ctx.evidence.onset(factor, level))
            if start is not None:
                title += f", from around {_when(start)}"
    title += time_tail
    parts = [evidence + onset + shape_detail] + ([time_sentence] if time_sentence else [])
    if np.isfinite(share):
        parts.append(f"{_cap(factor)} accounts for {share:.0%} of the total variance.")
    parts.append(
        f"p = {_p(float(table['p'].iloc[i]))} for the level; adjusted p = {_p(p_adjusted)} "
        f"(Holm over {ctx.n_tests} tests, and among the {k} {plural})."
    )
    parts.append(caveat)
    return Finding(
        kind="measurement_offset" if measured else "stream_difference",
        title=title,
        detail=" ".join(parts),
        factor=factor,
        level=level,
        effect=effect,
        p=float(table["p"].iloc[i]),
        share=share,
        effect_sd=effect_sd,
        se=se,
        p_adjusted=p_adjusted,
        strength=abs(effect_sd),
        start=start,
        caveat=caveat,
        shape=None if fit is None else fit.shape,
        slope=slope,
    )


def _stratified(ctx: _Context, factor: str, p_gate: float, min_share: float) -> list[Finding]:
    comps = ctx.v.components.set_index("source")["variance"]
    if factor not in comps.index or "residual" not in comps.index:
        return []
    c, r = float(comps[factor]), float(comps["residual"])
    if not (r > 0 and c / (c + r) >= min_share):
        return []
    frac = c / (c + r)
    inflation = math.sqrt((c + r) / r)
    plural = _plural(factor)
    return [
        Finding(
            kind="stratified_subgroups",
            title=f"Subgroups mix {plural}: the limits are about {inflation - 1:.0%} too wide",
            detail=(
                f"{_cap(factor)} changes inside the subgroups and its levels differ, so the "
                f"within-subgroup variation that sets the limits holds the {factor} "
                f"differences too: the {factor} variance component is {frac:.0%} of the "
                "within-subgroup variance, which inflates the within-subgroup sigma by "
                f"sqrt((component + residual) / residual) = {inflation:.3f}. The limits are "
                "too wide and the points hug the centre line, hiding changes over time. "
                f"Chart each {factor} separately, or form subgroups of one {factor}. "
                f"Adjusted p = {_p(p_gate)} for the {factor} test (Holm)."
            ),
            factor=factor,
            effect=inflation - 1.0,
            p=math.nan,
            share=frac,
            p_adjusted=p_gate,
            strength=inflation - 1.0,
        )
    ]


def _factor_findings(ctx: _Context, factor: str, p_gate: float, min_share: float) -> list[Finding]:
    measured = factor in ctx.evidence.measured_by
    levels = ctx.evidence.levels
    table = levels[levels["factor"] == factor].reset_index(drop=True)
    # A factor nested in the subgroups (each level inside one subgroup) has levels that
    # are one-off units, not streams that run on: naming them says nothing for tomorrow.
    inner = ctx.evidence.subgroup is not None and ctx.v.nested_in(factor) == ctx.evidence.subgroup
    out = [
        _level_finding(ctx, factor, table, named, p_gate, measured)
        for named in ([] if inner else _named_levels(table, ctx))
    ]
    if ctx.v.relation(factor) == "within_subgroup":
        out += _stratified(ctx, factor, p_gate, min_share)
    return out


# --------------------------------------------------------------------------- spread


def _spread_findings(ctx: _Context, factor: str, p: float, p_adjusted: float) -> list[Finding]:
    table = ctx.evidence.level_spread
    table = table[table["factor"] == factor]
    levels = table["level"].to_numpy()
    sd, rest = table["sd"].to_numpy(dtype=np.float64), table["others_sd"].to_numpy(dtype=np.float64)
    if not np.isfinite(sd).any():
        return []
    i = int(np.nanargmax(sd))
    effect = float(sd[i] - rest[i])
    if not effect >= ctx.min_effect:
        return []
    level = str(levels[i])
    label, plural = _label(factor, level), _plural(factor)
    caveat = (
        "A level whose mean moved over time also looks more spread, since its deviations "
        "from the subgroup means grow with the move; read this with any difference or "
        f"drift of {label}."
    )
    return [
        Finding(
            kind="spread_difference",
            title=f"{_cap(label)} varies more than the other {plural}",
            detail=(
                f"Within subgroups, {label} has a standard deviation of {_num(sd[i])}{ctx.unit} "
                f"against {_num(rest[i])}{ctx.unit} for the other {plural} "
                f"({ctx.in_sigma(effect):+.2f} within-subgroup sigma). Brown-Forsythe test "
                f"of equal spread across the {plural}: p = {_p(p)}, adjusted p = "
                f"{_p(p_adjusted)} (Holm over {ctx.n_tests} tests). {caveat}"
            ),
            factor=factor,
            level=level,
            effect=effect,
            p=p,
            share=_share(ctx.v, factor),
            effect_sd=ctx.in_sigma(effect),
            p_adjusted=p_adjusted,
            strength=abs(ctx.in_sigma(effect)),
            caveat=caveat,
        )
    ]


# --------------------------------------------------------------------------- time


def _adjusted_words(evidence: Evidence) -> str:
    if not evidence.measured_by:
        return ""
    return f" (after removing the {', '.join(evidence.measured_by)} offsets)"


def _bic(ts: Any) -> dict[str, float]:
    """The BIC of each level model of the time structure, by name."""
    return dict(zip(ts.level_models["model"], ts.level_models["bic"], strict=True))


def _process_shift(
    ctx: _Context,
    row: Any,
    p_adjusted: float,
    *,
    effect: float,
    start: Any,
    caveat: str,
    title: str,
    detail: str,
    shape: str,
    slope: float | None = None,
) -> list[Finding]:
    """The process_shift finding of a confirmed change (its gate: the step test's row)."""
    return [
        Finding(
            kind="process_shift",
            shape=shape,
            slope=slope,
            title=title,
            detail=detail,
            effect=effect,
            p=float(row.p),
            effect_sd=ctx.in_sigma(effect),
            p_adjusted=p_adjusted,
            strength=abs(ctx.in_sigma(effect)),
            start=start,
            caveat=caveat,
        )
    ]


def _drift_finding(ctx: _Context, row: Any, p_adjusted: float) -> list[Finding]:
    ts = ctx.ts
    drift = next(ts.drift.itertuples())
    effect = float(drift.after - drift.before)
    if abs(effect) < ctx.min_effect:
        return []
    timed = pd.notna(drift.time)
    start, what = (drift.time, "time") if timed else (drift.subgroup, "subgroup")
    days = (ts.series["start"].iloc[-1] - drift.time) / pd.Timedelta(days=1) if timed else 0.0
    slope = effect / days if days > 0 else float(drift.slope)
    rate = f"{slope:+.3g}{ctx.unit} per {'day' if days > 0 else 'subgroup'}"
    bic, steps = _bic(ts), len(ts.shifts)
    word = "up" if effect > 0 else "down"
    caveat = (
        "The drift is a straight line from an onset fitted to the subgroup averages: the "
        "onset is where the line bends, which a slow start or autocorrelation can move."
    )
    return _process_shift(
        ctx,
        row,
        p_adjusted,
        effect=effect,
        start=start,
        caveat=caveat,
        shape="drift",
        slope=slope,
        title=f"The process average drifted {word} by {ctx.amount(effect)} from around "
        f"{_when(start, what)}",
        detail=(
            f"The subgroup averages{_adjusted_words(ctx.evidence)} move from "
            f"{_num(drift.before, 6)}{ctx.unit} to {_num(drift.after, 6)}{ctx.unit} "
            f"({effect:+.3g}{ctx.unit}, {ctx.in_sigma(effect):+.2f} within-subgroup sigma) "
            f"as a ramp of {rate} from subgroup {drift.subgroup} on. The ramp fits the "
            f"change better than {steps} step{'s' if steps > 1 else ''} (BIC "
            f"{bic['drift']:.1f} against {bic['steps']:.1f}, AR(1) likelihood of the "
            "residuals). The CUSUM test with binary segmentation confirms a change: p = "
            f"{_p(row.p)}, adjusted p = {_p(p_adjusted)} (Holm over {ctx.n_tests} tests). "
            f"{caveat}"
        ),
    )


def _shift_finding(ctx: _Context, row: Any, p_adjusted: float) -> list[Finding]:
    ts = ctx.ts
    if "drift" in ts.explanation:
        # One drift, however many steps the segmentation cut it into: worded once, on the
        # step whose test confirms the change most strongly.
        strongest = row.position == ts.shifts.loc[ts.shifts["p"].idxmin(), "position"]
        return _drift_finding(ctx, row, p_adjusted) if strongest else []
    effect = float(row.after - row.before)
    if abs(effect) < ctx.min_effect:
        return []
    start, what = (row.time, "time") if pd.notna(row.time) else (row.subgroup, "subgroup")
    word = "up" if effect > 0 else "down"
    bic = _bic(ts)
    gradual = ""
    # A BIC difference under 2 is "not worth more than a bare mention" (Kass and Raftery
    # 1995, from memory): the data then prefer the steps to a drift hardly at all.
    if bic["drift"] - bic["steps"] < 2.0:
        onset = int(ts.level_models.set_index("model").loc["drift", "position"])
        gradual = (
            " A drift (a ramp from subgroup "
            f"{ts.series['subgroup'].iloc[onset]} on) fits almost as well (BIC "
            f"{bic['drift']:.1f} against {bic['steps']:.1f}), so the change may be gradual."
        )
    caveat = (
        "The step test reads the subgroup averages only, and the time found is where the "
        "averages before and after differ most."
    )
    return _process_shift(
        ctx,
        row,
        p_adjusted,
        effect=effect,
        start=start,
        caveat=caveat,
        shape="step",
        title=f"The process average stepped {word} by {ctx.amount(effect)} around "
        f"{_when(start, what)}",
        detail=(
            f"The subgroup averages{_adjusted_words(ctx.evidence)} moved from "
            f"{_num(row.before, 6)}{ctx.unit} to {_num(row.after, 6)}{ctx.unit} "
            f"({effect:+.3g}{ctx.unit}, {ctx.in_sigma(effect):+.2f} within-subgroup sigma) "
            f"from subgroup {row.subgroup}. CUSUM test with binary segmentation: p = "
            f"{_p(row.p)}, adjusted p = {_p(p_adjusted)} (Holm over {ctx.n_tests} tests)."
            f"{gradual} {caveat}"
        ),
    )


_ABOUT = {"steps": " about the fitted steps", "drift": " about the fitted drift", "mean": ""}


def _autocorrelation_finding(ctx: _Context, p: float, p_adjusted: float) -> list[Finding]:
    ts = ctx.ts
    if "autocorrelation" not in ts.explanation:
        # Correlated about the mean only, while a step or a drift would leave independent
        # residuals: that is no evidence of autocorrelation (see TimeResult.explanation).
        return []
    phi, se = ts.ar1.phi, ts.ar1.se
    points = "single values" if ctx.evidence.subgroup is None else "subgroup averages"
    n = len(ts.series)
    chosen = str(ts.level_models.loc[ts.level_models["chosen"], "model"].iloc[0])
    about = _ABOUT[chosen]
    spread = f"se {se:.3f}, " if np.isfinite(se) else ""
    if chosen == "mean":
        lb = ts.ljung_box
        lb_row = lb[lb["lag"] == min(_LJUNG_BOX_LAG, int(lb["lag"].max()))].iloc[0]
        evidence = (
            f"; Ljung-Box Q = {lb_row['q']:.1f} over {int(lb_row['lag'])} lags, "
            f"p = {_p(lb_row['p'])}. The correlation stays when the best single step or the "
            f"best drift is removed (largest p = {_p(ts.autocorrelation_p)}), so it is not "
            "one change in level."
        )
    else:
        raw = ts.level_models.set_index("model").loc["mean", "phi"]
        evidence = (
            f". Judged about the fitted {chosen}, so the change in level does not count as "
            f"correlation (about the overall mean, phi = {raw:.3f})."
        )
    if phi >= 0:
        behave, title = "follow their neighbours", "are correlated"
        caveat = (
            "Limits from within-subgroup variation assume independent averages; when the "
            "level wanders they flag more points than the nominal rate."
        )
    else:
        behave, title = "alternate, a high one tending to follow a low one,", "alternate"
        caveat = (
            "Alternating averages are typical of a process adjusted after each reading "
            "(common practice); limits that assume independent averages then mislead."
        )
    return [
        Finding(
            kind="autocorrelation",
            title=f"Consecutive {points} {title}{about} (phi = {phi:.2f})",
            detail=(
                f"The {points}{_adjusted_words(ctx.evidence)} {behave}"
                f"{about}: lag-1 autocorrelation phi = {phi:.3f} ({spread}AR(1) fit), "
                f"likelihood-ratio p = {_p(p)}, adjusted p = {_p(p_adjusted)} (Holm over "
                f"{ctx.n_tests} tests){evidence} The {n} {points} carry about as much "
                f"information as {ts.effective_n:.0f} independent ones (N(1 - phi)/(1 + phi)). "
                f"{caveat}"
            ),
            effect=phi,
            p=p,
            se=se,
            p_adjusted=p_adjusted,
            strength=abs(phi),
            caveat=caveat,
        )
    ]


# --------------------------------------------------------------------------- chart


def _out_of_control_finding(ctx: _Context, p: float, p_adjusted: float) -> list[Finding]:
    chart, beyond = ctx.evidence.chart, ctx.evidence.beyond
    count, n, rate = beyond.count, beyond.points, beyond.rate
    between = _share(ctx.v, "subgroup") if ctx.v is not None else math.nan
    wander = (
        f" The subgroup-to-subgroup variation beyond what the within-subgroup variation "
        f"explains (the subgroup variance component) is {between:.0%} of the total variance."
        if between > 0
        else ""
    )
    caveat = (
        "Points beyond the limits say that something changed, not what: autocorrelation, "
        "a measurement offset or subgroups that mix streams can put them there."
    )
    return [
        Finding(
            kind="out_of_control",
            title=f"{count} of {n} points lie beyond the control limits "
            f"({n * rate:.1f} expected by chance)",
            detail=(
                f"On the default chart ({chart.title or chart.kind}), {count} of {n} points "
                f"({count / n:.1%}) lie beyond the limits, against {rate:.2%} for a stable "
                f"normal process. One-sided binomial test: p = {_p(p)}, adjusted p = "
                f"{_p(p_adjusted)} (Holm over {ctx.n_tests} tests).{wander} {caveat}"
            ),
            effect=count / n,
            p=p,
            p_adjusted=p_adjusted,
            strength=max(count / n - rate, 0.0),
            caveat=caveat,
        )
    ]


def _explained(ctx: _Context, found: list[Finding]) -> list[Finding]:
    """One cause, one card: a process change that a named level's change accounts for, and a
    spread difference of a level that steps or drifts, point to that level's finding and
    stand behind the causes (``explained_by``)."""
    shapes = ctx.evidence.shapes
    causes = {
        (f.factor, f.level): f
        for f in found
        if f.kind in ("stream_difference", "measurement_offset") and f.shape in ("step", "drift")
    }
    explaining = [causes[k] for k in (shapes.explaining() if shapes else []) if k in causes]
    out = []
    for f in found:
        if f.kind == "process_shift" and explaining:
            cause = explaining[0]
            label = _label(cause.factor or "", cause.level or "")
            f = replace(
                f,
                title=f"{f.title}: this is {label}'s {cause.shape} seen in the averages",
                detail=f"{f.detail} With {label}'s fitted {cause.shape} taken out of the "
                "subgroup averages (in proportion to its share of each subgroup), the same test "
                "finds no change of the process (stats.streams.explains).",
                explained_by=cause.title,
            )
        elif f.kind == "spread_difference" and (f.factor, f.level) in causes:
            cause = causes[(f.factor, f.level)]
            f = replace(
                f,
                detail=f"{f.detail} A level whose output {cause.shape}s over the record looks "
                f"more spread out for that reason alone: read it with the {cause.shape} "
                "finding first.",
                explained_by=cause.title,
            )
        out.append(f)
    return out


def _cross_references(ctx: _Context, found: list[Finding]) -> list[Finding]:
    """Point each symptom to the findings that can cause it."""
    kinds = {f.kind for f in found}
    drifts = [
        f
        for f in found
        if f.kind == "stream_difference" and f.start is not None and f.explained_by is None
    ]
    out = []
    for f in found:
        extra = ""
        if f.kind == "out_of_control":
            causes = [
                k.replace("_", " ")
                for k in ("autocorrelation", "measurement_offset", "process_shift")
                if k in kinds
            ]
            if causes:
                head, last = ", ".join(causes[:-1]), causes[-1]
                listed = f"{head} and {last}" if head else last
                extra = f" Read it with the {listed} finding{'s' if head else ''}."
            adjusted = ctx.evidence.beyond_adjusted
            if "measurement_offset" in kinds and adjusted is not None:
                count, n = adjusted.count, adjusted.points
                extra += (
                    f" With the measured_by offsets removed, {count} of {n} points lie beyond "
                    "the limits."
                )
        elif f.kind in ("process_shift", "autocorrelation") and drifts and not f.explained_by:
            names = ", ".join(f"{_label(d.factor, d.level)}" for d in drifts)
            extra = f" The change found in {names} (see its finding) moves the average too."
        elif f.kind == "spread_difference" and any(
            d.factor == f.factor and d.level == f.level for d in found if d is not f
        ):
            label = _cap(_label(f.factor, f.level))
            extra = f" {label} also differs in its mean (see that finding)."
        out.append(replace(f, detail=f.detail + extra) if extra else f)
    return out


# --------------------------------------------------------------------------- notes


def _confounded_notes(ctx: _Context) -> list[Finding]:
    rows = ctx.v.structure[ctx.v.structure["relation"] == "confounded"]
    seen: set[frozenset[str]] = set()
    out = []
    for row in rows.itertuples():
        pair = frozenset((str(row.factor), str(row.with_)))
        if pair in seen:
            continue
        seen.add(pair)
        order = list(ctx.evidence.factors)
        # A factor with one subgroup per level is confounded with the subgroup column, which
        # is no factor: the subgroup comes first, as the joint model keeps it.
        a, b = sorted(
            (str(row.factor), str(row.with_)),
            key=lambda name: order.index(name) if name in order else -1,
        )
        out.append(
            Finding(
                kind="confounded",
                title=f"{_cap(a)} and {b} cannot be told apart",
                detail=(
                    f"The levels of {a} and {b} go together in these data ({row.note}), so a "
                    f"difference seen for one may as well belong to the other: the joint model "
                    f"keeps {a} and leaves {b} out, and any {a} finding is as much about {b}. "
                    f"To separate them, record them crossed (for example, let each {a} use "
                    f"more than one {b} for a while)."
                ),
                factor=a if a in order else b,
                caveat=f"The data cannot tell {a} from {b}.",
            )
        )
    return out


def _nesting_notes(ctx: _Context) -> list[Finding]:
    """Labels that look nested: the data cannot tell them from a crossed factor whose
    effect changes from subgroup to subgroup."""
    table = ctx.v.nesting
    if not len(table):
        return []
    out = []
    for row in table[table["kind"] == "probably_nested"].itertuples():
        out.append(
            Finding(
                kind="confounded",
                title=f"{_cap(row.factor)} labels look nested in the {row.parent} subgroups",
                detail=(
                    f"{_cap(row.note)} Until that is settled, read the {row.factor} results "
                    f"as the variation between {_plural(row.factor)} inside each subgroup, "
                    "not as a difference between named levels."
                ),
                factor=row.factor,
                caveat=(
                    f"The data cannot tell nested {row.factor} labels from a {row.factor} "
                    "effect that changes from subgroup to subgroup."
                ),
            )
        )
    return out


def _time_notes(ctx: _Context) -> list[Finding]:
    """Levels that cannot be told apart from a change of the process in time."""
    table = ctx.evidence.time_confounding
    if not len(table):
        return []
    out = []
    rows = table[table["confounded"]].sort_values("r2", ascending=False)
    for (factor, level), group in rows.groupby(["factor", "level"], sort=False):
        _, sentence, _ = _time_words(ctx, str(factor), str(level))
        label = _label(str(factor), str(level))
        out.append(
            Finding(
                kind="confounded",
                title=f"{_cap(label)} and a change of the process in time cannot be told apart",
                detail=(
                    f"{sentence} A step in the process average at that time and an offset of "
                    f"{label} are two readings of the same data; the step search keeps "
                    f"the {factor} offsets in the series for that reason."
                    if factor in ctx.evidence.measured_by
                    else sentence
                ),
                factor=str(factor),
                level=str(level),
                start=group["start"].iloc[0] if pd.notna(group["start"].iloc[0]) else None,
                caveat=f"The data cannot tell {label} from a change in time.",
            )
        )
    return out


def _capability_note(ctx: _Context) -> list[Finding]:
    cap = ctx.evidence.capability
    if cap is None:
        return []
    count = ctx.evidence.beyond.count
    name = "ppk" if count else "cpk"
    rows = cap.indices[cap.indices["index"] == name]
    if not len(rows):
        return []
    row = rows.iloc[0]
    ppm = cap.ppm[cap.ppm["side"] == "total"]
    expected = float(ppm["expected"].iloc[0]) if len(ppm) else math.nan
    why = (
        "Ppk (overall sigma), since points lie beyond the control limits and Cpk would not "
        "predict the output"
        if count
        else "Cpk (within-subgroup sigma), the process showing no points beyond the limits"
    )
    limits = ", ".join(
        f"{w} {_num(x, 6)}{ctx.unit}"
        for w, x in (("LSL", cap.lsl), ("USL", cap.usl))
        if x is not None
    )
    warnings = list(cap.warnings)
    # The caution chosen by the data: for a fill quantity, net content is a legal matter.
    cautioned = caution(ctx.evidence.units, cap)
    return [
        Finding(
            kind="capability",
            title=f"{name.capitalize()} = {row['value']:.2f} ({row['lower']:.2f} to "
            f"{row['upper']:.2f}) against {limits}; about "
            f"{expected:,.0f} ppm expected outside",
            detail=(
                f"{why}: {name.capitalize()} = {row['value']:.3f} (95 % interval "
                f"{row['lower']:.3f} to {row['upper']:.3f}); expected {expected:,.0f} ppm "
                f"outside the specification under a normal model. {' '.join(warnings)} "
                f"{cautioned}"
            ).replace("  ", " "),
            effect=float(row["value"]),
            se=math.nan,
            caveat=cautioned,
        )
    ]


# --------------------------------------------------------------------------- entry point

_Make = Callable[[_Context, float], list[Finding]]


def _maker(ctx: _Context, test: Any, min_share: float) -> _Make:
    """The finding that one gate test of the family stands for, made from its adjusted p."""
    if test.test == "anova":
        return lambda c, pa: _factor_findings(c, test.factor, pa, min_share)
    if test.test == "brown_forsythe":
        return lambda c, pa: _spread_findings(c, test.factor, test.p, pa)
    if test.test == "step":
        shifts = ctx.ts.shifts
        row = next(shifts[shifts["position"] == test.position].itertuples())
        return lambda c, pa: _shift_finding(c, row, pa)
    if test.test == "ar1":
        return lambda c, pa: _autocorrelation_finding(c, test.p, pa)
    return lambda c, pa: _out_of_control_finding(c, test.p, pa)


def findings(
    evidence: Evidence,
    *,
    alpha: float = 0.05,
    min_effect: float | None = None,
    min_share: float = 0.10,
) -> list[Finding]:
    """Ranked plain-language findings of the evidence of a Study, strongest first.

    Parameters
    ----------
    evidence : the results and their tests (``Study.evidence()``, or
        ``qcexplore.stats.evidence.collect_evidence`` on results computed without a Study)
    alpha : family-wise error rate over all tested candidates (Holm's method); a level
        of a factor is named only when its factor's test and its own test both pass
    min_effect : the smallest effect worth reporting, in the value's units (a level's
        difference from the others, a step, the extra spread of one level); ``None``
        means 0.2 within-subgroup sigma (the sigma of the default control chart)
    min_share : a within-subgroup factor is reported as mixing the subgroups when its
        variance component is at least this share of the within-subgroup variance

    Returns
    -------
    list of Finding, tested findings by decreasing ``strength``, then the notes
    (``confounded``, ``capability``). See the module docstring for the tests, the
    multiple-testing control and the ranking.

    Checked by simulation on the demo filling line (tests/test_findings.py): the planted
    crew offset, nozzle drift and autocorrelation are found; with every effect off, each
    kind appears in no more of 20 seeds than alpha allows.

    Examples
    --------
    >>> import qcexplore as qx
    >>> from qcexplore.demo import filling_line
    >>> s = qx.Study(filling_line()[0], value="net_g", subgroup="round", time="taken_at",
    ...              factors=["crew", "nozzle"], measured_by=["crew"], units="g")
    >>> first, second = findings(s.evidence())[:2]  # the causes first
    >>> (first.kind, first.level), (second.kind, second.level, second.shape)
    (('measurement_offset', 'B'), ('stream_difference', '4', 'drift'))
    """
    alpha = real_number("alpha", alpha, lower=0, upper=1, inclusive=False, what="a level")
    if min_effect is not None:
        min_effect = real_number(
            "min_effect", min_effect, lower=0, what="an effect in the value's units (or None)"
        )
    min_share = real_number("min_share", min_share, lower=0, upper=1, what="a share")
    sigma = float(evidence.chart.limits["sigma"].iloc[0])
    ctx = _Context(
        evidence=evidence,
        alpha=alpha,
        min_effect=DEFAULT_MIN_EFFECT_SD * sigma if min_effect is None else min_effect,
        sigma=sigma,
        unit=f" {evidence.units}" if evidence.units else "",
        n_tests=len(evidence.tests),
    )
    found: list[Finding] = []
    for test in evidence.tests.itertuples():
        if test.p_adjusted < alpha:
            found += _maker(ctx, test, min_share)(ctx, float(test.p_adjusted))
    found = _cross_references(ctx, _explained(ctx, found))
    notes = (
        _confounded_notes(ctx) + _nesting_notes(ctx) + _time_notes(ctx) if ctx.v is not None else []
    ) + _capability_note(ctx)
    return told(sorted(found + notes, key=lambda f: (rank_group(f), -f.strength)), evidence)

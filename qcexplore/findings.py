"""Plain-language findings: what the results of a Study say, strongest first.

``findings(study)`` reads the Study's cached results (the chart, the sources of
variation, the time structure, capability) and turns them into a short ranked list
of ``Finding`` objects, each with a one-line title, the evidence in its detail (the
effect in the value's units and in within-subgroup sigma, the share of variance, the
p-value, the design caveat) and the factor and level it is about.

How a finding is decided
------------------------
Every candidate finding rests on one *gate* test taken from the results:

==================  ======================================================================
kind                gate test
==================  ======================================================================
measurement_offset  the factor's F test in ``variation().anova`` (its own error term)
stream_difference   the factor's F test in ``variation().anova`` (its own error term)
spread_difference   the factor's Brown-Forsythe test in ``variation().spread``
process_shift       each step in ``time_structure().shifts`` (CUSUM, binary segmentation)
autocorrelation     the AR(1) coefficient: z = phi / se(phi), two-sided
out_of_control      points beyond the chart's limits against the rate 2 * P(Z > L) of a
                    stable normal process (one-sided binomial test)
==================  ======================================================================

The gate p-values of all candidates form one family whose family-wise error rate is
held at ``alpha`` by Holm's step-down method (``p_adjusted``). Inside a factor that
passes its gate, the levels are named from the level tests (``offsets`` for
measured_by factors, the ``effect`` rows of ``comparisons`` for process factors),
again Holm-adjusted among that factor's levels; a level's ``p_adjusted`` is the
larger of its factor's and its own adjusted p-value, so it is reported only when both
reject. Levels are named from the most extreme down, each compared with the levels not
yet named, and naming stops at the first level whose difference from the rest is
smaller than ``min_effect`` (this keeps the other nozzles from being reported as
"low" merely because one nozzle is high). ``stratified_subgroups`` follows from a
within-subgroup factor that passed its gate. ``confounded`` and ``capability`` are
notes: they are not tests and carry no p-value.

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

import html
import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.errors import QCDataError
from qcexplore.stats.onset import stream_onset
from qcexplore.stats.subgroups import group_moments

__all__ = ["CAUTION", "KINDS", "Finding", "findings", "findings_frame", "holm"]

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
)

CAUTION = (
    "Findings support an investigation; product disposition and net-content compliance "
    "follow local weights-and-measures rules and the site's quality system."
)

#: The smallest effect worth reporting, in within-subgroup sigma, when min_effect is None.
DEFAULT_MIN_EFFECT_SD = 0.2
#: Ljung-Box lag quoted in the autocorrelation finding (or the largest lag computed).
_LJUNG_BOX_LAG = 10


@dataclass(frozen=True)
class Finding:
    """One thing the data say, with its evidence.

    ``kind``, ``title``, ``detail``, ``factor``, ``level``, ``effect``, ``p`` and
    ``share`` are the public contract (API.md). ``effect`` is in the value's units
    (for autocorrelation: phi; for out-of-control points: the share of points beyond
    the limits; for stratified subgroups: the relative inflation of sigma), ``se`` its
    standard error, ``effect_sd`` the effect in within-subgroup sigma, ``p`` the raw
    p-value of the test behind the finding, ``p_adjusted`` the Holm-adjusted p-value
    the report uses, ``share`` the factor's share of the total variance, ``strength``
    the ranking key, ``start`` the time (or subgroup) a change appears to start, and
    ``caveat`` what the design cannot tell.

    Examples
    --------
    >>> f = Finding("confounded", "Crew and scale cannot be told apart", "...",
    ...             factor="crew")
    >>> f.kind, f.factor, f.p_adjusted != f.p_adjusted  # a note: no test, NaN p
    ('confounded', 'crew', True)
    """

    kind: str
    title: str
    detail: str
    factor: str | None = None
    level: str | None = None
    effect: float = math.nan
    p: float = math.nan
    share: float = math.nan
    effect_sd: float = math.nan
    se: float = math.nan
    p_adjusted: float = math.nan
    strength: float = 0.0
    start: Any = None
    caveat: str = ""

    def to_dict(self) -> dict[str, Any]:
        """The fields as a plain dict (one row of :func:`findings_frame`)."""
        return asdict(self)

    def _repr_html_(self) -> str:
        evidence = (
            ""
            if math.isnan(self.p_adjusted)
            else f" <small>(adjusted p = {_p(self.p_adjusted)})</small>"
        )
        caveat = f"<p><em>{html.escape(self.caveat)}</em></p>" if self.caveat else ""
        return (
            "<div class='qcexplore-finding'>"
            f"<p><small>{html.escape(self.kind.replace('_', ' '))}</small><br>"
            f"<strong>{html.escape(self.title)}</strong>{evidence}</p>"
            f"<p>{html.escape(self.detail)}</p>{caveat}</div>"
        )


def findings_frame(items: Sequence[Finding]) -> pd.DataFrame:
    """The findings as one tidy table, one row per finding, in the given order.

    Examples
    --------
    >>> findings_frame([Finding("confounded", "a", "b")])[["kind", "title"]].values.tolist()
    [['confounded', 'a']]
    """
    names = [f.name for f in fields(Finding)]
    return pd.DataFrame([item.to_dict() for item in items], columns=names)


def holm(p: Sequence[float] | np.ndarray) -> np.ndarray:
    """Holm's step-down adjusted p-values (NaN stays NaN and does not count as a test).

    Checked against ``statsmodels.stats.multitest.multipletests(method="holm")`` in
    tests/test_findings.py.

    Examples
    --------
    >>> holm([0.01, 0.04, 0.03]).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    steps = np.maximum.accumulate((m - np.arange(m)) * p[order])
    out[order] = np.minimum(steps, 1.0)
    return out


# --------------------------------------------------------------------------- wording


def _num(x: float, digits: int = 3) -> str:
    return f"{x:.{digits}g}"


def _p(p: float) -> str:
    return "< 1e-300" if p < 1e-300 else f"{p:.2g}"


def _plural(name: str) -> str:
    return name if name.endswith("s") else f"{name}s"


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
    study: Any
    alpha: float
    min_effect: float
    sigma: float
    unit: str
    v: Any  # VariationResult or None
    ts: Any  # TimeResult or None
    n_tests: int = 0

    def amount(self, x: float) -> str:
        return f"{_num(abs(x))}{self.unit}"

    def in_sigma(self, x: float) -> float:
        return x / self.sigma if self.sigma > 0 else math.nan


@dataclass(frozen=True)
class _Candidate:
    p: float
    make: Callable[[_Context, float], list[Finding]]


# --------------------------------------------------------------------------- factors


def _share(v: Any, name: str) -> float:
    row = v.components[v.components["source"] == name]
    return float(row["share"].iloc[0]) if len(row) else math.nan


def _structure_rows(v: Any, factor: str, confounded: bool) -> pd.DataFrame:
    table = v.structure
    return table[(table["factor"] == factor) & ((table["relation"] == "confounded") == confounded)]


def _relation(v: Any, factor: str) -> str:
    rows = _structure_rows(v, factor, confounded=False)
    return str(rows["relation"].iloc[0]) if len(rows) else ""


def _confounded_with(v: Any, factor: str) -> list[str]:
    return [str(w) for w in _structure_rows(v, factor, confounded=True)["with_"]]


def _level_table(v: Any, factor: str, measured: bool) -> pd.DataFrame:
    """Level, estimate (against a common reference), se, p for one factor."""
    if measured:
        table = v.offsets[v.offsets["factor"] == factor]
        table = table.rename(columns={"offset": "estimate"})
    else:
        table = v.comparisons.get(factor, pd.DataFrame(columns=["test"]))
        table = table[table["test"] == "effect"]
    return table[["level", "estimate", "se", "p"]].astype({"level": str}).reset_index(drop=True)


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
    adjusted = holm(table["p"].to_numpy(dtype=np.float64))
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
    if ctx.study.subgroup is None:
        parts.append(
            f"Individual values: {factor} is tested against the value-to-value variation, "
            "which treats the values as independent"
            + ("" if measured else "; the level effects are not adjusted for other factors")
            + "."
        )
    elif _relation(ctx.v, factor) == "between_subgroups":
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
    for other in _confounded_with(ctx.v, factor):
        parts.append(
            f"{_cap(factor)} is confounded with {other}: the data cannot tell {factor} from "
            f"{other} (see the confounded finding)."
        )
    return " ".join(parts)


def _onset(ctx: _Context, factor: str, level: str) -> tuple[str, Any]:
    """Words and start of the onset of one level's difference, if the change is clear.

    The onset model (step or ramp, ``stats.onset.stream_onset``) must beat a constant
    difference: F = ((RSS0 - RSS) / 2) / (RSS / (n - 3)), its p-value multiplied by the
    number of candidate onsets searched (Bonferroni), below ``alpha``.
    """
    s = ctx.study
    found = stream_onset(
        s.frame, value=s.value, subgroup=s.subgroup_column, factor=factor, level=level, time=s.time
    )
    if found is None:
        return "", None
    frame = s.frame
    codes = frame[s.subgroup_column].cat.codes.to_numpy()
    k = len(frame[s.subgroup_column].cat.categories)
    y = frame[s.value].to_numpy(dtype=np.float64)
    is_level = (frame[factor].astype(str) == level).to_numpy()
    inside = group_moments(y[is_level], codes[is_level], k)
    outside = group_moments(y[~is_level], codes[~is_level], k)
    both = (inside.n > 0) & (outside.n > 0)
    contrast = (inside.mean - outside.mean)[both]
    n = contrast.size
    rss0 = float(np.sum((contrast - contrast.mean()) ** 2))
    if n <= 13 or not found.rss > 0:
        return "", None
    f = ((rss0 - found.rss) / 2.0) / (found.rss / (n - 3))
    searched = 2 * (n - 9)  # about n - 9 step and n - 9 hinge positions (5 points a side)
    p = min(1.0, float(stats.f.sf(f, 2, n - 3)) * searched)
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
    evidence = (
        f"{_cap(label)} differs by {effect:+.3g}{ctx.unit} (se {_num(se, 2)}) from the mean of the "
        f"other {plural}, {effect_sd:+.2f} within-subgroup sigma"
    )
    if measured:
        title = f"{_cap(label)}'s readings are {ctx.amount(effect)} {word} than the other {plural}'"
        twins = _confounded_with(ctx.v, factor)
        if twins:
            # The data cannot say whether the sampling or the confounded factor moved the
            # readings: the title must not claim a measurement offset on its own.
            title += f", or {' and '.join(twins)} did it: the data cannot tell them apart"
        evidence += (
            f"; its sum-to-zero offset against the average of all {k} {plural} is "
            f"{estimate:+.3g}{ctx.unit}, and the difference from the others is that offset "
            f"times {k}/{k - 1}. A measurement offset moves the readings, not the product."
        )
        start, onset = None, ""
    else:
        title = f"{_cap(label)} runs {ctx.amount(effect)} {word} than the other {plural}"
        evidence += f"; its effect against the overall mean is {estimate:+.3g}{ctx.unit}."
        onset, start = "", None
        if _relation(ctx.v, factor) == "within_subgroup":
            onset, start = _onset(ctx, factor, level)
        if start is not None:
            title += f", from around {_when(start)}"
    parts = [evidence + onset]
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
    measured = factor in ctx.study.measured_by
    table = _level_table(ctx.v, factor, measured)
    out = [
        _level_finding(ctx, factor, table, named, p_gate, measured)
        for named in _named_levels(table, ctx)
    ]
    if _relation(ctx.v, factor) == "within_subgroup":
        out += _stratified(ctx, factor, p_gate, min_share)
    return out


# --------------------------------------------------------------------------- spread


def _level_spread(study: Any, factor: str) -> tuple[pd.Index, np.ndarray, np.ndarray]:
    """Per level: sd of the deviations from the subgroup mean, and the same for the rest.

    Each deviation is weighted by 1 - 1/n of its subgroup (its expected share of the
    variance), so both sds estimate the within-subgroup sigma when spreads are equal.
    """
    frame = study.frame
    y = frame[study.value].to_numpy(dtype=np.float64)
    group = frame[study.subgroup_column].cat.codes.to_numpy()
    m = group_moments(y, group, len(frame[study.subgroup_column].cat.categories))
    if np.all(m.n[m.n > 0] == 1):
        r, w = y - y.mean(), np.full(y.size, 1.0 - 1.0 / y.size)
    else:
        r, w = y - m.mean[group], 1.0 - 1.0 / m.n[group]
    column = frame[factor].cat.remove_unused_categories()
    codes, levels = column.cat.codes.to_numpy(), column.cat.categories
    ss = np.bincount(codes, weights=r * r, minlength=len(levels))
    ww = np.bincount(codes, weights=w, minlength=len(levels))
    with np.errstate(invalid="ignore", divide="ignore"):
        return levels, np.sqrt(ss / ww), np.sqrt((ss.sum() - ss) / (ww.sum() - ww))


def _spread_findings(ctx: _Context, factor: str, p: float, p_adjusted: float) -> list[Finding]:
    levels, sd, rest = _level_spread(ctx.study, factor)
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


def _adjusted_words(study: Any) -> str:
    if not study.measured_by:
        return ""
    return f" (after removing the {', '.join(study.measured_by)} offsets)"


def _shift_finding(ctx: _Context, row: Any, p_adjusted: float) -> list[Finding]:
    effect = float(row.after - row.before)
    if abs(effect) < ctx.min_effect:
        return []
    start, what = (row.time, "time") if pd.notna(row.time) else (row.subgroup, "subgroup")
    word = "up" if effect > 0 else "down"
    caveat = (
        "The step test reads the subgroup averages only: a gradual drift shows as one or "
        "more steps, and the time found is where the averages before and after differ most."
    )
    return [
        Finding(
            kind="process_shift",
            title=f"The process average stepped {word} by {ctx.amount(effect)} around "
            f"{_when(start, what)}",
            detail=(
                f"The subgroup averages{_adjusted_words(ctx.study)} moved from "
                f"{_num(row.before, 6)}{ctx.unit} to {_num(row.after, 6)}{ctx.unit} "
                f"({effect:+.3g}{ctx.unit}, {ctx.in_sigma(effect):+.2f} within-subgroup sigma) "
                f"from subgroup {row.subgroup}. CUSUM test with binary segmentation: p = "
                f"{_p(row.p)}, adjusted p = {_p(p_adjusted)} (Holm over {ctx.n_tests} tests). "
                f"{caveat}"
            ),
            effect=effect,
            p=float(row.p),
            effect_sd=ctx.in_sigma(effect),
            p_adjusted=p_adjusted,
            strength=abs(ctx.in_sigma(effect)),
            start=start,
            caveat=caveat,
        )
    ]


def _autocorrelation_finding(ctx: _Context, p: float, p_adjusted: float) -> list[Finding]:
    ts = ctx.ts
    phi, se = float(ts.ar1["phi"]), float(ts.ar1["se"])
    n = len(ts.series) if len(ts.series) else len(ts.acf) * 2
    lb = ts.ljung_box
    lb_row = lb[lb["lag"] == min(_LJUNG_BOX_LAG, int(lb["lag"].max()))].iloc[0]
    caveat = (
        "Limits from within-subgroup variation assume independent averages; when the "
        "level wanders they flag more points than the nominal rate, and steps or a drift "
        "in the level raise phi as well."
    )
    return [
        Finding(
            kind="autocorrelation",
            title=f"Consecutive subgroup averages are correlated (phi = {phi:.2f})",
            detail=(
                f"The subgroup averages{_adjusted_words(ctx.study)} follow their neighbours: "
                f"lag-1 autocorrelation phi = {phi:.3f} (se {se:.3f}, AR(1) fit), p = {_p(p)}, "
                f"adjusted p = {_p(p_adjusted)} (Holm over {ctx.n_tests} tests); Ljung-Box "
                f"Q = {lb_row['q']:.1f} over {int(lb_row['lag'])} lags, p = {_p(lb_row['p'])}. "
                f"The {n} averages carry about as much information as "
                f"{ts.effective_n:.0f} independent ones (N(1 - phi)/(1 + phi)). {caveat}"
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


def _beyond(chart: Any) -> tuple[int, int]:
    pts = chart.points
    stat = pts["stat"].to_numpy(dtype=np.float64)
    ok = np.isfinite(stat)
    out = (stat > pts["ucl"].to_numpy(dtype=np.float64)) | (
        stat < pts["lcl"].to_numpy(dtype=np.float64)
    )
    return int(np.sum(out & ok)), int(ok.sum())


def _out_of_control_finding(
    ctx: _Context, chart: Any, p: float, p_adjusted: float
) -> list[Finding]:
    count, n = _beyond(chart)
    rate = 2.0 * stats.norm.sf(chart.sigma_level)
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


def _cross_references(ctx: _Context, found: list[Finding]) -> list[Finding]:
    """Point each symptom to the findings that can cause it."""
    kinds = {f.kind for f in found}
    drifts = [f for f in found if f.kind == "stream_difference" and f.start is not None]
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
            if "measurement_offset" in kinds:
                count, n = _beyond(ctx.study.chart(adjust_for=True))
                extra += (
                    f" With the measured_by offsets removed, {count} of {n} points lie beyond "
                    "the limits."
                )
        elif f.kind in ("process_shift", "autocorrelation") and drifts:
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
        order = list(ctx.study.factors)
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


def _capability_note(ctx: _Context, chart: Any) -> list[Finding]:
    s = ctx.study
    if s.spec is None:
        return []
    cap = s.capability()
    count, _ = _beyond(chart)
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
        for w, x in (("LSL", s.spec.lsl), ("USL", s.spec.usl))
        if x is not None
    )
    warnings = [w for w in cap.warnings if "weights-and-measures" not in w]
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
                f"{CAUTION}"
            ).replace("  ", " "),
            effect=float(row["value"]),
            se=math.nan,
            caveat=CAUTION,
        )
    ]


# --------------------------------------------------------------------------- entry point


def findings(
    study: Any,
    *,
    alpha: float = 0.05,
    min_effect: float | None = None,
    min_share: float = 0.10,
) -> list[Finding]:
    """Ranked plain-language findings of a Study, strongest first.

    Parameters
    ----------
    study : a ``qcexplore.Study``; only its public members are used
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
    kind appears in no more of 20 seeds than alpha allows. Holm's adjustment is checked
    against statsmodels ``multipletests``.

    Examples
    --------
    >>> import qcexplore as qx
    >>> from qcexplore.demo import filling_line
    >>> s = qx.Study(filling_line()[0], value="net_g", subgroup="round", time="taken_at",
    ...              factors=["crew", "nozzle"], measured_by=["crew"], units="g")
    >>> top = findings(s)[0]
    >>> top.kind, top.level
    ('measurement_offset', 'B')
    """

    def number(x: object) -> bool:
        return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, bool)

    if not (number(alpha) and 0.0 < alpha < 1.0):
        raise QCDataError(f"findings: alpha={alpha!r} must lie between 0 and 1.")
    if min_effect is not None and not (
        number(min_effect) and np.isfinite(min_effect) and min_effect >= 0
    ):
        raise QCDataError(
            f"findings: min_effect={min_effect!r} must be a number >= 0 in the value's units "
            "(or None for 0.2 within-subgroup sigma)."
        )
    if not (number(min_share) and 0.0 <= min_share <= 1.0):
        raise QCDataError(f"findings: min_share={min_share!r} must lie between 0 and 1.")
    chart = study.chart()
    sigma = float(chart.limits["sigma"].iloc[0])
    v = study.variation() if study.factors else None
    try:
        ts = study.time_structure()
    except QCDataError:  # too short or constant: there is no time structure to report
        ts = None
    ctx = _Context(
        study=study,
        alpha=alpha,
        min_effect=DEFAULT_MIN_EFFECT_SD * sigma if min_effect is None else float(min_effect),
        sigma=sigma,
        unit=f" {study.units}" if study.units else "",
        v=v,
        ts=ts,
    )

    candidates: list[_Candidate] = []
    if v is not None:
        for row in v.anova.itertuples():
            if row.source in study.factors and np.isfinite(row.p):
                candidates.append(
                    _Candidate(
                        row.p,
                        lambda c, pa, f=row.source: _factor_findings(c, f, pa, min_share),
                    )
                )
        order = list(study.factors)
        for row in v.spread[v.spread["test"] == "brown_forsythe"].itertuples():
            # a factor confounded with an earlier one would repeat that one's finding
            later = any(
                order.index(o) < order.index(row.factor)
                for o in _confounded_with(v, row.factor)
                if o in order and row.factor in order
            )
            if np.isfinite(row.p) and not later:
                candidates.append(
                    _Candidate(
                        row.p, lambda c, pa, f=row.factor, p=row.p: _spread_findings(c, f, p, pa)
                    )
                )
    if ts is not None:
        for row in ts.shifts.itertuples():
            candidates.append(_Candidate(row.p, lambda c, pa, r=row: _shift_finding(c, r, pa)))
        phi, se = float(ts.ar1["phi"]), float(ts.ar1["se"])
        if se > 0:
            p_ar = float(2.0 * stats.norm.sf(abs(phi) / se))
            candidates.append(
                _Candidate(p_ar, lambda c, pa, p=p_ar: _autocorrelation_finding(c, p, pa))
            )
    count, n = _beyond(chart)
    if n:
        p_ooc = float(
            stats.binomtest(
                count, n, 2.0 * stats.norm.sf(chart.sigma_level), alternative="greater"
            ).pvalue
        )
        candidates.append(
            _Candidate(p_ooc, lambda c, pa, p=p_ooc: _out_of_control_finding(c, chart, p, pa))
        )

    adjusted = holm([c.p for c in candidates])
    ctx = replace(ctx, n_tests=len(candidates))
    found: list[Finding] = []
    for candidate, p_adjusted in zip(candidates, adjusted, strict=True):
        if p_adjusted < alpha:
            found += candidate.make(ctx, float(p_adjusted))
    found = _cross_references(ctx, found)
    found.sort(key=lambda f: -f.strength)
    notes = (_confounded_notes(ctx) if v is not None else []) + _capability_note(ctx, chart)
    return found + notes

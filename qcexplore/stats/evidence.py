"""The tests that the findings cite, computed once from the results and carried on them.

A finding rests on one *gate* test taken from the results:

==================  ======================================================================
test                what it tests
==================  ======================================================================
``anova``           a factor's F test in ``variation().anova`` (its own error term)
``brown_forsythe``  a factor's equality of spread in ``variation().spread``
``step``            each step in ``time_structure().shifts`` (CUSUM, binary segmentation)
``ar1``             autocorrelation of the residuals about the level the data support: the
                    likelihood-ratio test (``TimeResult.autocorrelation_p``)
``beyond_limits``   points beyond the chart's limits against the rate 2 P(Z > L) of a
                    stable normal process (one-sided binomial test)
==================  ======================================================================

The gate tests of a Study form one family whose family-wise error rate Holm's step-down
method holds (``p_adjusted``). A factor's levels are tested against each other in
``levels`` (the offsets of a measured_by factor, the effects against the overall mean of
a process factor), again Holm-adjusted among that factor's levels. ``level_spread`` and
the onsets of ``stats.onset`` describe the levels that the findings may name.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.stats.changes import change_shapes
from qcexplore.stats.onset import stream_onset
from qcexplore.stats.results import (
    BeyondLimits,
    CapabilityResult,
    ChartResult,
    Evidence,
    Onset,
    TimeResult,
    VariationResult,
)
from qcexplore.stats.subgroups import group_codes, group_moments
from qcexplore.stats.variation.timeline import TIME_COLUMNS, time_confounding

__all__ = [
    "beyond_limits",
    "collect_evidence",
    "gate_tests",
    "holm",
    "level_onsets",
    "level_spread",
    "level_tests",
]

_GATE_COLUMNS = ["test", "factor", "position", "p"]
_LEVEL_COLUMNS = ["level", "estimate", "se", "p"]


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


def beyond_limits(chart: ChartResult) -> BeyondLimits:
    """Points beyond the chart's own limits (``points["beyond"]``), against a stable process.

    The rate is 2 P(Z > L) at the chart's ``sigma_level`` L; ``p`` is the one-sided binomial
    test P(X >= count), X ~ Binomial(points, rate). Checked against ``scipy.stats.binom``
    in tests/test_findings.py.

    Examples
    --------
    >>> from qcexplore.stats.charts import control_chart
    >>> f = pd.DataFrame({"hour": range(30), "w": [0.0, 1.0] * 14 + [0.5, 9.0]})
    >>> b = beyond_limits(control_chart(f, value="w", subgroup="hour"))
    >>> b.count, b.points, round(b.rate, 4)
    (1, 30, 0.0027)
    """
    points = chart.points
    plotted = np.isfinite(points["stat"].to_numpy(dtype=np.float64))
    count = int(np.sum(points["beyond"].to_numpy(dtype=bool) & plotted))
    n = int(plotted.sum())
    rate = float(2.0 * stats.norm.sf(chart.sigma_level))
    p = float(stats.binomtest(count, n, rate, alternative="greater").pvalue) if n else np.nan
    return BeyondLimits(count=count, points=n, rate=rate, p=p)


def gate_tests(
    *,
    factors: Sequence[str],
    variation: VariationResult | None,
    time: TimeResult | None,
    beyond: BeyondLimits,
) -> pd.DataFrame:
    """The family of gate tests, ``test, factor, position, p, p_adjusted`` (Holm over all).

    Every factor's F test and Brown-Forsythe test enters, except the spread test of a
    factor confounded with an earlier one (it would repeat that one); then each step
    (``position`` as in ``time.shifts``), the AR(1) test and the beyond-limits test.

    Examples
    --------
    >>> beyond = BeyondLimits(count=4, points=100, rate=0.0027, p=0.0002)
    >>> gate_tests(factors=(), variation=None, time=None, beyond=beyond)[["test", "p_adjusted"]]
                test  p_adjusted
    0  beyond_limits      0.0002
    """
    rows: list[tuple[str, str | None, int | None, float]] = []
    if variation is not None:
        anova = variation.anova
        rows += [
            ("anova", source, None, p)
            for source, p in zip(anova["source"], anova["p"], strict=True)
            if source in factors and np.isfinite(p)
        ]
        order = list(factors)
        spread = variation.spread[variation.spread["test"] == "brown_forsythe"]
        for factor, p in zip(spread["factor"], spread["p"], strict=True):
            later = factor in order and any(
                order.index(other) < order.index(factor)
                for other in variation.confounded_with(factor)
                if other in order
            )
            if np.isfinite(p) and not later:
                rows.append(("brown_forsythe", factor, None, p))
    if time is not None:
        shifts = time.shifts
        rows += [
            ("step", None, position, p)
            for position, p in zip(shifts["position"], shifts["p"], strict=True)
        ]
        if np.isfinite(time.autocorrelation_p):
            rows.append(("ar1", None, None, time.autocorrelation_p))
    if beyond.points:
        rows.append(("beyond_limits", None, None, beyond.p))
    table = pd.DataFrame(rows, columns=_GATE_COLUMNS).astype(
        {"factor": object, "position": "Int64", "p": np.float64}
    )
    return table.assign(p_adjusted=holm(table["p"].to_numpy()))


def level_tests(
    variation: VariationResult | None, *, factors: Sequence[str], measured_by: Sequence[str]
) -> pd.DataFrame:
    """Each factor's level tests, ``factor, level, estimate, se, p, p_adjusted``.

    A measured_by factor's levels are its offsets (``variation.offsets``), a process
    factor's its effects against the overall mean (the ``effect`` rows of
    ``variation.comparisons``); ``p_adjusted`` is Holm's among the factor's levels.
    Without a variation result there are no level tests.

    Examples
    --------
    >>> list(level_tests(None, factors=("crew",), measured_by=("crew",)).columns)
    ['factor', 'level', 'estimate', 'se', 'p', 'p_adjusted']
    """
    columns = ["factor", *_LEVEL_COLUMNS, "p_adjusted"]
    if variation is None or not factors:
        return pd.DataFrame(columns=columns)
    parts = []
    for factor in factors:
        if factor in measured_by:
            table = variation.offsets[variation.offsets["factor"] == factor]
            table = table.rename(columns={"offset": "estimate"})
        else:
            table = variation.comparisons.get(factor, pd.DataFrame(columns=["test"]))
            table = table[table["test"] == "effect"]
        table = table.reindex(columns=_LEVEL_COLUMNS).astype({"level": str})
        parts.append(table.assign(factor=factor, p_adjusted=holm(table["p"].to_numpy())))
    return pd.concat(parts, ignore_index=True)[columns]


def level_spread(
    data: pd.DataFrame, *, value: str, subgroup: str, factors: Sequence[str]
) -> pd.DataFrame:
    """Per level: the sd of the deviations from the subgroup mean, and that of the rest.

    ``factor, level, sd, others_sd``. Each deviation is weighted by 1 - 1/n of its
    subgroup (its expected share of the variance), so both sds estimate the
    within-subgroup sigma when the spreads are equal; for individual values the
    deviations are taken from the overall mean.

    Examples
    --------
    >>> f = pd.DataFrame({"sg": np.repeat([1, 2], 4), "head": list("abab") * 2,
    ...                   "w": [0.0, 1.0, 0.0, -1.0, 5.0, 7.0, 5.0, 3.0]})
    >>> level_spread(f, value="w", subgroup="sg", factors=["head"])["sd"].round(3).tolist()
    [0.0, 1.826]
    """
    y = data[value].to_numpy(dtype=np.float64)
    group, labels = group_codes(data, subgroup, "subgroup")
    m = group_moments(y, group, len(labels))
    if np.all(m.n == 1):
        r, w = y - y.mean(), np.full(y.size, 1.0 - 1.0 / y.size)
    else:
        r, w = y - m.mean[group], 1.0 - 1.0 / m.n[group]
    parts = []
    for factor in factors:
        codes, levels = group_codes(data, factor, "factor")
        ss = np.bincount(codes, weights=r * r, minlength=len(levels))
        ww = np.bincount(codes, weights=w, minlength=len(levels))
        with np.errstate(invalid="ignore", divide="ignore"):
            sd, others = np.sqrt(ss / ww), np.sqrt((ss.sum() - ss) / (ww.sum() - ww))
        parts.append(
            pd.DataFrame(
                {"factor": factor, "level": levels.astype(str), "sd": sd, "others_sd": others}
            )
        )
    if not parts:
        return pd.DataFrame(columns=["factor", "level", "sd", "others_sd"])
    return pd.concat(parts, ignore_index=True)


def level_onsets(
    data: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    factors: Sequence[str],
    time: str | None = None,
) -> tuple[Onset, ...]:
    """The onset of each level's difference from the other levels (``stats.onset``).

    ``factors`` must vary within subgroups; levels too rare to fit are left out.

    Examples
    --------
    >>> f = pd.DataFrame({"sg": pd.Categorical(np.repeat(np.arange(40), 2), ordered=True),
    ...                   "head": np.tile(["a", "b"], 40)})
    >>> f["w"] = np.where((f["head"] == "a") & (f["sg"].cat.codes >= 25), 1.0, 0.0)
    >>> [(o.level, o.model, o.position) for o in level_onsets(
    ...     f, value="w", subgroup="sg", factors=["head"])]
    [('a', 'step', 25), ('b', 'step', 25)]
    """
    out = []
    for factor in factors:
        for level in group_codes(data, factor, "factor")[1].astype(str):
            found = stream_onset(
                data, value=value, subgroup=subgroup, factor=factor, level=level, time=time
            )
            if found is not None:
                out.append(found)
    return tuple(out)


def collect_evidence(
    data: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    factors: Sequence[str] = (),
    measured_by: Sequence[str] = (),
    individuals: bool = False,
    units: str | None = None,
    chart: ChartResult,
    variation: VariationResult | None = None,
    time_result: TimeResult | None = None,
    capability: CapabilityResult | None = None,
    adjusted_chart: ChartResult | None = None,
) -> Evidence:
    """Everything the findings cite, from the results and the data they came from.

    Parameters
    ----------
    data, value, subgroup, time : the table and columns the results were computed on
        (``subgroup`` numbers the points; for individual values the observation number)
    factors, measured_by : the study's factors, and those that describe sampling or
        measurement
    individuals : whether the points are individual values (no subgroup role)
    units : the value's unit, for the wording
    chart : the default control chart; ``adjusted_chart`` the same chart with the
        measured_by offsets removed (when there are measured_by factors)
    variation, time_result, capability : the other results, ``None`` where they do not
        exist (no factors; a series too short or constant; no specification)

    The onsets are fitted for every level of the process factors that vary within
    subgroups, the only ones whose levels the findings date. With factors, each level of
    those constant inside subgroups is set against the steps found and against where it
    starts or stops appearing (``time_confounding``).

    Examples
    --------
    >>> from qcexplore.stats.charts import control_chart
    >>> f = pd.DataFrame({"hour": range(30), "w": [0.0, 1.0] * 14 + [0.5, 9.0]})
    >>> chart = control_chart(f, value="w", subgroup="hour")
    >>> ev = collect_evidence(f, value="w", subgroup="hour", individuals=True, chart=chart)
    >>> ev.tests["test"].tolist(), ev.subgroup is None
    (['beyond_limits'], True)
    """
    factors, measured_by = tuple(factors), tuple(measured_by)
    beyond = beyond_limits(chart)
    onset_factors: tuple[str, ...] = ()
    if variation is not None:
        onset_factors = tuple(
            f
            for f in factors
            if f not in measured_by and variation.relation(f) == "within_subgroup"
        )
    timing = pd.DataFrame(columns=TIME_COLUMNS)
    if variation is not None:
        steps = () if time_result is None else time_result.shifts["position"].astype(int)
        timing = time_confounding(
            data, value=value, subgroup=subgroup, factors=factors, time=time, steps=tuple(steps)
        )
    relations = {}
    if variation is not None:
        relations = {
            f: variation.relation(f)
            for f in factors
            if variation.relation(f) in ("within_subgroup", "between_subgroups")
        }
    shapes = change_shapes(
        data, value=value, subgroup=subgroup, time=time, relations=relations,
        individuals=individuals,
    )  # fmt: skip
    return Evidence(
        chart=chart,
        variation=variation,
        time=time_result,
        capability=capability,
        beyond=beyond,
        beyond_adjusted=None if adjusted_chart is None else beyond_limits(adjusted_chart),
        tests=gate_tests(factors=factors, variation=variation, time=time_result, beyond=beyond),
        levels=level_tests(variation, factors=factors, measured_by=measured_by),
        level_spread=level_spread(data, value=value, subgroup=subgroup, factors=factors),
        onsets=level_onsets(data, value=value, subgroup=subgroup, factors=onset_factors, time=time),
        value=value,
        units=units,
        subgroup=None if individuals else subgroup,
        factors=factors,
        measured_by=measured_by,
        time_confounding=timing,
        shapes=shapes,
    )

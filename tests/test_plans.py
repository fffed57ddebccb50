"""Tests for qcexplore.stats.plans: the next study's size against statsmodels and simulation.

References: statsmodels' ``TTestPower`` (the paired t test is a one-sample t test of the
differences) and ``TTestIndPower`` (two samples of equal size), Cohen's table of sizes per
group (from memory), scipy's noncentral t for the rotation's power, statsmodels ``OLS``
for the rotation's t test, and simulations of each planned study with binomial bands
(``scipy.stats.binom``) for the share of significant tests and chi-square bands
(``scipy.stats.chi2``) for the sd of the estimated difference.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.power import TTestIndPower, TTestPower

from qcexplore.errors import QCDataError
from qcexplore.stats.plans import comparison_plan, rotation_plan, step_lookup

#: Band level of the simulation checks: a correct plan fails one check in 1000 runs.
BAND = 0.999


def examples(count: int) -> settings:
    return settings(max_examples=count, suppress_health_check=[HealthCheck.too_slow])


def within_binomial_band(hits: int, trials: int, p: float) -> bool:
    low, high = stats.binom.interval(BAND, trials, p)
    return low <= hits <= high


def within_chi2_band(estimates: np.ndarray, se: float) -> bool:
    """The sample sd of normal estimates against their sd: (k - 1) s^2 / se^2 ~ chi2(k - 1)."""
    k = estimates.size
    low, high = stats.chi2.interval(BAND, k - 1)
    return low <= (k - 1) * estimates.var(ddof=1) / se**2 <= high


# --------------------------------------------------------------------------- references


@pytest.mark.parametrize(
    ("offset", "repeatability", "power", "alpha"),
    [(0.5, 0.3, 0.9, 0.05), (1.5, 0.3, 0.9, 0.05), (0.2, 0.3, 0.8, 0.05), (0.1, 0.4, 0.95, 0.01)],
)
def test_paired_size_is_statsmodels_solve_power_rounded_up(offset, repeatability, power, alpha):
    # Reference: statsmodels TTestPower (one-sample t of the differences), Cohen's d =
    # offset / sd of a difference, the sd of a difference of two readings sqrt(2) x
    # repeatability.
    d = offset / (math.sqrt(2) * repeatability)
    plan = comparison_plan("paired", offset, repeatability, power=power, alpha=alpha).measured
    reference = TTestPower()
    expected = math.ceil(reference.solve_power(effect_size=d, alpha=alpha, power=power))
    assert plan.n == max(2, expected)
    assert plan.power == pytest.approx(reference.power(d, plan.n, alpha), rel=1e-9)
    if plan.n > 2:
        assert reference.power(d, plan.n - 1, alpha) < power <= plan.power
    assert plan.se == pytest.approx(math.sqrt(2) * repeatability / math.sqrt(plan.n), rel=1e-12)


@pytest.mark.parametrize(
    ("difference", "sd", "power", "alpha"),
    [(0.5, 1.0, 0.9, 0.05), (2.0, 1.2, 0.9, 0.05), (0.3, 0.5, 0.8, 0.01), (0.05, 0.1, 0.95, 0.1)],
)
def test_stream_size_is_statsmodels_solve_power_rounded_up(difference, sd, power, alpha):
    # Reference: statsmodels TTestIndPower with ratio 1, Cohen's d = difference / sd.
    d = difference / sd
    plan = comparison_plan("two_sample", difference, sd, power=power, alpha=alpha).measured
    reference = TTestIndPower()
    expected = math.ceil(reference.solve_power(effect_size=d, alpha=alpha, power=power, ratio=1))
    assert plan.n == max(2, expected)
    assert plan.power == pytest.approx(reference.power(d, plan.n, alpha, ratio=1), rel=1e-9)
    assert reference.power(d, plan.n - 1, alpha, ratio=1) < power <= plan.power
    assert plan.se == pytest.approx(sd * math.sqrt(2 / plan.n), rel=1e-12)


@pytest.mark.parametrize(("d", "per_group"), [(0.5, 64), (0.8, 26)])
def test_stream_size_matches_cohens_table(d, per_group):
    # Reference (from memory): Cohen, Statistical Power Analysis for the Behavioral Sciences,
    # table of n per group for the two-sample t test, two-sided alpha 0.05, power 0.80:
    # d = 0.5 -> 64, d = 0.8 -> 26. (Its d = 0.2 entry, 393, comes from an approximation;
    # the exact noncentral t gives 394, as statsmodels does.)
    assert comparison_plan("two_sample", d, 1.0, power=0.8).measured.n == per_group


def test_smallest_difference_is_sized_as_well():
    plan = comparison_plan("paired", -1.5, 0.3, smallest=0.5, units="g")
    assert plan.measured.difference == 1.5  # the sign does not matter
    assert plan.smallest == comparison_plan("paired", 0.5, 0.3).measured
    assert plan.smallest.n > plan.measured.n
    assert comparison_plan("paired", 1.5, 0.3).smallest is None


def test_sentences_say_the_plan_in_plain_words():
    plan = comparison_plan(
        "paired",
        0.5,
        0.3,
        smallest=0.2,
        units="g",
        verb="weigh",
        items="jars",
        where="on scales A and B",
    )
    assert plan.sentence == (
        "Weigh the same 10 jars on scales A and B: enough to tell 0.5 g apart with 90 % power "
        "at the measured repeatability of 0.3 g. 50 jars would tell the smallest offset worth "
        "knowing, 0.2 g."
    )
    big = comparison_plan("two_sample", 0.01, 1.0, units="g")
    assert big.sentence == (
        "Measure 210,150 units from each of the two streams: enough to tell 0.01 g apart with "
        "90 % power at the measured sd of 1 g within a stream."
    )
    rot = rotation_plan(
        ("crew", "shift"),
        (3, 3),
        1.0,
        between_variance=0.25,
        within_sd=1.0,
        subgroup_size=5,
        subgroups_per_day=8,
        units="g",
        subgroup_word="round",
    )
    assert rot.sentence == (
        "Run every crew on every shift (3 x 3 = 9 pairings) for 4 rounds each (1 day each at "
        "8 a day), 36 rounds in all: the crew effect is then measured apart from the shift "
        "effect with a standard error of 0.274 g (the shift effect: 0.274 g), enough to tell "
        "1 g with 90 % power."
    )


# --------------------------------------------------------------------------- simulations


def test_paired_plan_power_and_se_by_simulation():
    # Simulated planned study: each unit has its own true value, read once on each level;
    # the second level reads `offset` high. scipy's paired t test on each study.
    offset, repeatability, studies = 0.5, 0.3, 20_000
    plan = comparison_plan("paired", offset, repeatability).measured
    rng = np.random.default_rng(11)
    true = rng.normal(500.0, 2.0, (studies, plan.n))
    first = true + rng.normal(0.0, repeatability, true.shape)
    second = true + offset + rng.normal(0.0, repeatability, true.shape)
    p = stats.ttest_rel(second, first, axis=1).pvalue
    assert within_binomial_band(int(np.sum(p < 0.05)), studies, plan.power)
    assert within_chi2_band((second - first).mean(axis=1), plan.se)


def test_stream_plan_power_and_se_by_simulation():
    difference, sd, studies = 0.5, 1.0, 5_000
    plan = comparison_plan("two_sample", difference, sd).measured
    rng = np.random.default_rng(12)
    one = rng.normal(500.0, sd, (studies, plan.n))
    other = rng.normal(500.0 + difference, sd, (studies, plan.n))
    p = stats.ttest_ind(other, one, axis=1).pvalue
    assert within_binomial_band(int(np.sum(p < 0.05)), studies, plan.power)
    assert within_chi2_band(other.mean(axis=1) - one.mean(axis=1), plan.se)


def rotation_studies(plan, *, between, within, effects_a, effects_b, studies, seed):
    """Subgroup means of simulated rotations: shape (studies, a, b, per_cell)."""
    a, b = plan.levels
    rng = np.random.default_rng(seed)
    shape = (studies, a, b, plan.per_cell)
    values = rng.normal(0.0, within, (*shape, plan.subgroup_size))
    level = np.asarray(effects_a)[:, None, None] + np.asarray(effects_b)[None, :, None]
    return level + rng.normal(0.0, math.sqrt(between), shape) + values.mean(axis=-1)


def test_rotation_se_and_power_by_simulation():
    # Simulated rotation: 3 crews x 2 shifts, subgroup effects and within-subgroup noise from
    # the planned components; crews 0 and 1 differ by `effect`. The t test is the additive
    # two-way analysis of the subgroup means (checked against statsmodels OLS below).
    between, within, effect, studies = 0.3, 1.2, 1.0, 4_000
    plan = rotation_plan(
        ("crew", "shift"),
        (3, 2),
        effect,
        between_variance=between,
        within_sd=within,
        subgroup_size=5,
    )
    y = rotation_studies(
        plan,
        between=between,
        within=within,
        effects_a=[0.0, effect, 0.4],
        effects_b=[0.0, 2.0],
        studies=studies,
        seed=13,
    )
    a_means, b_means = y.mean(axis=(2, 3)), y.mean(axis=(1, 3))
    grand = y.mean(axis=(1, 2, 3))
    residual = (
        y - a_means[:, :, None, None] - b_means[:, None, :, None] + grand[:, None, None, None]
    )
    ms = np.sum(residual**2, axis=(1, 2, 3)) / plan.df
    crews = a_means[:, 1] - a_means[:, 0]
    shifts = b_means[:, 1] - b_means[:, 0]
    assert within_chi2_band(crews, plan.se[0])
    assert within_chi2_band(shifts - 2.0, plan.se[1])
    t = crews / np.sqrt(2 * ms / (plan.levels[1] * plan.per_cell))
    hits = int(np.sum(np.abs(t) > stats.t.isf(0.025, plan.df)))
    assert within_binomial_band(hits, studies, plan.power)


def test_rotation_test_is_the_additive_two_way_ols():
    # Reference: statsmodels OLS of y ~ C(crew) + C(shift) on one simulated rotation: its
    # residual df is the plan's and its crew contrast has the plan's estimated t.
    plan = rotation_plan(
        ("crew", "shift"), (3, 2), 1.0, between_variance=0.3, within_sd=1.2, subgroup_size=5
    )
    y = rotation_studies(
        plan,
        between=0.3,
        within=1.2,
        effects_a=[0.0, 1.0, 0.4],
        effects_b=[0.0, 2.0],
        studies=1,
        seed=14,
    )[0]
    a, b, r = y.shape
    frame = pd.DataFrame(
        {
            "y": y.reshape(-1),
            "crew": np.repeat(np.arange(a), b * r),
            "shift": np.tile(np.repeat(np.arange(b), r), a),
        }
    )
    fit = smf.ols("y ~ C(crew) + C(shift)", frame).fit()
    assert fit.df_resid == plan.df
    ms = fit.mse_resid
    t = (y[1].mean() - y[0].mean()) / math.sqrt(2 * ms / (b * r))
    assert fit.tvalues["C(crew)[T.1]"] == pytest.approx(t, rel=1e-10)


@given(
    a=st.integers(2, 6),
    b=st.integers(2, 6),
    effect=st.floats(0.1, 5.0),
    between=st.floats(0.0, 4.0),
    within=st.floats(0.05, 4.0),
    m=st.integers(1, 10),
    power=st.floats(0.5, 0.99),
    alpha=st.sampled_from([0.01, 0.05, 0.1]),
)
@examples(60)
def test_rotation_is_the_fewest_subgroups_per_pairing(
    a, b, effect, between, within, m, power, alpha
):
    # Reference: the two-sided t test's power from scipy's noncentral t.
    plan = rotation_plan(
        ("a", "b"),
        (a, b),
        effect,
        between_variance=between,
        within_sd=within,
        subgroup_size=m,
        power=power,
        alpha=alpha,
    )
    v = between + within**2 / m

    def reference(r: int) -> float:
        df = a * b * r - a - b + 1
        ncp = effect / math.sqrt(2 * v / (b * r))
        crit = stats.t.isf(alpha / 2, df)
        return stats.nct.sf(crit, df, ncp) + stats.nct.sf(crit, df, -ncp)  # both tails

    assert reference(plan.per_cell) >= power
    assert plan.per_cell == 1 or reference(plan.per_cell - 1) < power
    assert plan.se[1] == pytest.approx(math.sqrt(2 * v / (a * plan.per_cell)), rel=1e-12)
    assert plan.total == a * b * plan.per_cell


@given(
    d=st.floats(0.1, 3.0),
    power=st.floats(0.5, 0.99),
    alpha=st.sampled_from([0.001, 0.01, 0.05, 0.1]),
    paired=st.booleans(),
)
@examples(80)
def test_comparison_is_the_fewest_units(d, power, alpha, paired):
    # Reference: statsmodels TTestPower / TTestIndPower power at n and n - 1. Where its
    # two-sided power is NaN (scipy's noncentral t cdf fails on the far tail, which is then
    # below 1e-16: d = 3, n = 6, alpha = 0.001), its one-sided power at alpha / 2 (the tail
    # that rejects) is the reference.
    if paired:
        plan = comparison_plan("paired", d * math.sqrt(2), 1.0, power=power, alpha=alpha).measured
        solver, extra = TTestPower(), {}
    else:
        plan = comparison_plan("two_sample", d, 1.0, power=power, alpha=alpha).measured
        solver, extra = TTestIndPower(), {"ratio": 1}

    def reference(n: int) -> float:
        both = solver.power(d, n, alpha, **extra)
        return (
            both
            if np.isfinite(both)
            else solver.power(d, n, alpha / 2, alternative="larger", **extra)
        )

    assert reference(plan.n) >= power
    assert plan.n == 2 or reference(plan.n - 1) < power


# --------------------------------------------------------------------------- a step


def test_step_lookup_names_the_subgroups_times_and_changes():
    starts = pd.date_range("2026-09-07 06:00", periods=6, freq="h")
    look = step_lookup(
        [f"r{i}" for i in range(6)],
        4,
        starts=starts,
        around=2,
        levels={"crew": list("AAAABB"), "shift": ["early"] * 6},
        subgroup_word="round",
    )
    assert (look.position, look.subgroup, look.time) == (4, "r4", starts[4])
    assert look.positions == (2, 3, 4, 5)
    assert look.subgroups == ("r2", "r3", "r4", "r5")
    assert look.times == tuple(starts[2:6])
    assert look.changes == (("crew", "A", "B"),)
    assert look.sentence == (
        "Look first at round r4 (Mon 07 Sep 2026 10:00), the first after the step, and at the "
        "rounds from r2 (Mon 07 Sep 2026 08:00) to r5 (Mon 07 Sep 2026 11:00): crew changed "
        "from A to B there. Ask what else changed then."
    )
    plain = step_lookup(pd.Series([1, 2, 3]), 1, around=0, levels={"crew": ["A"] * 3})
    assert plain.positions == (1,) and plain.times == () and plain.time is None
    assert plain.sentence == (
        "Look first at subgroup 2, the first after the step: ask what changed then (no recorded "
        "factor changed there)."
    )


# --------------------------------------------------------------------------- bad input

JUNK = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-3, 10**12),
    st.floats(),
    st.text(max_size=3),
    st.lists(st.floats(0, 1), max_size=2),
    st.just({"a": 1}),
)


def maybe(valid: st.SearchStrategy) -> st.SearchStrategy:
    return st.one_of(valid, JUNK)


@given(
    difference=maybe(st.floats(-5, 5)),
    sd=maybe(st.floats(0, 5)),
    smallest=maybe(st.floats(0.01, 5)),
    power=maybe(st.floats(0.5, 0.99)),
    alpha=maybe(st.sampled_from([0.01, 0.05])),
    units=maybe(st.just("g")),
    design=maybe(st.sampled_from(["paired", "two_sample"])),
)
@examples(300)
def test_comparison_refuses_bad_input_with_qcdataerror(
    difference, sd, smallest, power, alpha, units, design
):
    try:
        result = comparison_plan(
            design, difference, sd, smallest=smallest, power=power, alpha=alpha, units=units
        )
    except QCDataError:
        return
    assert result.measured.n >= 2 and result.measured.power >= result.target_power


@given(
    factors=maybe(st.just(("crew", "shift"))),
    levels=maybe(st.tuples(maybe(st.integers(2, 4)), maybe(st.integers(2, 4)))),
    effect=maybe(st.floats(-3, 3)),
    between=maybe(st.floats(0, 2)),
    within=maybe(st.floats(0, 2)),
    m=maybe(st.integers(1, 6)),
    per_day=maybe(st.integers(1, 8)),
    word=maybe(st.just("round")),
)
@examples(300)
def test_rotation_refuses_bad_input_with_qcdataerror(
    factors, levels, effect, between, within, m, per_day, word
):
    try:
        plan = rotation_plan(
            factors,
            levels,
            effect,
            between_variance=between,
            within_sd=within,
            subgroup_size=m,
            subgroups_per_day=per_day,
            subgroup_word=word,
        )
    except QCDataError:
        return
    assert plan.per_cell >= 1 and plan.power >= plan.target_power


@given(
    subgroups=maybe(st.lists(st.integers(0, 9), max_size=6)),
    position=maybe(st.integers(0, 6)),
    starts=maybe(st.lists(st.datetimes(), max_size=6)),
    around=maybe(st.integers(0, 3)),
    levels=maybe(st.dictionaries(st.text(max_size=2), maybe(st.lists(st.text(max_size=1))))),
)
@examples(300)
def test_step_lookup_refuses_bad_input_with_qcdataerror(
    subgroups, position, starts, around, levels
):
    try:
        look = step_lookup(subgroups, position, starts=starts, around=around, levels=levels)
    except QCDataError:
        return
    assert look.subgroup == look.subgroups[look.positions.index(look.position)]


@pytest.mark.parametrize(
    ("call", "named"),
    [
        (lambda: comparison_plan("paired", 0.0, 0.3), "difference=0"),
        (lambda: comparison_plan("paired", 0.5, 0.0), "sd=0"),
        (lambda: comparison_plan("paired", 0.5, True), "sd=True"),
        (lambda: comparison_plan("paired", 0.5, 0.3, power=1.0), "power=1"),
        (lambda: comparison_plan("paired", 0.5, 0.3, power=0.01), "power=0.01"),
        (lambda: comparison_plan("two_sample", 0.5, 0.3, alpha=0.0), "alpha=0"),
        (lambda: comparison_plan("two_sample", 1e-9, 1.0), "difference=1e-09"),
        (lambda: comparison_plan("two_sample", "0.5", 1.0), "difference='0.5'"),
        (lambda: comparison_plan("paired", 0.5, 0.3, smallest=float("nan")), "smallest=nan"),
        (lambda: comparison_plan("paired", 0.5, 0.3, items=3), "items=3"),
        (lambda: comparison_plan("crossed", 0.5, 0.3), "design='crossed'"),
        (
            lambda: rotation_plan(
                ("a",), (2, 2), 1.0, between_variance=1, within_sd=1, subgroup_size=2
            ),
            "factors",
        ),
        (
            lambda: rotation_plan(
                ("a", "b"), (1, 2), 1.0, between_variance=1, within_sd=1, subgroup_size=2
            ),
            "levels[0]=1",
        ),
        (
            lambda: rotation_plan(
                ("a", "b"), (2, 2), 1.0, between_variance=0, within_sd=0, subgroup_size=2
            ),
            "between_variance=0",
        ),
        (
            lambda: rotation_plan(
                ("a", "b"), (2, 2), 1.0, between_variance=1, within_sd=1, subgroup_size=2.5
            ),
            "subgroup_size=2.5",
        ),
        (lambda: step_lookup(["a", "b"], 2), "position=2"),
        (lambda: step_lookup(["a", "b"], 0), "position=0"),
        (lambda: step_lookup("ab", 1), "subgroups='ab'"),
        (lambda: step_lookup(["a", "b"], 1, starts=[1]), "starts has 1"),
        (lambda: step_lookup(["a", "b"], 1, levels={"crew": ["A"]}), "levels['crew']"),
    ],
)
def test_bad_arguments_are_named(call, named):
    with pytest.raises(QCDataError, match=re.escape(named)):
        call()

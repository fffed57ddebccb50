"""Comparisons and rotations sized by the power of a two-sided t test (see the package notes)."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from scipy import stats

from qcexplore.data.coding import real_number
from qcexplore.errors import QCDataError
from qcexplore.stats.plans.checks import (
    MOST_UNITS,
    nonzero_difference,
    plain_text,
    power_and_alpha,
    whole_number,
)
from qcexplore.stats.plans.words import amount, counted, percent, plural

#: Beyond this noncentrality the power is 1 to double precision (and scipy's series for the
#: noncentral t no longer converge).
_CERTAIN_NCP = 1e4


@dataclass(frozen=True)
class SampleSize:
    """The units that one comparison needs to tell one difference.

    ``difference`` is the difference to tell (positive, in the value's units), ``n`` the
    units (paired: units measured on both levels; two-sample: units from each stream),
    ``se`` the standard error of the estimated difference with ``n`` units and ``power``
    the power that ``n`` achieves (at least the planned power).
    """

    difference: float
    n: int
    se: float
    power: float


@dataclass(frozen=True)
class ComparisonPlan:
    """A paired or two-sample comparison sized to tell a difference with a planned power.

    ``design`` is ``"paired"`` or ``"two_sample"``; ``sd`` the sd of one reading it was
    sized from (the repeatability, or the within-stream sd); ``measured`` the size for the
    measured difference, ``smallest`` the size for the smallest difference worth knowing
    (``None`` when none was given); ``sentence`` the plan in plain words.
    """

    design: str
    sd: float
    alpha: float
    target_power: float
    measured: SampleSize
    smallest: SampleSize | None
    sentence: str


@dataclass(frozen=True)
class RotationPlan:
    """A crossed plan that separates two confounded factors.

    Every level of ``factors[0]`` runs with every level of ``factors[1]`` (``cells`` =
    product of ``levels`` pairings) for ``per_cell`` subgroups each, ``total`` subgroups in
    all; ``days_per_cell`` is ``per_cell`` in days when the subgroups a pairing gets per day
    were given, else ``None``. ``subgroup_sd`` is the sd of one subgroup mean,
    sqrt(between-subgroup variance + within sigma^2 / subgroup size); ``se`` the standard
    error of a difference between two levels of each factor, the other factor balanced out;
    ``df`` the residual degrees of freedom of the additive two-way analysis of the subgroup
    means; ``power`` the power to tell ``effect`` between two levels of ``factors[0]``.
    """

    factors: tuple[str, str]
    levels: tuple[int, int]
    per_cell: int
    cells: int
    total: int
    days_per_cell: int | None
    subgroup_size: int
    subgroup_sd: float
    effect: float
    se: tuple[float, float]
    df: int
    power: float
    target_power: float
    alpha: float
    sentence: str


def _t_power(difference: float, se: float, df: float, alpha: float) -> float:
    """Power of the two-sided t test of a difference with standard error ``se``.

    The sum of both rejection tails, as statsmodels' TTestPower computes it.
    """
    ncp = difference / se if se > 0 else math.inf
    if ncp > _CERTAIN_NCP:
        return 1.0
    crit = stats.t.isf(alpha / 2.0, df)
    # The tail on the wrong side as P(T > crit) at -ncp: scipy's cdf at -crit returns NaN
    # where that tail is far below 1e-16 (df 4, ncp 8.5), its upper tail returns 0.
    return float(stats.nct.sf(crit, df, ncp) + stats.nct.sf(crit, df, -ncp))


def _fewest(power_at: Callable[[int], float], target: float, lowest: int, what: str) -> int:
    """The smallest whole n >= ``lowest`` whose power reaches ``target`` (power rises with n)."""
    if power_at(lowest) >= target:
        return lowest
    low, high = lowest, 2 * lowest
    while high < MOST_UNITS and power_at(high) < target:
        low, high = high, 2 * high
    high = min(high, MOST_UNITS)
    if power_at(high) < target:
        raise QCDataError(
            f"{what} needs more than {MOST_UNITS:,} units at this variation: give a larger "
            "difference worth knowing, or reduce the variation first."
        )
    while high - low > 1:  # power_at(low) < target <= power_at(high)
        mid = (low + high) // 2
        low, high = (low, mid) if power_at(mid) >= target else (mid, high)
    return high


def _sizes(
    difference: float,
    sd: float,
    df_of: Callable[[int], int],
    power: float,
    alpha: float,
    what: str,
) -> SampleSize:
    def se_of(n: int) -> float:
        return math.sqrt(2.0) * sd / math.sqrt(n)

    n = _fewest(
        lambda k: _t_power(difference, se_of(k), df_of(k), alpha),
        power,
        2,
        what,
    )
    return SampleSize(difference, n, se_of(n), _t_power(difference, se_of(n), df_of(n), alpha))


@dataclass(frozen=True)
class _Design:
    """The words of one comparison design and the degrees of freedom of its t test."""

    difference: str  # what is told apart
    same: str  # "the same " when the units are measured on both levels
    spread: str  # the measured sd, as a template with {sd}
    where: str  # the default `where`
    df: Callable[[int], int]  # of n units


_DESIGNS = {
    "paired": _Design(
        "offset", "the same ", "the measured repeatability of {sd}", "on both measurement levels",
        lambda n: n - 1,
    ),
    "two_sample": _Design(
        "difference", "", "the measured sd of {sd} within a stream",
        "from each of the two streams", lambda n: 2 * n - 2,
    ),
}  # fmt: skip


def comparison_plan(
    design: str,
    difference: float,
    sd: float,
    *,
    smallest: float | None = None,
    power: float = 0.9,
    alpha: float = 0.05,
    units: str | None = None,
    verb: str = "measure",
    items: str = "units",
    where: str | None = None,
) -> ComparisonPlan:
    """The units that a paired or a two-sample comparison needs to tell a difference apart.

    Parameters
    ----------
    design : ``"paired"``: the same units measured on both of two measurement levels (two
        scales, two crews), to tell their offset apart; ``"two_sample"``: units from each
        of two streams (nozzles, heads), to tell the streams' difference apart
    difference : the measured offset or difference (its sign does not matter)
    sd : paired: the measured repeatability (one unit read again on the same level), so a
        paired difference has sd sqrt(2) x ``sd``; two-sample: the sd of single units
        within a stream (the within-subgroup sigma)
    smallest : the smallest difference worth knowing, sized as well when given
    power, alpha : the planned power of the two-sided t test at level ``alpha``
    units, verb, items, where : the words of ``sentence`` (``"g"``, ``"weigh"``,
        ``"jars"``, ``"on scales A and B"``); ``where`` defaults to the design's

    Checked against statsmodels' ``TTestPower`` (paired: the one-sample t test of the
    differences, Cohen's d = difference / (sqrt(2) sd)) and ``TTestIndPower`` (two-sample,
    equal sizes, d = difference / sd), Cohen's table of sizes per group (from memory) and
    by simulating each planned study (tests/test_plans.py).

    Examples
    --------
    >>> plan = comparison_plan("paired", 0.5, 0.3, units="g", verb="weigh", items="jars",
    ...                        where="on both scales")
    >>> plan.measured.n, round(plan.measured.se, 3)
    (10, 0.134)
    >>> plan.sentence
    'Weigh the same 10 jars on both scales: enough to tell 0.5 g apart with 90 % power at \
the measured repeatability of 0.3 g.'
    >>> comparison_plan("two_sample", 0.5, 1.0).measured.n
    86
    """
    if not isinstance(design, str) or design not in _DESIGNS:
        raise QCDataError(
            f"design={design!r:.60} is not a comparison: give one of {', '.join(_DESIGNS)}."
        )
    words = _DESIGNS[design]
    measured = nonzero_difference("difference", difference)
    sd = real_number("sd", sd, lower=0, inclusive=False)
    least = None if smallest is None else nonzero_difference("smallest", smallest)
    power, alpha = power_and_alpha(power, alpha)
    units = "" if units is None else plain_text("units", units)
    verb, items = plain_text("verb", verb), plain_text("items", items)
    where = words.where if where is None else plain_text("where", where)

    def size(difference: float, name: str) -> SampleSize:
        what = f"telling {name}={difference:g} apart at sd={sd:g}"
        return _sizes(difference, sd, words.df, power, alpha, what)

    first = size(measured, "difference")
    other = None
    sentence = (
        f"{verb[:1].upper()}{verb[1:]} {words.same}{first.n:,} {items} {where}: enough to "
        f"tell {amount(measured, units)} apart with {percent(power)} power at "
        f"{words.spread.format(sd=amount(sd, units))}."
    )
    if least is not None:
        other = size(least, "smallest")
        sentence += (
            f" {other.n:,} {items} would tell the smallest {words.difference} worth knowing, "
            f"{amount(least, units)}."
        )
    return ComparisonPlan(design, sd, alpha, power, first, other, sentence)


def rotation_plan(
    factors: tuple[str, str],
    levels: tuple[int, int],
    effect: float,
    *,
    between_variance: float,
    within_sd: float,
    subgroup_size: int,
    power: float = 0.9,
    alpha: float = 0.05,
    subgroups_per_day: int | None = None,
    units: str | None = None,
    subgroup_word: str = "subgroup",
) -> RotationPlan:
    """A rotation that runs every level of one factor with every level of the other.

    Two factors that always go together (each crew on its own shift) cannot be told apart.
    Run each of the ``levels[0]`` levels of ``factors[0]`` with each of the ``levels[1]``
    levels of ``factors[1]`` for r subgroups; in the additive two-way analysis of the
    subgroup means, the difference between two levels of ``factors[0]`` has the standard
    error sqrt(2 v / (levels[1] r)), v = ``between_variance`` + ``within_sd``^2 /
    ``subgroup_size`` the variance of one subgroup mean, and the t test of it has
    levels[0] levels[1] r - levels[0] - levels[1] + 1 degrees of freedom. r is the fewest
    subgroups per pairing that tell ``effect`` with ``power``.

    Parameters
    ----------
    factors : the two confounded factors, the one to size for first
    levels : their numbers of levels (at least 2 each)
    effect : the difference between two levels of ``factors[0]`` worth telling (the
        measured difference, or the smallest worth knowing)
    between_variance : the between-subgroup variance component (subgroup to subgroup,
        beyond the factors)
    within_sd : the within-subgroup sigma
    subgroup_size : units per subgroup
    power, alpha : the planned power of the two-sided t test at level ``alpha``
    subgroups_per_day : the subgroups one pairing gets in a day (8 hourly rounds in an
        8-hour shift), to say the plan in days
    units, subgroup_word : the words of ``sentence``

    Checked by simulating the planned rotation: the sd of the estimated difference against
    ``se`` and the share of significant t tests against ``power`` (tests/test_plans.py).

    Examples
    --------
    >>> plan = rotation_plan(("crew", "shift"), (3, 3), 1.0, between_variance=0.25,
    ...                      within_sd=1.0, subgroup_size=5, subgroups_per_day=8,
    ...                      units="g", subgroup_word="round")
    >>> plan.per_cell, plan.total, plan.days_per_cell, round(plan.se[0], 3)
    (4, 36, 1, 0.274)
    """
    if not isinstance(factors, (tuple, list)) or len(factors) != 2:
        raise QCDataError(
            f"factors={factors!r:.60} must be the names of the two confounded factors."
        )
    first, second = plain_text("factors[0]", factors[0]), plain_text("factors[1]", factors[1])
    if not isinstance(levels, (tuple, list)) or len(levels) != 2:
        raise QCDataError(f"levels={levels!r:.60} must be the numbers of levels of both factors.")
    a, b = whole_number("levels[0]", levels[0], 2), whole_number("levels[1]", levels[1], 2)
    effect = nonzero_difference("effect", effect)
    between = real_number("between_variance", between_variance, lower=0)
    within = real_number("within_sd", within_sd, lower=0)
    m = whole_number("subgroup_size", subgroup_size, 1)
    power, alpha = power_and_alpha(power, alpha)
    per_day = None
    if subgroups_per_day is not None:
        per_day = whole_number("subgroups_per_day", subgroups_per_day, 1)
    units = "" if units is None else plain_text("units", units)
    word = plain_text("subgroup_word", subgroup_word)
    # hypot: the sd of a subgroup mean without squaring sds near the float range's end.
    subgroup_sd = math.hypot(math.sqrt(between), within / math.sqrt(m))
    if not 0 < subgroup_sd < math.inf:
        raise QCDataError(
            f"between_variance={between:g} and within_sd={within:g} leave subgroup means with "
            "no usable variation: give the measured components (at least one above zero)."
        )

    def se_of(r: int, other: int) -> float:
        return math.sqrt(2.0) * subgroup_sd / math.sqrt(other * r)

    def df_of(r: int) -> int:
        return a * b * r - a - b + 1

    r = _fewest(
        lambda k: _t_power(effect, se_of(k, b), df_of(k), alpha),
        power,
        1,
        f"telling effect={effect:g} between two {plural(first)} apart from the {second}",
    )
    days = None if per_day is None else -(-r // per_day)
    se = (se_of(r, b), se_of(r, a))
    in_days = "" if days is None else f" ({counted(days, 'day')} each at {per_day} a day)"
    sentence = (
        f"Run every {first} on every {second} ({a} x {b} = {a * b} pairings) for "
        f"{counted(r, word)} each{in_days}, {counted(a * b * r, word)} in "
        f"all: the {first} effect is then measured apart from the {second} effect with a "
        f"standard error of {amount(se[0], units)} (the {second} effect: "
        f"{amount(se[1], units)}), enough to tell {amount(effect, units)} with "
        f"{percent(power)} power."
    )
    return RotationPlan(
        factors=(first, second),
        levels=(a, b),
        per_cell=r,
        cells=a * b,
        total=a * b * r,
        days_per_cell=days,
        subgroup_size=m,
        subgroup_sd=subgroup_sd,
        effect=effect,
        se=se,
        df=df_of(r),
        power=_t_power(effect, se[0], df_of(r), alpha),
        target_power=power,
        alpha=alpha,
        sentence=sentence,
    )

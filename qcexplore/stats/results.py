"""Every result object of qcexplore: the shapes that ``stats`` hands to findings, draw and views.

Every table result holds tidy pandas DataFrames with lower_snake_case columns, prints a
compact summary, renders as a small HTML table in a notebook and flattens to one tidy
table with ``to_frame()``.

Their shared behaviour (deep immutability, ``to_frame``, the summaries) is
``stats.table_result.TableResult``.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterator, Mapping
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

import pandas as pd

from qcexplore.stats.table_result import TableResult

if TYPE_CHECKING:
    from qcexplore.stats.changes import ChangeShapes


@dataclass(frozen=True, eq=False, repr=False)
class ChartResult(TableResult):
    """A control chart: plotted points with their limits and the run-rule signals.

    ``points``: ``subgroup, stratum, stat, center, lcl, ucl, n, signal, rules`` plus
    ``se`` (the point's standard error: the zone width), ``excluded`` (left out of the
    limit estimate), ``beyond`` (the point lies outside its own limits; for CUSUM either sum
    beyond its decision interval: the one definition of "beyond the limits"), ``start``
    (the subgroup's first time, when there is a time column);
    attribute charts add ``count`` (``n`` is then the number inspected); CUSUM adds
    ``stat_lower`` (-C-) and ``change_start`` (where a signalling run began).
    ``limits``: ``stratum, center, lcl, ucl, sigma, method`` (one row per stratum
    with ``limits="per_stratum"``, else one row with ``stratum`` missing) plus ``n`` and
    ``se`` (the typical size and its standard error), ``estimator`` (what gave ``sigma``:
    ``"range"``, ``"sd"`` or ``"moving_range"`` for a within-subgroup estimate, else the
    ``sigma_method``) and ``sigma_df`` (that estimate's effective degrees of freedom; NaN
    when ``sigma`` is not a within-subgroup estimate).
    """

    kind: str
    points: pd.DataFrame
    limits: pd.DataFrame
    secondary: ChartResult | None = None
    title: str = ""
    statistic: str = "mean"
    sigma_level: float = 3.0
    sigma_method: str = "within"
    false_alarm_rate: float = float("nan")
    by: str | None = None
    limits_mode: str = "pooled"
    rules: tuple[str, ...] = ()
    excluded: tuple[Any, ...] = ()
    notes: tuple[str, ...] = ()
    _tables = ("points", "limits")

    @property
    def _heading(self) -> str:  # type: ignore[override]
        return self.title or f"{self.kind} chart"


@dataclass(frozen=True, eq=False, repr=False)
class VariationResult(TableResult):
    """The variance taken apart into its sources, with the error term each test used.

    ``comparisons`` rows carry ``signal`` (analysis of means: the level's mean lies outside
    its decision limits; False on the other tests' rows), so no reader decides it again.
    ``nesting`` lists the nested factors and those whose labels look nested
    (``factor, parent, kind, ..., note``; ``kind`` is ``"nested"`` or ``"probably_nested"``).
    """

    structure: pd.DataFrame
    anova: pd.DataFrame
    components: pd.DataFrame
    comparisons: dict[str, pd.DataFrame] = field(default_factory=dict)
    spread: pd.DataFrame = field(default_factory=pd.DataFrame)
    offsets: pd.DataFrame = field(default_factory=pd.DataFrame)
    multivari: pd.DataFrame = field(default_factory=pd.DataFrame)
    method: str = ""
    notes: tuple[str, ...] = ()
    nesting: pd.DataFrame = field(default_factory=pd.DataFrame)
    _tables = ("structure", "anova", "components", "comparisons", "spread", "offsets", "nesting")
    _heading = "Sources of variation"

    def nested_in(self, factor: str) -> str | None:
        """The parent ``factor`` is nested in (the subgroup column for the subgroups)."""
        rows = self.nesting
        if not len(rows):
            return None
        rows = rows[(rows["factor"] == factor) & (rows["kind"] == "nested")]
        return str(rows["parent"].iloc[0]) if len(rows) else None

    def relation(self, factor: str) -> str:
        """``"within_subgroup"`` or ``"between_subgroups"`` for a factor, ``""`` if unknown."""
        rows = self._structure_rows(factor, confounded=False)
        return str(rows["relation"].iloc[0]) if len(rows) else ""

    def confounded_with(self, factor: str) -> tuple[str, ...]:
        """The columns that ``factor`` cannot be told apart from, in the structure's order."""
        return tuple(str(w) for w in self._structure_rows(factor, confounded=True)["with_"])

    def _structure_rows(self, factor: str, *, confounded: bool) -> pd.DataFrame:
        table = self.structure
        is_confounded = table["relation"] == "confounded"
        return table[(table["factor"] == factor) & (is_confounded == confounded)]


@dataclass(frozen=True)
class AR1Fit(Mapping):
    """A lag-1 autoregressive fit with a mean, and the likelihood-ratio test of phi = 0.

    ``phi``, ``se`` (its standard error, NaN when the likelihood has no curvature at its
    maximum), ``sigma2`` (innovation variance) and ``loglik`` are the published fit;
    ``mean`` is the process mean and ``p`` the likelihood-ratio test of phi = 0
    (chi-square with 1 df). It reads as the mapping of the published four,
    as ``TimeResult.ar1`` always has: ``fit["phi"]``, ``dict(fit)``.

    Examples
    --------
    >>> fit = AR1Fit(phi=0.5, se=0.1, sigma2=1.0, loglik=-10.0, mean=0.0, p=5.7e-7)
    >>> fit["phi"], sorted(fit)
    (0.5, ['loglik', 'phi', 'se', 'sigma2'])
    """

    phi: float
    se: float
    sigma2: float
    loglik: float
    mean: float
    p: float

    def __getitem__(self, key: str) -> float:
        if key not in _AR1_KEYS:
            raise KeyError(key)
        return getattr(self, key)

    def __iter__(self) -> Iterator[str]:
        return iter(_AR1_KEYS)

    def __len__(self) -> int:
        return len(_AR1_KEYS)


#: The members of the AR(1) fit that API.md publishes as ``TimeResult.ar1``.
_AR1_KEYS = ("phi", "se", "sigma2", "loglik")


@dataclass(frozen=True, eq=False, repr=False)
class TimeResult(TableResult):
    """Time structure of the plotted series: autocorrelation, steps, a drift, an AR(1) fit.

    ``acf``: ``lag, acf, pacf, lower, upper``; ``ljung_box``: ``lag, q, p``; ``ar1``: the
    AR(1) fit of the residuals about the chosen level and its test; ``shifts``:
    ``subgroup, position, time, before, after, p``; ``series``: ``subgroup, start, mean,
    n, segment_mean`` (the fitted step function) and ``level`` (the chosen level);
    ``residual_chart`` and ``moving_center_chart``: the charts to read when the series is
    autocorrelated (``None`` when it is not). ``explanation``: what the data support, words
    of ``stats.timeseries.EXPLANATIONS``; ``level_models``: the evidence for it (each
    level model with the AR(1) fit of its residuals and its BIC); ``drift``: ``subgroup,
    position, time, slope, before, after`` when a drift explains the change;
    ``autocorrelation_p``: the p value the autocorrelation explanation rests on.
    """

    acf: pd.DataFrame
    ljung_box: pd.DataFrame
    ar1: AR1Fit
    shifts: pd.DataFrame
    series: pd.DataFrame
    effective_n: float
    residual_chart: ChartResult | None = None
    moving_center_chart: ChartResult | None = None
    notes: tuple[str, ...] = ()
    explanation: tuple[str, ...] = ()
    level_models: pd.DataFrame = field(default_factory=pd.DataFrame)
    drift: pd.DataFrame = field(default_factory=pd.DataFrame)
    autocorrelation_p: float = float("nan")
    _tables = ("acf", "ljung_box", "shifts", "level_models")
    _heading = "Time structure"


@dataclass(frozen=True, eq=False, repr=False)
class CapabilityResult(TableResult):
    """Capability indices against a specification, with intervals and ppm.

    ``interval_method`` states how the intervals were computed and on how many degrees of
    freedom (for the C indices, the effective df of the within-subgroup sigma).
    """

    indices: pd.DataFrame
    ppm: pd.DataFrame
    normality: pd.DataFrame
    lsl: float | None = None
    usl: float | None = None
    target: float | None = None
    mean: float = float("nan")
    sigma_within: float = float("nan")
    sigma_overall: float = float("nan")
    n: int = 0
    histogram: pd.DataFrame = field(default_factory=pd.DataFrame)
    curve: pd.DataFrame = field(default_factory=pd.DataFrame)
    warnings: tuple[str, ...] = ()
    interval_method: str = ""
    _tables = ("indices", "ppm", "normality")
    _heading = "Capability"


@dataclass(frozen=True, eq=False, repr=False)
class GaugeResult(TableResult):
    """A crossed measurement-system study.

    ``anova``: ``source, df, ss, ms, f, p, error_term``.
    ``components``: ``source, variance, sd, share`` for ``part``, ``operator``,
    ``part x operator`` (absent when pooled) and ``residual`` (repeatability).
    ``summary``: ``source, variance, sd, pct_contribution, pct_study_variation,
    pct_tolerance`` for repeatability, reproducibility, operator, part x operator,
    gauge (repeatability + reproducibility), part and total.
    """

    anova: pd.DataFrame
    components: pd.DataFrame
    summary: pd.DataFrame
    ndc: float
    pooled: bool
    parts: int
    operators: int
    repeats: int
    tolerance: float | None = None
    study_width: float = 6.0
    notes: tuple[str, ...] = field(default_factory=tuple)
    _tables = ("summary", "anova", "components")
    _heading = "Measurement-system study"


@dataclass(frozen=True)
class ArlResult:
    """An average run length and how it was obtained.

    Attributes
    ----------
    value : float
        Average run length in plotted points.
    method : str
        ``"exact"``, ``"markov_chain"``, ``"brook_evans"`` or ``"monte_carlo"``.
    se : float
        Standard error of ``value``: 0.0 except for ``"monte_carlo"``.
    """

    value: float
    method: str
    se: float = 0.0


@dataclass(frozen=True)
class Onset:
    """The fitted onset of a change in one level's contrast with the other levels.

    ``p`` tests the change model against a constant difference (the largest F over the
    onsets searched, against its simulated null distribution); NaN when the contrast is too
    short to test or fits exactly.
    """

    factor: str
    level: str  # the level's label as text
    model: str  # "step" or "ramp"
    position: int  # index into the contrast series of the first point after the onset
    start: object  # the subgroup start (time) at the onset, or the subgroup label
    before: float  # mean contrast before the onset
    change: float  # step size (step) or slope per unit of `scale` (ramp)
    scale: str  # "day" when the subgroups have times, else "subgroup"
    rss: float
    p: float


@dataclass(frozen=True)
class BeyondLimits:
    """How many plotted points lie beyond a chart's limits, against a stable process.

    ``rate`` is 2 P(Z > L), the share of a stable normal process beyond limits at L
    sigma; ``p`` the one-sided binomial test P(X >= count) at that rate (NaN without
    points).
    """

    count: int
    points: int
    rate: float
    p: float


@dataclass(frozen=True, eq=False, repr=False)
class Evidence(TableResult):
    """Everything that the findings cite: the results and the tests computed on them.

    ``chart`` is the default control chart, ``variation`` the sources of variation
    (``None`` without factors), ``time`` the time structure (``None`` when the series is
    too short or constant), ``capability`` the capability (``None`` without a
    specification). ``beyond`` counts the default chart's points beyond its limits,
    ``beyond_adjusted`` those of the same chart with the measured_by offsets removed
    (``None`` without measured_by factors).

    ``tests`` is the one family of gate tests (``test, factor, position, p,
    p_adjusted``, Holm's method over all rows; ``position`` names a step in
    ``time.shifts``); ``levels`` the level tests of each factor (``factor, level,
    estimate, se, p, p_adjusted``, Holm among the factor's levels); ``level_spread``
    each level's within-subgroup sd and that of the other levels (``factor, level, sd,
    others_sd``); ``onsets`` the onset of each level of the within-subgroup process
    factors. ``value``, ``units``, ``subgroup`` (``None`` for individual values),
    ``factors`` and ``measured_by`` are the roles the wording needs.
    ``time_confounding`` sets each level of the factors constant inside subgroups against
    the changes in time (the steps found, where a level starts or stops appearing;
    ``stats.variation.time_confounding``): ``confounded`` marks a level that cannot be told
    apart from a change of the process at that time. ``shapes`` the shape of each level's
    difference over time and of the subgroup means, and which level's change accounts for
    the process's (``stats.changes``).
    """

    chart: ChartResult
    variation: VariationResult | None
    time: TimeResult | None
    capability: CapabilityResult | None
    beyond: BeyondLimits
    beyond_adjusted: BeyondLimits | None
    tests: pd.DataFrame
    levels: pd.DataFrame
    level_spread: pd.DataFrame
    onsets: tuple[Onset, ...]
    value: str
    units: str | None
    subgroup: str | None
    factors: tuple[str, ...]
    measured_by: tuple[str, ...]
    time_confounding: pd.DataFrame = field(default_factory=pd.DataFrame)
    shapes: ChangeShapes | None = None
    _tables = ("tests", "levels", "level_spread", "time_confounding")

    @property
    def _heading(self) -> str:  # type: ignore[override]
        return f"Evidence on {self.value}"

    def time_rows(self, factor: str, level: str) -> pd.DataFrame:
        """The rows of ``time_confounding`` for one level (empty when it is not one-sided)."""
        table = self.time_confounding
        if not len(table):
            return table
        return table[(table["factor"] == factor) & (table["level"] == level)]

    def onset(self, factor: str, level: str) -> Onset | None:
        """The onset of one level's difference from the others, if it was fitted."""
        return next((o for o in self.onsets if o.factor == factor and o.level == level), None)


def p_text(p: float) -> str:
    """A p-value for people: two significant digits, and a floor where doubles end.

    Examples
    --------
    >>> p_text(0.01234), p_text(0.0)
    ('0.012', '< 1e-300')
    """
    return "< 1e-300" if p < 1e-300 else f"{p:.2g}"


class Findings(list):
    """The ranked findings (a list of :class:`Finding`) that show as cards in a notebook."""

    def _repr_html_(self) -> str:
        cards = "".join(f._repr_html_() for f in self)
        return cards or "<p>No findings: nothing stands out beyond chance.</p>"


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
    the ranking key, ``start`` the time (or subgroup) a change appears to start,
    ``caveat`` what the design cannot tell, ``sentence`` one sentence a team understands,
    ``next_step`` what would settle it (with the samples it needs), and ``view`` the
    explorer settings that show its evidence (``("view", name)`` first, then options).
    ``shape`` is the form of the change over time (``"offset"``, ``"step"``, ``"drift"``,
    or None when no shape was fitted), ``slope`` a drift's change per day (per subgroup
    without timestamps) in the value's units, and ``explained_by`` the title of the finding
    that accounts for this one (a process step that is one stream's drift seen in the
    averages), None when it stands on its own.

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
    sentence: str = ""
    next_step: str = ""
    view: tuple[tuple[str, Any], ...] = ()
    shape: str | None = None
    slope: float | None = None
    explained_by: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """The fields as a plain dict (one row of ``findings.findings_frame``)."""
        return asdict(self)

    def _repr_html_(self) -> str:
        evidence = (
            ""
            if math.isnan(self.p_adjusted)
            else f" <small>(adjusted p = {p_text(self.p_adjusted)})</small>"
        )
        caveat = f"<p><em>{html.escape(self.caveat)}</em></p>" if self.caveat else ""
        step = f"<p><b>Next step:</b> {html.escape(self.next_step)}</p>" if self.next_step else ""
        return (
            "<div class='qcexplore-finding' style='border:1px solid #ddd;border-radius:6px;"
            "padding:0.4em 0.8em;margin:0.6em 0'>"
            f"<p style='font-size:1.15em'><strong>{html.escape(self.title)}</strong>{evidence}</p>"
            f"<p>{html.escape(self.sentence)}</p>{step}"
            f"<details><summary>The statistics behind it</summary><p>{html.escape(self.detail)}"
            f"</p>{caveat}</details></div>"
        )

"""The options of each analysis, declared once: field, default, choices and plain-word label.

An options object is a frozen dataclass validated on construction, so a bad argument is refused
in one place whether it came from ``Study.chart(...)``, an explorer control or a saved
investigation log. Options are hashable: the Study caches results by them. The explorer builds
its controls from the fields' metadata (:func:`controls_of`), and the log stores
:meth:`Options.to_dict`.

The valid values of a choice are the constants of the stats module that implements them; the
labels here are the words people read.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

from qcexplore.data.validate import column_names
from qcexplore.errors import QCDataError
from qcexplore.spec import Spec
from qcexplore.stats.charts import check_chart_arguments
from qcexplore.stats.rules import resolve_rules

KIND_LABELS = {
    "auto": "chosen by subgroup size",
    "xbar_r": "means with ranges (X-bar and R)",
    "xbar_s": "means with standard deviations (X-bar and S)",
    "imr": "single values with moving ranges (I-MR)",
    "ewma": "EWMA of the means",
    "cusum": "CUSUM of the means",
    "p": "share defective (p)",
    "np": "number defective (np)",
    "c": "defects per subgroup (c)",
    "u": "defects per unit (u)",
}
LIMIT_LABELS = {"pooled": "one set for all strata", "per_stratum": "separate for each stratum"}
SIGMA_LABELS = {
    "within": "within subgroups",
    "between_means": "between subgroup means",
    "overall": "overall (for comparison)",
}
RULE_LABELS = {"nelson": "Nelson (8 tests)", "western_electric": "Western Electric (4 tests)"}


@dataclass(frozen=True)
class Control:
    """How one option is offered to people: its label, its choices (value -> words), its range.

    ``kind``: ``"choice"``, ``"number"`` (bounded), ``"optional_number"`` (empty for none),
    ``"text"`` (empty for none), ``"switch"``, or ``"hidden"`` (set by the program, e.g.
    from a selection on the chart).
    """

    label: str
    kind: str = "choice"
    choices: Mapping[Hashable, str] = field(default_factory=dict)
    bounds: tuple[float, float] | None = None
    step: float | None = None
    none_label: str = ""
    #: The widget's HTML class after ``qcx-`` (default: the field name with hyphens).
    css: str = ""


def option(default: Any, control: Control) -> Any:
    """A dataclass field with its control description in the field's metadata."""
    return field(default=default, metadata={"control": control})


class Options:
    """Shared behaviour of options objects: replace, plain data, and their controls."""

    #: What the analysis is called in messages ("chart", "variation").
    analysis: ClassVar[str] = ""

    def replace(self, **changes: Any) -> Options:
        """A copy with some fields changed (validated again)."""
        unknown = sorted(set(changes) - {f.name for f in dataclasses.fields(self)})  # type: ignore[arg-type]
        if unknown:
            raise QCDataError(
                f"{self.analysis} has no option {', '.join(unknown)}; its options are "
                f"{', '.join(f.name for f in dataclasses.fields(self))}."  # type: ignore[arg-type]
            )
        return dataclasses.replace(self, **changes)  # type: ignore[type-var]

    def to_dict(self) -> dict[str, Any]:
        """The options as JSON-ready data (tuples as lists)."""
        return {
            f.name: _plain(getattr(self, f.name))
            for f in dataclasses.fields(self)  # type: ignore[arg-type]
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Options:
        """The options from :meth:`to_dict` output; unknown names are refused."""
        if not isinstance(data, Mapping):
            raise QCDataError(f"The {cls.analysis} options must be a table of names and values.")
        return cls().replace(**dict(data))


def _plain(value: Any) -> Any:
    if isinstance(value, tuple):
        return [_plain(v) for v in value]
    return value


def controls_of(options: type[Options] | Options) -> dict[str, Control]:
    """The shown options of an options type, in field order, with their controls.

    Examples
    --------
    >>> list(controls_of(ChartOptions))[:3]
    ['kind', 'by', 'highlight']
    """
    return {
        f.name: f.metadata["control"]
        for f in dataclasses.fields(options)  # type: ignore[arg-type]
        if f.metadata.get("control") and f.metadata["control"].kind != "hidden"
    }


def _labels_tuple(name: str, labels: Any) -> tuple[Hashable, ...]:
    items = (
        [labels] if isinstance(labels, (str, bytes)) or not isinstance(labels, Sequence) else labels
    )
    for item in items:
        try:
            hash(item)
        except TypeError:
            raise QCDataError(
                f"{name}: {item!r} is not a single label; give subgroup labels such as "
                "dates, hours or lot names."
            ) from None
    return tuple(items)


@dataclass(frozen=True)
class ChartOptions(Options):
    """Every option of a control chart (see ``qcexplore.stats.charts.control_chart``).

    Examples
    --------
    >>> ChartOptions(kind="xbar_s").kind
    'xbar_s'
    >>> ChartOptions(kind="pie")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: kind='pie': use one of 'auto', ...
    """

    analysis: ClassVar[str] = "The chart"

    kind: str = option("auto", Control("Chart", choices=KIND_LABELS))
    by: str | None = option(None, Control("Split by", none_label="no split", css="split-by"))
    highlight: str | None = option(
        None, Control("Coloured level", none_label="the first", css="highlight")
    )
    limits: str = option("pooled", Control("Limits", choices=LIMIT_LABELS))
    sigma_level: float = option(
        3.0, Control("Limits at ± sigma", "number", bounds=(1, 6), step=0.5)
    )
    sigma_method: str = option("within", Control("Sigma from", choices=SIGMA_LABELS))
    rules: str | tuple[str, ...] = option("nelson", Control("Run tests", choices=RULE_LABELS))
    center: float | None = option(
        None, Control("Centre line at", "optional_number", none_label="estimated from the data")
    )
    sigma: float | None = option(None, Control("Known sigma", "hidden"))
    adjust_for: tuple[str, ...] | bool = option(
        False, Control("Remove the sampling offsets", "switch")
    )
    exclude: tuple[Hashable, ...] = option((), Control("Left out of the limits", "hidden"))
    iterate: bool = option(False, Control("Re-estimate without points beyond", "hidden"))
    size: str | None = option(None, Control("Number inspected", "hidden"))
    laney: bool = option(False, Control("Laney limits for over-dispersion", "hidden"))
    lam: float = option(0.2, Control("EWMA weight", "hidden"))
    L: float = option(3.0, Control("EWMA limit width", "hidden"))
    k: float = option(0.5, Control("CUSUM reference value", "hidden"))
    h: float = option(5.0, Control("CUSUM decision interval", "hidden"))

    def __post_init__(self) -> None:
        # Sequences become tuples (the options are a cache key); the values are checked by the
        # chart's own check, so Study.chart, a control and a log are refused in the same words.
        if not isinstance(self.rules, str):
            object.__setattr__(self, "rules", resolve_rules(self.rules))
        object.__setattr__(self, "exclude", _labels_tuple("exclude", self.exclude))
        if not isinstance(self.adjust_for, bool):
            object.__setattr__(self, "adjust_for", column_names(self.adjust_for, "adjust_for"))
        for name in ("iterate", "laney"):
            if not isinstance(getattr(self, name), bool):
                raise QCDataError(f"{name}={getattr(self, name)!r}: give True or False.")
        if self.by is not None and not isinstance(self.by, str):
            raise QCDataError(f"by={self.by!r}: name one factor of the study, or None.")
        if self.highlight is not None and not isinstance(self.highlight, str):
            raise QCDataError(f"highlight={self.highlight!r}: name one level of the split.")
        if self.size is not None and not isinstance(self.size, str):
            raise QCDataError(f"size={self.size!r}: name the column with the number inspected.")
        resolve_rules(self.rules)
        check_chart_arguments(**self.chart_arguments())

    #: Options of the picture only: they change no number of the chart.
    DISPLAY_ONLY: ClassVar[tuple[str, ...]] = ("highlight",)

    def chart_arguments(self) -> dict[str, Any]:
        """The keyword arguments of ``stats.charts.control_chart`` (all but the offsets and
        the options of the picture)."""
        return {
            f.name: getattr(self, f.name)
            for f in dataclasses.fields(self)
            if f.name not in ("adjust_for", *self.DISPLAY_ONLY)
        }


@dataclass(frozen=True)
class VariationOptions(Options):
    """The options of the variance decomposition: which factors to take apart (all by default)."""

    analysis: ClassVar[str] = "The variation analysis"

    factors: tuple[str, ...] | None = option(None, Control("Factors", "hidden"))

    def __post_init__(self) -> None:
        if self.factors is not None:
            object.__setattr__(self, "factors", column_names(self.factors, "factors"))


@dataclass(frozen=True)
class TimeOptions(Options):
    """The options of the time-structure analysis."""

    analysis: ClassVar[str] = "The time-structure analysis"

    max_lag: int | None = option(None, Control("Largest lag", "hidden"))

    def __post_init__(self) -> None:
        lag = self.max_lag
        if lag is not None and (isinstance(lag, bool) or not isinstance(lag, int) or lag < 1):
            raise QCDataError(f"max_lag={lag!r}: give a whole number of lags >= 1, or None.")


@dataclass(frozen=True)
class SpecOptions(Options):
    """The specification typed in the explorer: either limit may be absent, and the units.

    Examples
    --------
    >>> SpecOptions(lsl=500.0, units="g").spec().lsl
    500.0
    >>> SpecOptions().spec() is None
    True
    """

    analysis: ClassVar[str] = "The specification"

    lsl: float | None = option(None, Control("Lower limit", "optional_number", none_label="none"))
    usl: float | None = option(None, Control("Upper limit", "optional_number", none_label="none"))
    target: float | None = option(None, Control("Target", "optional_number", none_label="none"))
    units: str | None = option(None, Control("Units", "text", none_label="none"))

    def __post_init__(self) -> None:
        if self.units is not None and not isinstance(self.units, str):
            raise QCDataError(f"units={self.units!r}: give the unit as text, e.g. g or mm.")
        if self.units is not None and not self.units.strip():
            object.__setattr__(self, "units", None)
        self.spec()  # the limits are checked by Spec, the one place that knows them

    def spec(self) -> Spec | None:
        """The specification, or None when no limit is given."""
        if self.lsl is None and self.usl is None:
            if self.target is not None:
                raise QCDataError("A target alone is no specification: give a limit as well.")
            return None
        return Spec(lsl=self.lsl, usl=self.usl, target=self.target)

    def limits(self) -> dict[str, float | None] | None:
        """The specification as plain data, as ``Study.roles()`` gives it (None: no limit)."""
        spec = self.spec()
        return None if spec is None else spec.to_dict()

    @classmethod
    def of(cls, spec: Spec | None, units: str | None) -> SpecOptions:
        """The options that stand for a study's specification and units."""
        if spec is None:
            return cls(units=units)
        return cls(lsl=spec.lsl, usl=spec.usl, target=spec.target, units=units)

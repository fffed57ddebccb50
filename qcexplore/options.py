"""The options of each analysis, declared once: field, default, choices and plain-word label.

An options object is a frozen dataclass validated on construction, so a bad argument is refused
in one place whether it came from ``Study.chart(...)``, an explorer control or a saved
investigation log. Options are hashable: the Study caches results by them. The explorer builds
its controls from each type's ``CONTROLS`` (:func:`controls_of`), and the log stores
:meth:`Options.to_dict`.

The valid values of a choice are the constants of the stats module that implements them; the
labels here are the words people read.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Hashable, Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

from qcexplore.data.validate import column_names
from qcexplore.errors import QCDataError
from qcexplore.spec import Spec
from qcexplore.stats.charts import KIND_LABELS, ChartSettings

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
    ``"text"`` (empty for none) or ``"switch"``.
    """

    label: str
    kind: str = "choice"
    choices: Mapping[Hashable, str] = field(default_factory=dict)
    bounds: tuple[float, float] | None = None
    step: float | None = None
    none_label: str = ""
    #: The widget's HTML class after ``qcx-`` (default: the field name with hyphens).
    css: str = ""


class Options:
    """Shared behaviour of options objects: replace, plain data, and their controls."""

    #: What the analysis is called in messages ("chart", "variation").
    analysis: ClassVar[str] = ""
    #: How the fields people set are offered, in the order shown; fields not listed are set
    #: by the program (from a selection on the chart, say) or from Python only.
    CONTROLS: ClassVar[Mapping[str, Control]] = {}

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
    """The shown options of an options type, in the order shown, with their controls.

    Examples
    --------
    >>> list(controls_of(ChartOptions))[:3]
    ['kind', 'by', 'highlight']
    """
    return dict(options.CONTROLS)


@dataclass(frozen=True)
class ChartOptions(ChartSettings, Options):
    """Every option of a control chart: the chart's settings (``stats.charts.ChartSettings``,
    which checks them) and the options of the picture (``highlight``) and of the data charted
    (``adjust_for``).

    Examples
    --------
    >>> ChartOptions(by="crew", adjust_for=None).adjust_for
    False
    """

    analysis: ClassVar[str] = "The chart"
    CONTROLS: ClassVar[Mapping[str, Control]] = {
        "kind": Control("Chart", choices=KIND_LABELS),
        "by": Control("Split by", none_label="no split", css="split-by"),
        "highlight": Control("Coloured level", none_label="the first", css="highlight"),
        "limits": Control("Limits", choices=LIMIT_LABELS),
        "sigma_level": Control("Limits at ± sigma", "number", bounds=(1, 6), step=0.5),
        "sigma_method": Control("Sigma from", choices=SIGMA_LABELS),
        "rules": Control("Run tests", choices=RULE_LABELS),
        "center": Control(
            "Centre line at", "optional_number", none_label="estimated from the data"
        ),
        "adjust_for": Control("Remove the sampling offsets", "switch"),
    }

    highlight: str | None = None
    #: The measured_by factors whose offsets are removed before charting (True: all of them).
    adjust_for: tuple[str, ...] | bool = False

    def __post_init__(self) -> None:
        super().__post_init__()
        if self.adjust_for is None:
            object.__setattr__(self, "adjust_for", False)
        elif not isinstance(self.adjust_for, bool):
            object.__setattr__(self, "adjust_for", column_names(self.adjust_for, "adjust_for"))
        if self.highlight is not None and not isinstance(self.highlight, str):
            raise QCDataError(f"highlight={self.highlight!r}: name one level of the split.")

    def chart_arguments(self) -> dict[str, Any]:
        """The keyword arguments of ``stats.charts.control_chart``: the chart's settings."""
        return self.settings()


@dataclass(frozen=True)
class VariationOptions(Options):
    """The options of the variance decomposition: which factors to take apart (all by default)."""

    analysis: ClassVar[str] = "The variation analysis"

    factors: tuple[str, ...] | None = None

    def __post_init__(self) -> None:
        if self.factors is not None:
            object.__setattr__(self, "factors", column_names(self.factors, "factors"))


@dataclass(frozen=True)
class TimeOptions(Options):
    """The options of the time-structure analysis."""

    analysis: ClassVar[str] = "The time-structure analysis"

    max_lag: int | None = None

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

    CONTROLS: ClassVar[Mapping[str, Control]] = {
        "lsl": Control("Lower limit", "optional_number", none_label="none"),
        "usl": Control("Upper limit", "optional_number", none_label="none"),
        "target": Control("Target", "optional_number", none_label="none"),
        "units": Control("Units", "text", none_label="none"),
    }

    lsl: float | None = None
    usl: float | None = None
    target: float | None = None
    units: str | None = None

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

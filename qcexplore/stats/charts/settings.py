"""The settings of a control chart, declared once: every field with its default, checked on
construction.

``control_chart`` takes them as keywords, the families read them from the ``ChartRequest`` that
extends them, and ``qcexplore.options.ChartOptions`` extends them with the options of the
picture, so ``Study.chart(...)``, an explorer control and a saved log are refused in the same
words.
"""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from dataclasses import dataclass, fields
from typing import Any

from qcexplore.data.coding import is_real_number, real_number
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.kinds import AUTO, CHART_KINDS, chart_kinds
from qcexplore.stats.rules import resolve_rules

SIGMA_METHODS = ("within", "between_means", "overall")
LIMIT_MODES = ("pooled", "per_stratum")


def labels_tuple(name: str, labels: Any) -> tuple[Hashable, ...]:
    """Subgroup labels as a tuple (one label alone counts as one); unhashable cells refused."""
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
class ChartSettings:
    """Every setting of a control chart (see ``control_chart`` for their meaning).

    Examples
    --------
    >>> ChartSettings(kind="xbar_s").kind
    'xbar_s'
    >>> ChartSettings(kind="pie")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: kind='pie': use one of 'auto', ...
    """

    kind: str = AUTO
    by: str | None = None
    limits: str = "pooled"
    sigma_level: float = 3.0
    sigma_method: str = "within"
    center: float | None = None
    sigma: float | None = None
    rules: str | tuple[str, ...] = "nelson"
    exclude: tuple[Hashable, ...] = ()
    iterate: bool = False
    size: str | None = None
    laney: bool = False
    lam: float = 0.2
    L: float = 3.0
    k: float = 0.5
    h: float = 5.0

    def __post_init__(self) -> None:
        # Sequences become tuples: settings are a cache key.
        if not isinstance(self.rules, str):
            object.__setattr__(self, "rules", resolve_rules(self.rules))
        object.__setattr__(self, "exclude", labels_tuple("exclude", self.exclude))
        resolve_rules(self.rules)
        self._check_choices()
        self._check_numbers()
        self._check_family_options()

    @classmethod
    def names(cls) -> tuple[str, ...]:
        """The names of the chart's settings."""
        return tuple(f.name for f in fields(ChartSettings))

    def settings(self) -> dict[str, Any]:
        """The settings alone, as ``control_chart``'s keywords."""
        return {name: getattr(self, name) for name in ChartSettings.names()}

    def _check_choices(self) -> None:
        for name, allowed in (
            ("kind", (AUTO, *chart_kinds())), ("limits", LIMIT_MODES),
            ("sigma_method", SIGMA_METHODS),
        ):  # fmt: skip
            given = getattr(self, name)
            if given not in allowed:
                raise QCDataError(f"{name}={given!r}: use one of {', '.join(map(repr, allowed))}.")
        if self.limits == "per_stratum" and self.by is None:
            raise QCDataError(
                "limits='per_stratum' needs by= (the factor whose levels get their own limits)."
            )
        for name in ("by", "size"):
            given = getattr(self, name)
            if given is not None and not isinstance(given, str):
                raise QCDataError(f"{name}={given!r}: name one column of the study, or None.")
        for name in ("iterate", "laney"):
            if not isinstance(getattr(self, name), bool):
                raise QCDataError(f"{name}={getattr(self, name)!r}: give True or False.")

    def _check_numbers(self) -> None:
        for name in ("sigma_level", "L", "h"):
            real_number(name, getattr(self, name), lower=0, inclusive=False)
        if not (is_real_number(self.lam) and 0 < self.lam <= 1):
            raise QCDataError(f"lam={self.lam!r}: the EWMA weight must lie in (0, 1], e.g. 0.2.")
        real_number("k", self.k, lower=0)
        if self.center is not None:
            real_number("center", self.center)
        if self.sigma is not None:
            real_number("sigma", self.sigma, lower=0, inclusive=False)

    def _check_family_options(self) -> None:
        kind = CHART_KINDS.get(self.kind)
        if self.laney and not (kind and kind.laney):
            allowed = [k for k, v in CHART_KINDS.items() if v.laney]
            raise QCDataError(
                f"laney=True is for the {' and '.join(allowed)} charts (Laney's correction), "
                f"not kind={self.kind!r}."
            )
        if self.iterate and kind is not None and kind.smoothed:
            raise QCDataError(
                f"iterate=True is for Shewhart and attribute charts, not kind={self.kind!r}; "
                "estimate the limits on a clean period with exclude= instead."
            )

"""The Study: validated data, the roles of its columns, and cached results.

``Study`` is the one facade that findings, draw, app, report and cli need. It
only stores, validates and delegates: every number comes from ``qcexplore.stats``.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from qcexplore.data.dates import check_time_line, parse_times
from qcexplore.data.derive import DERIVED_FACTORS, derive_time_factors, shift_starts
from qcexplore.data.io import read
from qcexplore.data.numbers import numeric_values
from qcexplore.data.validate import (
    DroppedRows,
    as_factor,
    check_role_names,
    column_names,
    finite_mask,
    require_columns,
    require_frame,
    require_text_names,
    row_list,
)
from qcexplore.errors import QCDataError, explore_extra
from qcexplore.options import ChartOptions, TimeOptions, VariationOptions
from qcexplore.spec import Spec
from qcexplore.stats.results import (
    CapabilityResult,
    ChartResult,
    Evidence,
    Findings,
    TimeResult,
    VariationResult,
)
from qcexplore.stats.subgroups import subgroup_table

#: Name of the internal column that numbers individual values when there is no subgroup.
OBSERVATION = "observation"


class Study:
    """An investigation of one measured characteristic.

    Parameters
    ----------
    frame : the data, one row per measurement (pandas, polars or pyarrow table)
    value : the measured characteristic (numeric; text numbers and decimal commas
        are converted; missing and infinite values are left out and counted)
    subgroup : column naming the rational subgroup (an hour, a day, a lot);
        ``None`` means individual values in time order
    time : timestamps or an order column; with timestamps the derived factors
        ``weekday``, ``hour`` and ``day`` are available, and ``shift`` when
        ``shifts`` is given
    factors : stratification columns (derived names may be listed)
    measured_by : the factors that describe how a sample was taken or measured
        (added to ``factors`` if not listed there)
    shifts : shift names to start clocks, e.g. ``{"early": "06:00", "late": "14:00"}``
    spec : a ``Spec`` (or a dict of its arguments)
    units : the unit of the value, for titles and findings

    Examples
    --------
    >>> from qcexplore.demo import filling_line
    >>> frame, truth = filling_line()
    >>> s = Study(frame, value="net_g", subgroup="round", time="taken_at",
    ...           factors=["crew", "shift", "nozzle"], measured_by=["crew"])
    >>> int(s.subgroups["n"].max())
    5
    """

    def __init__(
        self,
        frame: Any,
        *,
        value: str,
        subgroup: str | None = None,
        time: str | None = None,
        factors: Sequence[str] = (),
        measured_by: Sequence[str] = (),
        shifts: Mapping[str, str] | None = None,
        spec: Spec | Mapping[str, float] | None = None,
        units: str | None = None,
    ) -> None:
        factors = column_names(factors, "factors")
        measured_by = column_names(measured_by, "measured_by")
        factors = factors + tuple(m for m in measured_by if m not in factors)
        check_role_names(value, subgroup, time, factors, measured_by)
        if shifts is not None:
            shift_starts(shifts)
        # Positions 0..n-1 as the index: every message names rows of the table as given,
        # also after rows are dropped or sorted.
        source = require_text_names(require_frame(read(frame)).reset_index(drop=True))
        require_columns(source, [value], "value")
        if subgroup is not None:
            require_columns(source, [subgroup], "subgroup")
        if time is not None:
            require_columns(source, [time], "time")

        values = numeric_values(source, value)
        keep, dropped = finite_mask(values)
        data = source.loc[keep].copy()
        data[value] = values[keep].to_numpy()
        if time is not None:
            data[time] = parse_times(data[time], time)
            # Rows are still in the order given, so a time column that starts again in blocks
            # (day of month beside a month) is refused before it is sorted into nonsense.
            check_time_line(data, time, subgroup)
            for name, series in derive_time_factors(data[time], shifts).items():
                if name not in data.columns:
                    data[name] = series
        elif shifts is not None:
            raise QCDataError("shifts need a time column with timestamps: give time=.")
        # Derived names already in the table (a saved Study's data, say) serve the same way.
        derived_here = [
            d for d in DERIVED_FACTORS if d in data.columns and d not in (value, subgroup, time)
        ]
        missing = [f for f in factors if f not in data.columns]
        if missing:
            hint = (
                " (weekday, hour and day need time= with timestamps; shift also needs shifts=)"
                if set(missing) & set(DERIVED_FACTORS)
                else ""
            )
            require_columns(data, missing, f"factors{hint}")
        if subgroup in factors:
            raise QCDataError(
                f"{subgroup!r} is the subgroup and cannot also be a factor; a factor is "
                "compared across subgroups, so choose a column that groups them."
            )
        for name in dict.fromkeys([*factors, *derived_here]):
            data[name] = as_factor(data[name])
        if len(data) == 0:
            raise QCDataError(f"Column {value!r} has no usable values ({dropped.describe()}).")

        data = self._order(data, subgroup, time)
        self._value = value
        self._subgroup = subgroup
        self._time = time
        self._factors = factors
        self._measured_by = measured_by
        self._shifts = dict(shifts) if shifts is not None else None
        self._spec = Spec.coerce(spec)
        self._units = units
        self._dropped = dropped
        self._derived = tuple(derived_here)
        self._data = data
        self._cache: dict[tuple, Any] = {}

    @staticmethod
    def _order(data: pd.DataFrame, subgroup: str | None, time: str | None) -> pd.DataFrame:
        """Rows in time order; the subgroup as an ordered categorical in time order.

        Subgroups are ordered by their first time (else by first appearance), and
        the rows of one subgroup are kept together.
        """
        if time is not None:
            data = data.sort_values(time, kind="stable")
        if subgroup is None:
            data = data.reset_index(drop=True)
            data[OBSERVATION] = pd.Categorical(np.arange(1, len(data) + 1), ordered=True)
            return data
        labels = data[subgroup]
        absent = np.flatnonzero(labels.isna().to_numpy())
        if absent.size:
            raise QCDataError(
                f"Column {subgroup!r} (the subgroup) is empty in {row_list(data.index[absent])}; "
                "fill it in or leave those rows out."
            )
        try:
            # Codes in order of first appearance, which after the sort is the time order.
            codes, order = pd.factorize(labels.to_numpy())
        except TypeError:  # unhashable cells (lists, dicts) cannot name a subgroup
            raise QCDataError(
                f"Column {subgroup!r} (the subgroup) holds cells that are not single labels "
                "(lists or tables); give each row one label such as a date, an hour or a lot."
            ) from None
        data[subgroup] = pd.Categorical.from_codes(codes, categories=pd.Index(order), ordered=True)
        if codes.size and np.all(codes[1:] >= codes[:-1]):  # rows of a subgroup together already
            return data.reset_index(drop=True)
        return data.iloc[np.argsort(codes, kind="stable")].reset_index(drop=True)

    # ---- roles -----------------------------------------------------------------
    @property
    def value(self) -> str:
        """The measured characteristic's column."""
        return self._value

    @property
    def subgroup(self) -> str | None:
        """The subgroup column, or None for individual values."""
        return self._subgroup

    @property
    def time(self) -> str | None:
        """The time or order column, if any."""
        return self._time

    @property
    def factors(self) -> tuple[str, ...]:
        """Stratification factors (measured_by included)."""
        return self._factors

    @property
    def measured_by(self) -> tuple[str, ...]:
        """Factors that describe how a sample was taken or measured."""
        return self._measured_by

    @property
    def process_factors(self) -> tuple[str, ...]:
        """Factors that describe the process (all factors not in measured_by)."""
        return tuple(f for f in self._factors if f not in self._measured_by)

    @property
    def shifts(self) -> dict[str, str] | None:
        """The shift start clocks, if given."""
        return None if self._shifts is None else dict(self._shifts)

    @property
    def spec(self) -> Spec | None:
        """The specification, if given."""
        return self._spec

    @property
    def units(self) -> str | None:
        """The unit of the value, if given."""
        return self._units

    @property
    def dropped(self) -> int:
        """How many rows were left out for missing or infinite values."""
        return self._dropped.count

    @property
    def dropped_rows(self) -> DroppedRows:
        """The rows left out and why (1-based row numbers of the input table)."""
        return self._dropped

    @property
    def derived_factors(self) -> tuple[str, ...]:
        """Factors derived from the time column that can be used like any other."""
        return self._derived

    @property
    def available_factors(self) -> tuple[str, ...]:
        """Every column that can split a chart: the factors and the derived factors."""
        return self._factors + tuple(d for d in self._derived if d not in self._factors)

    @property
    def data(self) -> pd.DataFrame:
        """The validated long table (a copy), in time order, derived factors added."""
        return self._data.drop(columns=[OBSERVATION], errors="ignore")

    def __len__(self) -> int:
        """The number of values analysed."""
        return len(self._data)

    def levels(self, column: str) -> pd.Index:
        """The levels of a factor or of the subgroup column, in the study's order.

        Examples
        --------
        >>> from qcexplore.demo import ROLES, filling_line
        >>> list(Study(filling_line(days=1)[0], **ROLES).levels("crew"))
        ['A', 'B', 'C']
        """
        name = self.subgroup_column if column == self._subgroup else column
        if name not in self.available_factors and name != self.subgroup_column:
            raise QCDataError(
                f"{column!r} is neither the subgroup nor a factor of this study; choose one of "
                f"{[self.subgroup_column, *self.available_factors]}."
            )
        return self._data[name].cat.categories.copy()

    def rows_of(self, subgroups: Sequence[str]) -> pd.DataFrame:
        """The rows (a copy) of the subgroups with these text labels, in time order."""
        column = self._data[self.subgroup_column]
        names = np.asarray(column.cat.categories.astype(str), dtype=object)
        chosen = np.flatnonzero(np.isin(names, list(subgroups)))
        rows = np.isin(column.cat.codes.to_numpy(), chosen)
        return self.data.loc[rows]

    @property
    def fingerprint(self) -> str:
        """A short hash of the analysed values and the roles: what a saved log was made on."""

        def compute() -> str:
            digest = hashlib.sha256()
            digest.update(np.ascontiguousarray(self._data[self._value].to_numpy(float)).tobytes())
            digest.update(json.dumps(self.roles(), sort_keys=True, default=str).encode())
            return digest.hexdigest()[:16]

        return self._cached(("fingerprint",), compute)

    @property
    def subgroup_column(self) -> str:
        """The column that defines the plotted points (the observation number for individuals)."""
        return self._subgroup if self._subgroup is not None else OBSERVATION

    def roles(self) -> dict[str, Any]:
        """The roles as plain data: enough to build the same Study again on the same table."""
        spec = self._spec
        return {
            "value": self._value,
            "subgroup": self._subgroup,
            "time": self._time,
            "factors": list(self._factors),
            "measured_by": list(self._measured_by),
            "shifts": self.shifts,
            "spec": None if spec is None else spec.to_dict(),
            "units": self._units,
        }

    def __repr__(self) -> str:
        k = len(self.subgroups)
        return (
            f"Study of {self._value!r}: {len(self._data)} values in {k} "
            f"{'subgroups' if self._subgroup else 'individual points'}; "
            f"factors {list(self._factors)}; measured_by {list(self._measured_by)}; "
            f"{self._dropped.describe()}"
        )

    # ---- results -----------------------------------------------------------------
    def _cached(self, key: tuple, compute: Callable[[], Any]) -> Any:
        if key not in self._cache:
            self._cache[key] = compute()
        return self._cache[key]

    @property
    def subgroups(self) -> pd.DataFrame:
        """One row per subgroup: ``subgroup, n, mean, sd, range, start`` and constant factors."""
        table = self._cached(
            ("subgroups",),
            lambda: subgroup_table(
                self._data,
                value=self._value,
                subgroup=self.subgroup_column,
                time=self._time,
                factors=self.available_factors,
            ),
        )
        return table.copy()

    def restrict(self, start: Any = None, end: Any = None) -> Study:
        """A new Study on the rows whose time lies in ``[start, end]`` (a date window)."""
        if self._time is None:
            raise QCDataError("A date window needs a time column: build the Study with time=.")
        times = self._data[self._time]
        keep = np.ones(len(times), dtype=bool)
        for bound, compare in ((start, np.greater_equal), (end, np.less_equal)):
            if bound is None:
                continue
            if pd.api.types.is_datetime64_any_dtype(times.dtype):
                bound = pd.Timestamp(bound)
                tz = getattr(times.dt, "tz", None)
                if tz is not None and bound.tzinfo is None:
                    bound = bound.tz_localize(tz)
            keep &= compare(times, bound).to_numpy()
        if not keep.any():
            raise QCDataError(f"No rows between {start} and {end}: widen the date window.")
        subset = self.data.loc[keep]
        return Study(subset, **self.roles())

    def adjusted_data(self, adjust_for: Sequence[str] | bool | None = None) -> pd.DataFrame:
        """The table (a copy) with each measured_by level's offset removed from the value.

        ``adjust_for=True`` removes every measured_by factor's offsets; a list
        names them. The offsets come from ``stats.variation.measurement_offsets``.
        """
        return self._adjusted(adjust_for).drop(columns=[OBSERVATION], errors="ignore")

    def _adjusted(self, adjust_for: Sequence[str] | bool | None) -> pd.DataFrame:
        """The internal table with the offsets removed (cached; never handed out)."""
        chosen = self._adjust_factors(adjust_for)
        if not chosen:
            return self._data

        def compute() -> pd.DataFrame:
            from qcexplore.stats.variation import remove_offsets

            return remove_offsets(
                self._data,
                value=self._value,
                subgroup=self.subgroup_column,
                measured_by=chosen,
                factors=self.process_factors,
            )[0]

        return self._cached(("adjusted", chosen), compute)

    def _adjust_factors(self, adjust_for: Sequence[str] | bool | None) -> tuple[str, ...]:
        if adjust_for is None or adjust_for is False:
            return ()
        if adjust_for is True:
            if not self._measured_by:
                raise QCDataError(
                    "adjust_for=True needs measured_by factors: build the Study with "
                    "measured_by=['crew'] (or whichever columns describe how samples were taken)."
                )
            return self._measured_by
        chosen = column_names(adjust_for, "adjust_for")
        unknown = [f for f in chosen if f not in self._measured_by]
        if unknown:
            raise QCDataError(
                f"adjust_for names {unknown}, which are not measured_by factors "
                f"({list(self._measured_by)}); only sampling/measurement offsets are removed."
            )
        return chosen

    def chart(self, kind: str = "auto", **options: Any) -> ChartResult:
        """A control chart of the subgroups (see ``qcexplore.stats.charts.control_chart``).

        ``options`` are the fields of :class:`~qcexplore.options.ChartOptions`, which checks
        them: the chart's settings (``by``, ``limits``, ``sigma_level``, ``sigma_method``,
        ``center``, ``sigma``, ``rules``, ``exclude``, ``iterate``; ``lam``, ``L`` for EWMA;
        ``k``, ``h`` for CUSUM; ``size``, ``laney`` for attribute charts) and ``adjust_for``,
        which charts the value with the named measured_by offsets removed (``True`` for all of
        them), so the process can be seen without the sampling effect.

        Examples
        --------
        >>> from qcexplore.demo import filling_line
        >>> s = Study(filling_line()[0], value="net_g", subgroup="round")
        >>> s.chart().kind
        'xbar_r'
        """
        return self.chart_of(ChartOptions.from_dict({"kind": kind, **options}))

    def chart_of(self, options: ChartOptions) -> ChartResult:
        """The control chart for an options object (cached by the options)."""
        from qcexplore.stats.charts import control_chart

        if options.by is not None and options.by not in self.available_factors:
            raise QCDataError(
                f"by={options.by!r} is not a factor of this study; choose one of "
                f"{list(self.available_factors)}."
            )
        chosen = self._adjust_factors(options.adjust_for)
        # True and the list of every measured_by factor ask for the same chart: one cache entry.
        return self._cached(
            ("chart", options.replace(adjust_for=chosen or False, highlight=None)),
            lambda: control_chart(
                self._adjusted(chosen),
                value=self._value,
                subgroup=self.subgroup_column,
                time=self._time,
                **options.chart_arguments(),
            ),
        )

    def variation(self, factors: Sequence[str] | None = None) -> VariationResult:
        """The variance taken apart into its sources (``qcexplore.stats.variation``)."""
        return self.variation_of(VariationOptions(factors=factors))

    def variation_of(self, options: VariationOptions) -> VariationResult:
        """The variance decomposition for an options object (cached by the options)."""
        from qcexplore.stats.variation import variation

        chosen = self._factors if options.factors is None else options.factors
        unknown = [f for f in chosen if f not in self.available_factors]
        if unknown:
            raise QCDataError(
                f"factors {unknown} are not factors of this study; choose from "
                f"{list(self.available_factors)}."
            )
        return self._cached(
            ("variation", chosen),
            lambda: variation(
                self._data,
                value=self._value,
                subgroup=self.subgroup_column,
                factors=chosen,
                measured_by=tuple(m for m in self._measured_by if m in chosen),
            ),
        )

    def time_structure_of(self, options: TimeOptions) -> TimeResult:
        """The time structure for an options object."""
        return self.time_structure(max_lag=options.max_lag)

    def time_structure(self, max_lag: int | None = None) -> TimeResult:
        """Autocorrelation and step changes of the subgroup means.

        The means are taken after removing the measured_by offsets, so a crew
        that reads high is not mistaken for a step in the process. An offset that
        could be a change of the process in time is not removed that way: the
        offsets of a level present in only part of the record are estimated together
        with a step where it starts or stops, and a factor with a level that cannot be
        told apart from such a change keeps its offsets in the series
        (``stats.variation.step_safe_offsets``; the notes say which).
        """
        from dataclasses import replace

        from qcexplore.stats.timeseries import time_structure
        from qcexplore.stats.variation import remove_offsets

        def compute() -> TimeResult:
            data, notes = remove_offsets(
                self._data,
                value=self._value,
                subgroup=self.subgroup_column,
                measured_by=self._measured_by,
                factors=self.process_factors,
                step_safe=True,
            )
            result = time_structure(
                data,
                value=self._value,
                subgroup=self.subgroup_column,
                time=self._time,
                max_lag=max_lag,
            )
            return replace(result, notes=(*result.notes, *notes)) if notes else result

        return self._cached(("time", max_lag), compute)

    def capability(self, spec: Spec | Mapping[str, float] | None = None) -> CapabilityResult:
        """Capability against the specification (the study's, or the one given)."""
        from qcexplore.stats.capability import chart_capability

        chosen = Spec.coerce(spec) or self._spec
        if chosen is None:
            raise QCDataError(
                "Capability needs a specification: give spec=qx.Spec(lsl=...) to the Study "
                "or to capability()."
            )

        def compute() -> CapabilityResult:
            return chart_capability(self._data, value=self._value, spec=chosen, chart=self.chart())

        return self._cached(("capability", chosen), compute)

    def findings(self, **options: Any) -> Findings:
        """Ranked plain-language findings, strongest first (``qcexplore.findings``); a list
        that shows as cards in a notebook."""
        from qcexplore.findings import findings

        key = ("findings", tuple(sorted(options.items())))
        return Findings(self._cached(key, lambda: tuple(findings(self.evidence(), **options))))

    def evidence(self) -> Evidence:
        """Everything the findings cite (an ``Evidence``): the results and the tests on them.

        The time structure is left out when the series is too short or constant, the
        capability when there is no specification.
        """
        from qcexplore.stats.evidence import collect_evidence

        def compute() -> Any:
            try:
                time_result = self.time_structure()
            except QCDataError:  # too short or constant: there is no time structure to cite
                time_result = None
            return collect_evidence(
                self._data,
                value=self._value,
                subgroup=self.subgroup_column,
                time=self._time,
                factors=self._factors,
                measured_by=self._measured_by,
                individuals=self._subgroup is None,
                units=self._units,
                chart=self.chart(),
                variation=self.variation() if self._factors else None,
                time_result=time_result,
                capability=self.capability() if self._spec is not None else None,
                adjusted_chart=self.chart(adjust_for=True) if self._measured_by else None,
            )

        return self._cached(("evidence",), compute)

    def explore(self, **options: Any) -> Any:
        """The interactive explorer widget for this study."""
        with explore_extra("The explorer"):
            from qcexplore.app.explorer import Explorer

        return Explorer(self, **options)

    def report(self, path: str | Path, **options: Any) -> Path:
        """Write one self-contained HTML report and return its path."""
        with explore_extra("The report"):
            from qcexplore.report import write_report

        return write_report(self, path, **options)

"""Property tests: whatever the table or argument, the data layer raises only QCDataError.

Random frames (random dtypes, text and non-text column names, magnitudes from 1e-310 to
1e300), random files in the shapes plant PCs write, random arguments for qx.read,
qx.to_long, qx.Spec and qx.Study with its charts. Sized for CI's derandomised profile
(CI=1): 20,000 examples in total. Tables and files are built by numpy from a drawn seed:
hypothesis draws a few numbers per example instead of every cell, which keeps 20,000
examples within a couple of minutes; a failure prints the table it was given.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

import qcexplore as qx
from qcexplore import QCDataError
from qcexplore.data.dates import check_time_line, parse_times
from qcexplore.data.numbers import numeric_values
from qcexplore.data.validate import (
    as_factor,
    column_names,
    finite_column,
    require_columns,
    require_text_names,
)


def examples(count: int) -> settings:
    """The number of examples of one test (the profile sets deadlines and derandomising)."""
    return settings(max_examples=count, suppress_health_check=[HealthCheck.too_slow])


SEEDS = st.integers(0, 2**32 - 1)
MAGNITUDES = [1e-310, 1e-300, 1e-12, 1.0, 1e6, 1e12, 1e100, 1e300]
# Text names, numbers as names (a table made from an array), None, a long and an odd name.
COLUMN_NAMES = ["w", "sg", "t", "crew", "nozzle", "Gewicht ä", " ", "x" * 80, 0, 1, -1, 2.5, None]
ODD = [  # what a user may pass where a name, a list or a number belongs
    None, True, False, 0, -1, 3, 2.5, float("nan"), float("inf"), -1e-310, 10**30, 1 + 2j,
    "", "w", "crew", "x" * 100, b"w", ["w"], ["w", "w"], [0, 1], [[1]], [], ("sg",), {"w"},
    {"lsl": 1.0}, {"usll": 1.0}, {1: 2}, {"lsl": "a"}, np.array([1.0, 2.0]), pd.Series([1.0]),
    pd.NA, np.float64(1e300), np.int64(2), object(), print,
]  # fmt: skip
ARGUMENTS = st.one_of(st.sampled_from(ODD), st.floats(), st.integers(-3, 3), st.text(max_size=3))
TEXT_CELLS = np.array(
    ["500,5", "1.499,8", "2.5", "1.250", "1,250", "1'250", " 7 ", "", "NA", "nan", "-inf",
     "1e400", "—", "abc", "30.03.2024", "03/30/2024", "01/02/2024", "2024-03-30 06:00",
     "2024-03-30T06:00+02:00", "06:15", "30032024", "True", "x" * 200],
    dtype=object,
)  # fmt: skip
KINDS = [
    "floats",
    "scaled",
    "ints",
    "order",
    "labels",
    "text",
    "bools",
    "objects",
    "times",
    "const",
]


def _cells(kind: str, n: int, rng: np.random.Generator) -> object:
    """``n`` cells of one kind."""
    if kind == "floats":
        values = rng.normal(size=n) * 10.0 ** rng.integers(-310, 300, size=n)
        odd = rng.random(n)
        return np.where(odd < 0.1, np.nan, np.where(odd > 0.95, np.inf, values))
    if kind == "scaled":  # a measurement at one magnitude, at a gauge's resolution
        scale, offset = rng.choice(MAGNITUDES), rng.choice([0.0, 1.0, 1e9])
        with np.errstate(over="ignore"):
            return scale * (offset + np.round(rng.uniform(-10, 10, n), 1))
    if kind == "ints":
        return rng.integers(-5, 40, n)
    if kind == "order":  # a running number that may start again in blocks
        return np.tile(np.arange(rng.integers(1, 6)), n)[:n] + rng.integers(0, 2)
    if kind == "labels":
        return pd.Series(rng.choice(np.array(["A", "B", "C", None], dtype=object), n), dtype=object)
    if kind == "names":  # labels without gaps
        return rng.choice(["A", "B", "C"], n)
    if kind == "text":
        return rng.choice(TEXT_CELLS, n)
    if kind == "bools":
        return rng.random(n) < 0.5
    if kind == "objects":
        pool = [None, 1.5, -3, True, "2,5", "abc", 1e-310, 10**30, pd.Timestamp("2026-03-01")]
        return pd.Series([pool[i] for i in rng.integers(0, len(pool), n)], dtype=object)
    if kind == "times":
        return pd.Timestamp("2026-03-01") + pd.to_timedelta(rng.integers(0, 500, n), unit="h")
    return np.full(n, rng.choice(MAGNITUDES))


@st.composite
def frames(draw: st.DrawFn, min_rows: int = 0) -> pd.DataFrame:
    """A table of up to 12 rows and 5 columns of random kinds, names and dtypes."""
    rng = np.random.default_rng(draw(SEEDS))
    n = rng.integers(min_rows, 13)  # from the seed: drawn by hypothesis, n would mostly be 0
    chosen = rng.choice(len(COLUMN_NAMES), size=rng.integers(1, 6), replace=False)
    return pd.DataFrame({COLUMN_NAMES[i]: _cells(rng.choice(KINDS), n, rng) for i in chosen})


PICKS = st.integers(0, 9)  # an index into the table's columns


def _pick(frame: pd.DataFrame, index: int) -> object:
    return frame.columns[index % frame.shape[1]]


# ---- qx.Spec ----------------------------------------------------------------------------------
LIMITS = st.one_of(
    st.sampled_from([m * sign for m in MAGNITUDES for sign in (1, -1, 2)]),
    st.floats(),
    ARGUMENTS,
    st.sampled_from([np.float64(1e-310), np.int64(5), "500", float("inf")]),
)


@examples(6500)
@given(lsl=LIMITS, usl=LIMITS, target=LIMITS, other=ARGUMENTS)
def test_spec_is_valid_or_refused(lsl, usl, target, other) -> None:
    try:
        spec = qx.Spec(lsl=lsl, usl=usl, target=target)
    except QCDataError:
        pass
    else:
        limits = [v for v in (spec.lsl, spec.usl, spec.target) if v is not None]
        assert all(isinstance(v, float) and np.isfinite(v) for v in limits)
        assert spec.lsl is None or spec.usl is None or spec.lsl < spec.usl
    for candidate in (other, {"lsl": lsl, "usl": usl}, {"lsl": lsl, "uls": usl}):
        try:
            coerced = qx.Spec.coerce(candidate)
        except QCDataError:
            continue
        assert coerced is None or isinstance(coerced, qx.Spec)


# ---- qx.read ------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def folder() -> Path:
    return Path(tempfile.mkdtemp(prefix="qcexplore-bad-input-"))


@examples(3000)
@given(
    seed=SEEDS,
    rows=st.integers(0, 6),
    delimiter=st.sampled_from([",", ";", "\t", "|"]),
    trailing=st.booleans(),
    encoding=st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "cp1252"]),
    suffix=st.sampled_from([".csv", ".txt", ".tsv", ".xlsx", ".parquet"]),
    options=st.fixed_dictionaries(
        {},
        optional={
            "dayfirst": st.one_of(st.booleans(), ARGUMENTS),
            "date_format": st.one_of(st.sampled_from(["%d.%m.%Y", "%d%m%Y"]), ARGUMENTS),
            "decimal": st.one_of(st.sampled_from([",", "."]), ARGUMENTS),
            "sheet": ARGUMENTS,
        },
    ),
    garbage=st.binary(max_size=40),
)
def test_read_only_refuses_with_qcdataerror(
    folder: Path, seed, rows, delimiter, trailing, encoding, suffix, options, garbage
) -> None:
    rng = np.random.default_rng(seed)
    end = delimiter if trailing else ""
    width = rng.integers(1, 5)
    lines = [delimiter.join(f"c{i}" for i in range(width)) + end]
    lines += [delimiter.join(rng.choice(TEXT_CELLS, rng.integers(1, 5))) + end for _ in range(rows)]
    path = folder / f"plant{suffix}"
    path.write_bytes(("\n".join(lines) + "\n").encode(encoding, errors="replace") + garbage)
    try:
        frame = qx.read(path, **options)
    except QCDataError:
        return
    assert isinstance(frame, pd.DataFrame)


STYLES = [  # delimiter, decimal mark, date format
    (";", ",", "%d.%m.%Y"),
    (",", ".", "%d/%m/%Y"),
    (",", ".", "%m/%d/%Y"),
    ("\t", ",", "%d.%m.%Y %H:%M"),
    (";", ",", "%Y-%m-%d %H:%M:%S"),
]


@examples(1500)
@given(seed=SEEDS, rows=st.integers(1, 8), style=st.sampled_from(STYLES))
def test_read_gives_back_the_numbers_and_dates_written(folder: Path, seed, rows, style):
    # Property: numbers written with the file's decimal mark and dates in an order the values
    # settle come back exactly, in the order written. The last row settles both: 31 December
    # (a day above 12) and 0.125 (a decimal mark after a 0 cannot be a thousands mark).
    delimiter, mark, date_format = style
    rng = np.random.default_rng(seed)
    numbers = [f"{k / 1000:.3f}" for k in rng.integers(-(10**8), 10**8, rows)] + ["0.125"]
    stamps = pd.Timestamp("2020-01-01 06:00") + pd.to_timedelta(rng.integers(0, 3000, rows), "D")
    stamps = stamps.append(pd.DatetimeIndex([pd.Timestamp("2026-12-31 06:00")]))
    written = [t.strftime(date_format) for t in stamps]
    lines = [f"when{delimiter}w"] + [
        f"{day}{delimiter}{number.replace('.', mark)}"
        for day, number in zip(written, numbers, strict=True)
    ]
    path = folder / "round_trip.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    frame = qx.read(path)
    assert frame["w"].astype(float).tolist() == [float(x) for x in numbers]
    assert frame["when"].tolist() == list(pd.to_datetime(written, format=date_format))


# ---- qx.to_long ---------------------------------------------------------------------------------
@examples(3500)
@given(
    frame=frames(),
    picks=st.lists(PICKS, max_size=5),
    samples=st.one_of(st.none(), ARGUMENTS),
    keep=st.one_of(st.none(), ARGUMENTS),
    sample=st.one_of(st.sampled_from(["sample", 0, "w"]), ARGUMENTS),
)
def test_to_long_only_refuses_with_qcdataerror(frame, picks, samples, keep, sample) -> None:
    before = frame.copy()
    chosen = [_pick(frame, i) for i in picks]
    samples = chosen[:3] if samples is None else samples
    keep = (chosen[3:] or None) if keep is None else keep
    try:
        long = qx.to_long(frame, samples, keep=keep, sample=sample)
    except QCDataError:
        pass
    else:
        assert len(long) == len(frame) * len(samples)
    pd.testing.assert_frame_equal(frame, before)


# ---- the checks of qcexplore.data.validate ------------------------------------------------------
@examples(3500)
@given(frame=frames(min_rows=1), pick=PICKS, other=st.one_of(PICKS, ARGUMENTS))
def test_validate_checks_only_refuse_with_qcdataerror(frame, pick, other) -> None:
    column = _pick(frame, pick)
    other = _pick(frame, other) if isinstance(other, int) and not isinstance(other, bool) else other
    checks = [
        lambda: numeric_values(frame, column),
        lambda: finite_column(frame, other, "value"),
        lambda: as_factor(frame[column]),
        lambda: require_columns(frame, [other], "factor"),
        lambda: column_names(other, "factors"),
        lambda: require_text_names(frame),
        lambda: check_time_line(frame.assign(_t=parse_times(frame[column], column)), "_t", other),
    ]
    for check in checks:
        try:
            check()
        except QCDataError:
            pass


# ---- qx.Study and its charts --------------------------------------------------------------------
CHART_KINDS = ["auto", "xbar_r", "xbar_s", "imr", "ewma", "cusum", "p", "np", "c", "u"]


ROLE_KINDS = {  # mostly what each role holds, sometimes anything at all
    "value": ["scaled"] * 8 + ["floats", "ints", "ints", "const", "objects", "text"],
    "subgroup": ["names"] * 4 + ["ints", "ints", "order", "order", "labels", "floats", "times"],
    "time": ["times"] * 6 + ["order", "ints", "text", "objects"],
    "factor": ["names"] * 6 + ["labels", "ints", "bools", "const", "text"],
}


@st.composite
def study_tables(draw: st.DrawFn) -> tuple[pd.DataFrame, dict[str, object], str | None]:
    """A table with a column for each role, named by text or (as from an array) by numbers,
    its roles, and the role (if any) to be given an odd argument instead."""
    rng = np.random.default_rng(draw(SEEDS))
    n = rng.integers(0, 31)
    numbered = rng.random() < 0.3  # as from an array: the columns are named by numbers
    names = dict(
        zip(ROLE_KINDS, [0, 1, 2, 3] if numbered else ["w", "sg", "t", "crew"], strict=True)
    )
    frame = pd.DataFrame(
        {names[role]: _cells(rng.choice(kinds), n, rng) for role, kinds in ROLE_KINDS.items()}
    )
    roles = {
        "value": names["value"],
        "subgroup": names["subgroup"] if rng.random() < 0.6 else None,
        "time": names["time"] if rng.random() < 0.5 else None,
        "factors": [names["factor"]] if rng.random() < 0.7 else [],
    }
    odd_role = rng.choice(list(roles)) if rng.random() < 0.25 else None  # given something odd
    return frame, roles, odd_role


@examples(2000)
@given(
    table=study_tables(),
    odd=ARGUMENTS,
    spec=st.sampled_from([None, {"lsl": 0.0}, qx.Spec(usl=1e300), qx.Spec(lsl=-1e-310)]),
    kind=st.sampled_from(CHART_KINDS),
)
def test_study_and_its_charts_only_refuse_with_qcdataerror(table, odd, spec, kind):
    frame, roles, odd_role = table
    if odd_role is not None:
        roles[odd_role] = odd
    before = frame.copy()
    try:
        study = qx.Study(frame, spec=spec, **roles)
    except QCDataError:
        event("study refused")
    else:
        try:
            study.chart(kind)
            event("chart drawn")
        except QCDataError:
            event("chart refused")
    pd.testing.assert_frame_equal(frame, before)

"""Run rules: built patterns and near misses, a plain reference loop, and invariants."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcexplore.errors import QCDataError
from qcexplore.stats.rules import (
    RULE_SETS,
    RULE_TEXT,
    evaluate_rows,
    evaluate_rules,
    resolve_rules,
)

ALL = RULE_SETS["western_electric"] + RULE_SETS["nelson"]


def _fires(values: list[float], rule: str, **kw: object) -> list[int]:
    signal, fired = evaluate_rules(np.asarray(values, float), 0.0, 1.0, [rule], **kw)
    assert [bool(f) for f in fired] == signal.tolist()
    return np.flatnonzero(signal).tolist()


def _alternating(count: int, size: float = 0.5) -> list[float]:
    return [size if i % 2 == 0 else -size for i in range(count)]


# Each case: rule, a sequence built to have the pattern (and where it completes), and one
# that just misses it. Rule texts: Western Electric Statistical Quality Control Handbook
# (1956) and Nelson, J. Quality Technology 16 (1984) (common practice).
CASES = [
    ("N1", [0, 0, 3.01], [2], [0, 0, 3.0, -3.0]),
    ("WE1", [0, -3.2, 0], [1], [2.99, -2.99]),
    ("N2", [0.5] * 9, [8], [0.5] * 8 + [-0.5] + [0.5] * 8),
    ("N2", [-0.1] * 9, [8], [-0.1] * 4 + [0.0] + [-0.1] * 4),
    ("WE4", [0.5] * 8, [7], [0.5] * 7 + [-0.5] + [0.5] * 7),
    ("N3", [0, 0.1, 0.2, 0.3, 0.4, 0.5], [5], [0, 0.1, 0.2, 0.3, 0.4, 0.4]),
    ("N3", [2, 1, 0.5, 0, -1, -2.5], [5], [2, 1, 0.5, 0.6, -1, -2.5]),
    ("N4", _alternating(14), [13], _alternating(13)),
    ("N4", _alternating(14), [13], _alternating(7) + [0.5] + _alternating(7)),
    ("N5", [2.1, 0, 2.1], [2], [2.1, 0, 0, 2.1]),
    ("WE2", [-2.5, -2.5], [1], [2.5, -2.5, 1.9]),
    ("WE2", [0, 3.5, 2.01], [2], [0, 2.0, 2.5]),
    ("N6", [1.1, 1.1, 0, 1.1, 1.1], [4], [1.1, 1.1, 0, 0, 1.1, 1.1]),
    ("WE3", [-1.5, -1.5, -1.5, -1.5], [3], [-1.5, -1.5, 1.5, 1.5, -1.5, -1.5]),
    ("N7", _alternating(15), [14], _alternating(14) + [1.0] + _alternating(14)),
    ("N8", _alternating(8, 1.5), [7], _alternating(7, 1.5) + [1.0] + _alternating(7, 1.5)),
]


@pytest.mark.parametrize(("rule", "hit", "where", "miss"), CASES)
def test_pattern_fires_and_near_miss_is_silent(
    rule: str, hit: list[float], where: list[int], miss: list[float]
) -> None:
    assert _fires(hit, rule) == where
    assert _fires(miss, rule) == []


def test_every_rule_has_a_case_and_text() -> None:
    assert {case[0] for case in CASES} == set(ALL) == set(RULE_TEXT)


def test_sigma_level_moves_only_the_limit_rule() -> None:
    values = [2.6, 0, 0, 2.6, 2.6]
    assert _fires(values, "N1", sigma_level=2.5) == [0, 3, 4]
    assert _fires(values, "N1") == []
    # The zone rules stay at 1 and 2 sigma whatever the limits.
    assert _fires(values, "N5", sigma_level=2.5) == _fires(values, "N5") == [4]


def test_pattern_continues_to_flag_while_it_lasts() -> None:
    assert _fires([0.5] * 11, "N2") == [8, 9, 10]


def test_varying_sigma_uses_each_points_own_zones() -> None:
    stat = np.array([2.5, 2.5, 2.5])
    signal, _ = evaluate_rules(stat, 0.0, np.array([1.0, 2.0, 1.0]), "N5")
    assert signal.tolist() == [False, False, True]


def test_fired_lists_rules_in_requested_order() -> None:
    _, fired = evaluate_rules([3.5, 3.5], 0.0, 1.0, ["N5", "N1", "WE1"])
    assert fired == [("N1", "WE1"), ("N5", "N1", "WE1")]


def test_zero_sigma_point_beyond_is_flagged_and_on_centre_ignored() -> None:
    signal, _ = evaluate_rules([1.0, 0.0], 0.0, 0.0, "N1")
    assert signal.tolist() == [True, False]


# --- a plain, per-point reference written straight from the rule texts --------------------


def _reference(z: np.ndarray, rule: str, level: float = 3.0) -> np.ndarray:
    out = np.zeros(z.size, dtype=bool)
    idx = [i for i in range(z.size) if not math.isnan(z[i])]
    v = [z[i] for i in idx]

    def m_of_w(i: int, m: int, w: int, zone: float) -> bool:
        last = v[max(0, i - w + 1) : i + 1]
        return any(s * v[i] > zone and sum(s * x > zone for x in last) >= m for s in (1.0, -1.0))

    def run(i: int, w: int, test) -> bool:  # noqa: ANN001
        return i >= w - 1 and all(test(j) for j in range(i - w + 1, i + 1))

    for i in range(len(v)):
        hit = {
            "N1": abs(v[i]) > level,
            "N2": run(i, 9, lambda j: v[j] > 0) or run(i, 9, lambda j: v[j] < 0),
            "N3": run(i, 5, lambda j: j >= 1 and v[j] > v[j - 1])
            or run(i, 5, lambda j: j >= 1 and v[j] < v[j - 1]),
            "N4": run(i, 12, lambda j: j >= 2 and (v[j] - v[j - 1]) * (v[j - 1] - v[j - 2]) < 0),
            "N5": m_of_w(i, 2, 3, 2.0),
            "N6": m_of_w(i, 4, 5, 1.0),
            "N7": run(i, 15, lambda j: abs(v[j]) < 1),
            "N8": run(i, 8, lambda j: abs(v[j]) > 1),
            "WE4": run(i, 8, lambda j: v[j] > 0) or run(i, 8, lambda j: v[j] < 0),
        }
        hit["WE1"], hit["WE2"], hit["WE3"] = hit["N1"], hit["N5"], hit["N6"]
        out[idx[i]] = hit[rule]
    return out


# Values on a quarter-sigma grid hit the zone lines exactly; a small alphabet makes runs,
# trends and alternation common enough to matter.
grid = st.integers(-14, 14).map(lambda k: k / 4)
series = st.lists(st.one_of(grid, st.sampled_from([0.25, -0.25, 1.25, -1.25, 2.25])), max_size=60)


@settings(max_examples=150, deadline=None)
@given(series, st.sampled_from(ALL))
def test_matches_reference_loop(values: list[float], rule: str) -> None:
    z = np.asarray(values, float)
    signal, _ = evaluate_rules(z, 0.0, 1.0, [rule])
    np.testing.assert_array_equal(signal, _reference(z, rule))


@pytest.mark.parametrize("rule", ALL)
def test_matches_reference_loop_on_drifting_series(rule: str) -> None:
    # Simulation: random walks and alternating noise, where every rule fires somewhere.
    rng = np.random.default_rng(7)
    walk = np.cumsum(rng.normal(0, 0.4, 400))
    wiggle = np.where(np.arange(400) % 2, 1, -1) * rng.uniform(0.1, 1.5, 400)
    for z in (walk, wiggle, np.round(walk * 2) / 2):
        signal, _ = evaluate_rules(z, 0.0, 1.0, [rule])
        np.testing.assert_array_equal(signal, _reference(z, rule))
    assert evaluate_rules(walk, 0.0, 1.0, ALL)[0].any()


@settings(max_examples=80, deadline=None)
@given(series, st.sets(st.integers(0, 59), max_size=10))
def test_nan_points_never_fire_and_patterns_run_across_them(
    values: list[float], holes: set[int]
) -> None:
    z = np.asarray(values, float)
    gappy = z.copy()
    gappy[[h for h in holes if h < z.size]] = np.nan
    for nan_in in ("stat", "sigma", "center"):
        sigma = np.where(np.isnan(gappy), np.nan, 1.0) if nan_in == "sigma" else 1.0
        center = np.where(np.isnan(gappy), np.nan, 0.0) if nan_in == "center" else 0.0
        stat = gappy if nan_in == "stat" else np.nan_to_num(gappy)
        signal, fired = evaluate_rules(stat, center, sigma, "nelson")
        assert not signal[np.isnan(gappy)].any()
        kept = ~np.isnan(gappy)
        expected, _ = evaluate_rules(z[kept], 0.0, 1.0, "nelson")
        np.testing.assert_array_equal(signal[kept], expected)


@settings(max_examples=80, deadline=None)
@given(series, series, st.randoms(use_true_random=False))
def test_segments_are_independent(a: list[float], b: list[float], rnd) -> None:  # noqa: ANN001
    za, zb = np.asarray(a, float), np.asarray(b, float)
    # Interleave the two segments in a random order that keeps each one's own order.
    labels = np.array([0] * za.size + [1] * zb.size)
    rnd.shuffle(labels)
    stat = np.empty(labels.size)
    stat[labels == 0], stat[labels == 1] = za, zb
    signal, fired = evaluate_rules(stat, 0.0, 1.0, ALL, segments=labels * 7 - 3)
    for lab, z in ((0, za), (1, zb)):
        alone, alone_fired = evaluate_rules(z, 0.0, 1.0, ALL)
        np.testing.assert_array_equal(signal[labels == lab], alone)
        assert [fired[i] for i in np.flatnonzero(labels == lab)] == alone_fired


@settings(max_examples=80, deadline=None)
@given(
    series,
    st.integers(-1000, 1000),
    st.sampled_from([0.25, 0.5, 2.0, 8.0]),
    st.sampled_from([0.5, 1.0, 4.0]),
)
def test_shift_and_scale_invariance(
    values: list[float], shift: int, scale: float, sigma: float
) -> None:
    # Powers of two and quarter-unit values keep the arithmetic exact.
    z = np.asarray(values, float)
    base = evaluate_rules(z * sigma, 0.0, sigma, ALL)
    moved = evaluate_rules(z * sigma + shift, float(shift), sigma, ALL)
    scaled = evaluate_rules(z * sigma * scale + shift, float(shift), sigma * scale, ALL)
    for other in (moved, scaled):
        np.testing.assert_array_equal(base[0], other[0])
        assert base[1] == other[1]


def test_resolve_rules() -> None:
    assert resolve_rules("nelson") == RULE_SETS["nelson"]
    assert resolve_rules(["we1", "N2", "WE1"]) == ("WE1", "N2")
    assert resolve_rules(["western_electric", "N7"]) == (*RULE_SETS["western_electric"], "N7")
    assert resolve_rules("N3") == ("N3",)
    assert resolve_rules([]) == ()


@pytest.mark.parametrize("bad", [None, 3, 2.5])
def test_rules_that_are_not_names_raise(bad: object) -> None:
    with pytest.raises(QCDataError, match="rules="):
        resolve_rules(bad)  # type: ignore[arg-type]


@given(st.text(max_size=6).filter(lambda s: s.strip().upper() not in RULE_TEXT))
def test_unknown_rule_raises(name: str) -> None:
    if name.strip().lower() in RULE_SETS:
        return
    with pytest.raises(QCDataError, match="rules"):
        resolve_rules([name])


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"center": np.zeros(3)}, "center"),
        ({"sigma": np.ones(5)}, "sigma"),
        ({"sigma": -1.0}, "sigma"),
        ({"sigma_level": 0.0}, "sigma_level"),
        ({"sigma_level": math.nan}, "sigma_level"),
        ({"segments": np.zeros(3)}, "segments"),
        ({"rules": ["N9"]}, "rules"),
        ({"rules": [1]}, "rules"),
    ],
)
def test_bad_arguments_raise(kwargs: dict, match: str) -> None:
    args = {"stat": np.zeros(4), "center": 0.0, "sigma": 1.0, "rules": "nelson"} | kwargs
    with pytest.raises(QCDataError, match=match):
        evaluate_rules(**args)


def test_empty_series() -> None:
    signal, fired = evaluate_rules(np.array([]), 0.0, 1.0, "nelson")
    assert signal.shape == (0,) and fired == []
    signal, fired = evaluate_rules([1.0, np.nan], 0.0, 1.0, ())
    assert signal.tolist() == [False, False] and fired == [(), ()]


@settings(max_examples=40, deadline=None)
@given(st.lists(grid, min_size=1, max_size=40), st.integers(1, 4), st.sampled_from([2.5, 3.0]))
def test_rows_agree_with_segments(values: list[float], rows: int, level: float) -> None:
    z = np.tile(np.asarray(values), (rows, 1)) * np.arange(1, rows + 1)[:, None] / 2
    labels = np.repeat(np.arange(rows), len(values))
    expected, _ = evaluate_rules(z.ravel(), 0.0, 1.0, ALL, sigma_level=level, segments=labels)
    got = evaluate_rows(z, ALL, sigma_level=level)
    np.testing.assert_array_equal(got.ravel(), expected)


def test_rows_reject_nan_and_1d() -> None:
    with pytest.raises(QCDataError, match="z"):
        evaluate_rows(np.array([0.0, 1.0]), "nelson")
    with pytest.raises(QCDataError, match="z"):
        evaluate_rows(np.array([[0.0, np.nan]]), "nelson")

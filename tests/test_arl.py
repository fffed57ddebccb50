"""Average run lengths against published tables, exact results and simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from qcexplore.errors import QCDataError
from qcexplore.stats.arl import (
    _cusum_one_sided,
    _ewma_chain,
    _monte_carlo,
    arl,
    arl_detail,
)
from qcexplore.stats.rules import RULE_SETS


def test_three_sigma_limit_rule() -> None:
    # 370.4 for one point beyond three-sigma limits (common practice); 1/(2 P(Z > 3)) by scipy.
    detail = arl_detail("xbar_r")
    assert detail.method == "exact" and detail.se == 0.0
    assert detail.value == pytest.approx(370.4, abs=0.05)
    assert detail.value == pytest.approx(1 / (2 * stats.norm.sf(3.0)), rel=1e-12)
    # A one-sigma shift of single values on an individuals chart (scipy).
    expected = 1 / (stats.norm.sf(2.0) + stats.norm.cdf(-4.0))
    assert arl("imr", shift=1.0) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("rules", "published"),
    [
        (RULE_SETS["western_electric"], 91.75),
        (("N1", "WE2"), 225.44),
        (("N1", "WE3"), 166.05),
        (("N1", "WE4"), 152.73),
        (("N1", "WE2", "WE3"), 132.89),
    ],
)
def test_zone_rules_champ_woodall(rules: tuple[str, ...], published: float) -> None:
    # Champ and Woodall, Technometrics 29 (1987), in-control ARL of Shewhart charts with
    # supplementary runs rules: 91.75 for all four (given in the brief); the others from memory.
    detail = arl_detail("xbar_s", rules=rules)
    assert detail.method == "markov_chain"
    assert detail.value == pytest.approx(published, abs=0.005)


def test_nelson_names_match_western_electric_patterns() -> None:
    # N1, N5, N6 are WE1, WE2, WE3 by definition; N2 is a longer WE4 (common practice).
    assert arl("xbar_r", rules=("N1", "N5", "N6")) == arl("xbar_r", rules=("WE1", "WE2", "WE3"))
    assert arl("xbar_r", rules=("N1", "N2")) > arl("xbar_r", rules=("N1", "WE4"))


@pytest.mark.parametrize(
    ("h", "shift", "published"),
    [(4.0, 0.0, 168), (5.0, 0.0, 465), (5.0, 1.0, 10.4), (4.0, 1.0, 8.38), (5.0, 0.5, 38.0)],
)
def test_cusum_table(h: float, shift: float, published: float) -> None:
    # Two-sided tabular CUSUM, k = 0.5: Montgomery, Introduction to Statistical Quality
    # Control, CUSUM chapter table of ARLs (from memory); half a unit in the printed digit.
    digits = 0 if published > 100 else (1 if published > 10 or published == 38.0 else 2)
    value = arl("cusum", k=0.5, h=h, shift=shift)
    assert value == pytest.approx(published, abs=0.5 * 10.0**-digits)


@pytest.mark.parametrize(
    ("lam", "big_l", "shift", "published", "tol"),
    [
        (0.2, 2.962, 0.0, 500, 1.0),
        (0.1, 2.814, 0.0, 500, 1.0),
        (0.2, 2.962, 1.0, 10.5, 0.05),
        (0.1, 2.814, 1.0, 10.3, 0.05),
        (0.2, 2.962, 0.5, 41.8, 0.05),
    ],
)
def test_ewma_table(lam: float, big_l: float, shift: float, published: float, tol: float) -> None:
    # Lucas and Saccucci, Technometrics 32 (1990), asymptotic limits: about 500 in control
    # (the printed L is rounded to 3 decimals, hence the wider tolerance); shifted values
    # from the same table as reprinted by Montgomery (from memory).
    assert arl("ewma", lam=lam, L=big_l, shift=shift) == pytest.approx(published, abs=tol)


def test_grid_extrapolation_matches_a_much_finer_grid() -> None:
    # The Brook-Evans answer on 200 and 400 states, extrapolated, agrees with 1,600 states
    # (whose own grid error is about 0.01) and moves no more than that.
    one_sided = _cusum_one_sided(0.0, 0.5, 5.0, 1600)
    assert 2 * arl("cusum", h=5.0) == pytest.approx(one_sided, abs=0.02)
    fine = _ewma_chain(0.0, 0.2, 2.962 * math.sqrt(0.2 / 1.8), 1601)
    assert arl("ewma", lam=0.2, L=2.962) == pytest.approx(fine, abs=0.02)


def test_ewma_with_weight_one_is_shewhart() -> None:
    assert arl("ewma", lam=1.0, L=3.0, shift=0.7) == pytest.approx(arl("imr", shift=0.7))


@pytest.mark.parametrize(
    "kwargs",
    [
        {"kind": "xbar_r", "rules": "western_electric"},
        {"kind": "cusum", "k": 0.5, "h": 4.0},
        {"kind": "ewma", "lam": 0.3, "L": 2.9},
    ],
)
def test_subgroup_size_scales_the_shift_and_sign_does_not_matter(kwargs: dict) -> None:
    base = arl(**kwargs, shift=1.0)
    assert arl(**kwargs, shift=0.5, n=4) == pytest.approx(base, rel=1e-12)
    assert arl(**kwargs, shift=-1.0) == pytest.approx(base, rel=1e-9)
    # A larger shift is caught sooner.
    assert arl(**kwargs, shift=1.5) < base < arl(**kwargs, shift=0.5) < arl(**kwargs)


@pytest.mark.slow
@pytest.mark.parametrize(
    ("rules", "shift"),
    [
        (RULE_SETS["western_electric"], 0.0),
        (("N1", "N2", "N5", "N6", "N7", "N8"), 1.0),
        (("N7", "N8"), 0.0),
    ],
)
def test_simulation_agrees_with_zone_chain(rules: tuple[str, ...], shift: float) -> None:
    # Simulation check: run lengths simulated through the run-rule evaluator agree with the
    # exact chain within four standard errors.
    exact = arl("xbar_r", rules=rules, shift=shift)
    sim = _monte_carlo(shift, rules, 3.0, 3000, seed=11)
    assert sim.method == "monte_carlo" and sim.se > 0
    assert abs(sim.value - exact) < 4 * sim.se


def test_simulated_cusum_agrees_with_chain() -> None:
    # Simulation check of the CUSUM chain: 4,000 two-sided CUSUM runs at a one-sigma shift.
    rng = np.random.default_rng(5)
    runs = np.zeros(4000)
    upper = np.zeros(4000)
    lower = np.zeros(4000)
    alive = np.ones(4000, dtype=bool)
    t = 0
    while alive.any():
        t += 1
        x = rng.standard_normal(4000) + 1.0
        upper = np.maximum(0, upper + x - 0.5)
        lower = np.maximum(0, lower - x - 0.5)
        stop = alive & ((upper > 5) | (lower > 5))
        runs[stop] = t
        alive &= ~stop
    se = runs.std() / math.sqrt(runs.size)
    assert abs(runs.mean() - arl("cusum", k=0.5, h=5.0, shift=1.0)) < 4 * se


def test_rules_outside_the_chain_use_monte_carlo() -> None:
    detail = arl_detail("xbar_r", rules="nelson", n_sim=1000, seed=3)
    assert detail.method == "monte_carlo" and detail.se > 0
    assert detail == arl_detail("xbar_r", rules="nelson", n_sim=1000, seed=3)
    # More rules can only signal sooner than the subset the chain handles.
    subset = arl("xbar_r", rules=("N1", "N2", "N5", "N6", "N7", "N8"))
    assert detail.value < subset
    assert arl("xbar_r", rules="nelson") == arl_detail("xbar_r", rules="nelson").value


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"kind": "pchart"}, "kind"),
        ({"kind": "cusum", "h": -1.0}, "h="),
        ({"kind": "cusum", "h": 0.0}, "h="),
        ({"kind": "cusum", "k": -0.5}, "k"),
        ({"kind": "cusum", "k": math.inf}, "k"),
        ({"kind": "cusum", "k": "half"}, "k"),
        ({"kind": "ewma", "lam": True}, "lam"),
        ({"kind": "ewma", "lam": 0.0}, "lam"),
        ({"kind": "ewma", "lam": 1.5}, "lam"),
        ({"kind": "ewma", "L": -3.0}, "L="),
        ({"kind": "xbar_r", "n": 0}, "n="),
        ({"kind": "xbar_r", "n": 2.5}, "n="),
        ({"kind": "imr", "n": 4}, "n="),
        ({"kind": "xbar_r", "sigma_level": 0.0}, "sigma_level"),
        ({"kind": "xbar_r", "shift": math.nan}, "shift"),
        ({"kind": "xbar_r", "rules": ["N9"]}, "rules"),
        ({"kind": "xbar_r", "rules": []}, "rules"),
        ({"kind": "xbar_r", "rules": "nelson", "n_sim": 1}, "n_sim"),
        ({"kind": "xbar_r", "rules": "nelson", "seed": -1}, "seed"),
    ],
)
def test_bad_arguments_raise(kwargs: dict, match: str) -> None:
    with pytest.raises(QCDataError, match=match):
        arl_detail(**kwargs)


@settings(max_examples=25, deadline=None)
@given(st.floats(-3, 3), st.floats(1.5, 4.0))
def test_zone_chain_never_beats_the_limit_rule_alone(shift: float, level: float) -> None:
    # Adding rules can only shorten the run (any run of the smaller rule set is longer).
    alone = arl("xbar_r", shift=shift, sigma_level=level)
    with_rules = arl("xbar_r", shift=shift, sigma_level=level, rules="western_electric")
    assert with_rules <= alone * (1 + 1e-9)

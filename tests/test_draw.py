"""Tests of qcexplore.draw: named models, row counts, colours, hover, refresh, resources.

The figures compute nothing, so most checks compare the glyph data with the result
columns they were built from. Results are built here by hand with the documented
columns (the statistics modules are tested on their own).
"""

from __future__ import annotations

import ast
import dataclasses
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from bokeh.document import Document
from bokeh.embed import file_html
from bokeh.models import AdaptiveTicker, HoverTool, Plot
from bokeh.resources import INLINE
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcexplore import draw
from qcexplore.draw import charts, encode, palette, parts
from qcexplore.errors import QCDataError
from qcexplore.stats.results import (
    AR1Fit,
    CapabilityResult,
    ChartResult,
    TimeResult,
    VariationResult,
)
from qcexplore.stats.rules import RULE_TEXT

DRAW_DIR = Path(draw.__file__).parent


# --- results built by hand, with the documented columns ---------------------------------


def chart_result(
    k: int = 20,
    strata: tuple[str, ...] | None = ("A", "B"),
    *,
    start: bool = True,
    secondary: bool = True,
    per_stratum: bool = False,
    signals: tuple[int, ...] = (3, 7),
    seed: int = 0,
    ucl: np.ndarray | float = 13.0,
    kind: str = "xbar_r",
) -> ChartResult:
    """A chart of subgroup means (``kind`` "xbar_r" or "xbar_s", with its R or S chart)."""
    rng = np.random.default_rng(seed)
    signal = np.zeros(k, dtype=bool)
    signal[[i for i in signals if i < k]] = True
    if strata:
        stratum = pd.Categorical([strata[i % len(strata)] for i in range(k)], categories=strata)
    else:
        stratum = pd.Categorical([None] * k, categories=[])
    points = pd.DataFrame(
        {
            "subgroup": pd.Categorical(np.arange(1, k + 1), ordered=True),
            "stratum": stratum,
            "stat": rng.normal(10.0, 1.0, k),
            "center": 10.0,
            "lcl": 7.0,
            "ucl": ucl,
            "n": 5,
            "signal": signal,
            "rules": [("N1", "N5") if s else () for s in signal],
        }
    )
    if start:
        points["start"] = pd.date_range("2026-03-02 06:00", periods=k, freq="h")
    limits = pd.DataFrame(
        {
            "stratum": [None],
            "center": [10.0],
            "lcl": [7.0],
            "ucl": [13.0],
            "sigma": [1.0],
            "method": ["R-bar/d2"],
        }
    )
    sec = None
    if secondary:
        sec_points = points.assign(
            stat=rng.uniform(0.0, 4.0, k), center=2.0, lcl=0.0, ucl=4.5, signal=False
        )
        sec_points["rules"] = [()] * k
        sec_kind, sec_statistic = ("r", "range") if kind == "xbar_r" else ("s", "sd")
        sec = ChartResult(sec_kind, sec_points, limits, statistic=sec_statistic)
    return ChartResult(
        kind,
        points,
        limits,
        secondary=sec,
        statistic="mean",
        by="crew" if strata else None,
        limits_mode="per_stratum" if per_stratum else "pooled",
    )


#: A CUSUM chart by hand: the upper sum C+ (``stat``) crosses its limit 4 at points 6-7,
#: the lower sum C- (``stat_lower``, drawn below zero) crosses -4 at points 10-11.
CUSUM_UPPER = np.array([0.0, 0.0, 1.0, 2.0, 3.0, 5.0, 6.0, 0.0, 0.0, 0.0, 0.0, 0.0])
CUSUM_LOWER = np.array([0.0, -1.0, 0.0, 0.0, 0.0, 0.0, 0.0, -2.0, -3.0, -5.0, -6.0, -1.0])


def cusum_result(seed: int = 0, strata: tuple[str, ...] | None = None) -> ChartResult:
    k = CUSUM_UPPER.size
    signal = (CUSUM_UPPER > 4) | (CUSUM_LOWER < -4)
    stratum = [strata[i % len(strata)] for i in range(k)] if strata else [None] * k
    points = pd.DataFrame(
        {
            "subgroup": pd.Categorical(np.arange(1, k + 1), ordered=True),
            "stratum": pd.Categorical(stratum, categories=list(strata or ())),
            "stat": CUSUM_UPPER + seed * 0.1 * (CUSUM_UPPER > 0),
            "stat_lower": CUSUM_LOWER,
            "center": 0.0,
            "lcl": -4.0,
            "ucl": 4.0,
            "n": 5,
            "signal": signal,
            "rules": [("N1",) if s else () for s in signal],
        }
    )
    limits = pd.DataFrame(
        {
            "stratum": [None],
            "center": [0.0],
            "lcl": [-4.0],
            "ucl": [4.0],
            "sigma": [1.0],
            "method": ["R-bar/d2"],
        }
    )
    return ChartResult("cusum", points, limits, statistic="cusum", by="crew" if strata else None)


def variation_result(levels: tuple[str, ...] = ("A", "B", "C"), k: int = 4) -> VariationResult:
    n_lv = len(levels)
    crew = pd.DataFrame(
        {
            "subgroup": pd.Categorical(np.repeat(np.arange(1, k + 1), n_lv), ordered=True),
            "factor": "crew",
            "level": pd.Categorical(list(levels) * k, categories=levels),
            "mean": np.arange(k * n_lv, dtype=float),
            "n": 4,
        }
    )
    nozzle = crew.assign(factor="nozzle", level=[str(i % n_lv + 1) for i in range(k * n_lv)])
    comparisons = pd.DataFrame(
        {
            "test": ["anom"] * n_lv + ["kruskal_wallis"],
            "level": [*levels, "all"],
            "versus": ["overall"] * n_lv + [""],
            "estimate": [1.0, 2.0, 5.0, *([2.0] * (n_lv - 3))][:n_lv] + [3.0],
            "statistic": 0.0,
            "p": [0.5] * n_lv + [0.02],
            "lower": [0.5] * n_lv + [np.nan],
            "upper": [3.5] * n_lv + [np.nan],
            "signal": [False, False, True, *([False] * (n_lv - 3))][:n_lv] + [False],
        }
    )
    components = pd.DataFrame(
        {
            "source": ["crew", "nozzle", "residual"],
            "variance": [1.0, 0.5, 2.5],
            "sd": np.sqrt([1.0, 0.5, 2.5]),
            "share": [0.25, 0.125, 0.625],
        }
    )
    return VariationResult(
        pd.DataFrame(),
        pd.DataFrame(),
        components,
        {"crew": comparisons},
        multivari=pd.concat([crew, nozzle], ignore_index=True),
        method="ANOVA (expected mean squares)",
    )


#: The figures do not draw the AR(1) fit.
AR1_UNUSED = AR1Fit(*[float("nan")] * 6)


def time_result(k: int = 30, shift_at: int = 15) -> TimeResult:
    acf = pd.DataFrame(
        {
            "lag": np.arange(0, 11),
            "acf": np.r_[1.0, 0.5 ** np.arange(1, 11)],
            "pacf": np.r_[1.0, 0.5, np.zeros(9)],
            "lower": -0.3,
            "upper": 0.3,
        }
    )
    series = pd.DataFrame(
        {
            "subgroup": np.arange(1, k + 1),
            "start": pd.date_range("2026-03-02", periods=k, freq="D"),
            "mean": np.r_[np.zeros(shift_at), np.ones(k - shift_at)],
            "n": 5,
        }
    )
    shifts = pd.DataFrame(
        {
            "subgroup": [shift_at + 1],
            "position": [shift_at],
            "time": [series["start"][shift_at]],
            "before": [0.0],
            "after": [1.0],
            "p": [0.001],
        }
    )
    return TimeResult(acf, pd.DataFrame(), AR1_UNUSED, shifts, series=series, effective_n=k / 3)


def capability_result(shift: float = 0.0) -> CapabilityResult:
    hist = pd.DataFrame(
        {
            "left": np.arange(10.0) + shift,
            "right": np.arange(1.0, 11.0) + shift,
            "count": [1, 3, 6, 10, 14, 14, 10, 6, 3, 1],
        }
    )
    x = np.linspace(-1.0, 11.0, 200) + shift
    curve = pd.DataFrame(
        {
            "x": x,
            "density": 68 * np.exp(-0.5 * ((x - 5 - shift) / 2) ** 2) / (2 * np.sqrt(2 * np.pi)),
        }
    )
    return CapabilityResult(
        pd.DataFrame(),
        pd.DataFrame(),
        pd.DataFrame(),
        lsl=0.5,
        usl=10.5,
        target=5.0,
        mean=5.0 + shift,
        sigma_within=2.0,
        n=68,
        histogram=hist,
        curve=curve,
    )


def named(layout) -> dict:
    return {m.name: m for m in layout.references() if m.name}


def data_of(layout, name: str) -> dict:
    return named(layout)[name].data


def mapped_colours(mapper, values) -> np.ndarray:
    """The colours a LinearColorMapper gives ``values``, computed as BokehJS does (bins of
    equal width over [low, high], low_color/high_color outside, nan_color for NaN)."""
    v = np.asarray(values, dtype=float)
    palette = np.array(mapper.palette, dtype=object)
    k = np.floor((v - mapper.low) / (mapper.high - mapper.low) * palette.size)
    out = palette[np.clip(np.nan_to_num(k), 0, palette.size - 1).astype(int)]
    out[v < mapper.low] = mapper.low_color
    out[v > mapper.high] = mapper.high_color
    out[np.isnan(v)] = mapper.nan_color
    return out


def point_strata(layout, name: str = "chart_points") -> pd.DataFrame:
    """Stratum text and drawn colour of each row, decoded as the page does: the text is
    ``chart_strata.stratum[stratum_code]``, the colour the ``chart_colors`` mapper's."""
    models = named(layout)
    data = models[name].data
    levels = np.array([*models["chart_strata"].data["stratum"], ""], dtype=object)
    return pd.DataFrame(
        {
            "s": levels[np.asarray(data["stratum_code"])],
            "c": mapped_colours(models["chart_colors"], data["color_code"]),
        }
    )


def hover_labels(fig) -> list[str]:
    return [label for tool in fig.select({"type": HoverTool}) for label, _ in tool.tooltips]


# --- figures and names ------------------------------------------------------------------


def test_chart_overlay_holds_named_models_and_one_row_per_point():
    result = chart_result()
    layout = draw.chart_figure(result)
    models = named(layout)
    for name in ("chart_layout", "chart", "secondary_chart"):
        assert name in models
    for prefix in ("chart", "secondary"):
        for part in ("points", "signals", "line", "limits"):
            assert f"{prefix}_{part}" in models
    assert len(models["chart_points"].data["x"]) == len(result.points)
    assert len(models["secondary_points"].data["x"]) == len(result.secondary.points)
    assert models["chart"].title.text  # what is plotted and how the limits were computed
    assert "R-bar/d2" in models["chart"].title.text


def test_chart_title_from_result_is_used():
    result = chart_result()
    titled = ChartResult("xbar_r", result.points, result.limits, title="Fill weight, X-bar")
    assert named(draw.chart_figure(titled))["chart"].title.text == "Fill weight, X-bar"


def test_chart_split_gives_one_panel_per_stratum_with_shared_axes():
    layout = draw.chart_figure(chart_result(strata=("A", "B", "C")), split=True)
    models = named(layout)
    panels = [models[f"chart_{i}"] for i in range(3)]
    lower = [models[f"secondary_chart_{i}"] for i in range(3)]
    assert "chart" not in models and "chart_title" in models
    assert len({p.y_range.id for p in panels}) == 1
    assert len({p.x_range.id for p in panels + lower}) == 1
    titles = [p.title.text for p in panels]
    assert titles == [f"Subgroup mean, crew = {level}" for level in "ABC"]
    # each panel draws its own stratum's rows of the shared source, through a filter on
    # the panel_code column
    codes = models["chart_points"].data["panel_code"]
    assert list(point_strata(layout)["s"]) == [["A", "B", "C"][c] for c in codes]
    for i, fig in enumerate(panels):
        dots = [r for r in fig.renderers if r.data_source.name == "chart_points"]
        assert dots[0].view.filter.args == {"columns": ["panel_code"], "codes": [i]}


@pytest.mark.parametrize("split", [False, True])
def test_box_and_tap_select_the_main_chart_points_only(split: bool) -> None:
    from bokeh.models import BoxSelectTool, TapTool

    layout = draw.chart_figure(chart_result(strata=("A", "B")), split=split)
    for fig in layout.select({"type": Plot}):
        tools = [t for t in fig.tools if isinstance(t, (BoxSelectTool, TapTool))]
        if fig.name.startswith("secondary"):
            assert tools == []
            continue
        assert len(tools) == 2, fig.name
        for tool in tools:
            assert [r.data_source.name for r in tool.renderers] == ["chart_points"]
            assert all(r in fig.renderers for r in tool.renderers)


def test_subgroups_left_out_of_the_limits_are_crossed_out():
    result = chart_result(k=10)
    assert "excluded" not in result.points  # a result without the column: none crossed out
    assert not data_of(draw.chart_figure(result), "chart_points")["excluded"].any()
    left_out = np.zeros(10, dtype=bool)
    left_out[[2, 5]] = True
    marked = dataclasses.replace(result, points=result.points.assign(excluded=left_out))
    layout = draw.chart_figure(marked)
    np.testing.assert_array_equal(data_of(layout, "chart_points")["excluded"], left_out)
    crosses = [r for r in named(layout)["chart"].renderers if r.glyph.__class__.__name__ ==
               "Scatter" and r.glyph.marker == "x"]  # fmt: skip
    assert len(crosses) == 1 and crosses[0].data_source.name == "chart_points"
    assert crosses[0].view.filter.args == {"columns": ["excluded"], "codes": [1]}


def test_per_stratum_limits_split_into_panels():
    layout = draw.chart_figure(chart_result(per_stratum=True))
    assert {"chart_0", "chart_1"} <= set(named(layout))


def test_x_is_position_or_start_time():
    result = chart_result(k=5)
    by_time = data_of(draw.chart_figure(result), "chart_points")["x"]
    expected = (result.points["start"] - pd.Timestamp("1970-01-01")) / pd.Timedelta("1ms")
    np.testing.assert_allclose(by_time, expected.to_numpy())
    by_position = data_of(draw.chart_figure(result, x="position"), "chart_points")["x"]
    np.testing.assert_array_equal(by_position, [1, 2, 3, 4, 5])
    fig = named(draw.chart_figure(result, x="position"))["chart"]
    assert isinstance(fig.xaxis[0].ticker, AdaptiveTicker)
    assert fig.xaxis[0].ticker.min_interval == 1  # whole-number ticks


def test_tz_aware_times_keep_their_wall_clock():
    result = chart_result(k=3)
    aware = result.points.assign(start=result.points["start"].dt.tz_localize("Europe/Berlin"))
    x = data_of(draw.chart_figure(ChartResult("xbar_r", aware, result.limits)), "chart_points")
    np.testing.assert_allclose(x["x"], data_of(draw.chart_figure(result), "chart_points")["x"])


def test_time_axis_needs_start_times():
    with pytest.raises(QCDataError, match="x='time'"):
        draw.chart_figure(chart_result(start=False), x="time")
    with pytest.raises(QCDataError, match="x:"):
        draw.chart_figure(chart_result(), x="sideways")


# --- colours ----------------------------------------------------------------------------


def test_palette_is_okabe_ito_in_a_fixed_order():
    # Okabe and Ito (2008), "Color Universal Design": blue (0, 114, 178), orange
    # (230, 159, 0), bluish green (0, 158, 115), reddish purple (204, 121, 167), from memory.
    colours = draw.palette_for(["w", "x", "y", "z"])
    rgb = [tuple(int(c[i : i + 2], 16) for i in (1, 3, 5)) for c in colours.values()]
    assert rgb == [(0, 114, 178), (230, 159, 0), (0, 158, 115), (204, 121, 167)]
    assert palette.ACCENT not in palette.STRATA_COLORS  # signals never look like a stratum


@given(st.lists(st.text(min_size=1, max_size=4), min_size=1, max_size=8, unique=True))
def test_palette_is_deterministic_and_distinct(levels):
    first = draw.palette_for(levels)
    assert first == draw.palette_for(list(levels))
    assert list(first) == levels
    assert len(set(first.values())) == len(levels)


# CIELAB from sRGB: the sRGB transfer function and primaries matrix of IEC 61966-2-1:1999,
# then the CIELAB formulas of CIE 15:2004 with the D65 white of that matrix (its rows sum
# to X, Y, Z = 0.9505, 1, 1.0890).
SRGB_TO_XYZ = np.array(
    [[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]
)


def srgb_to_lab(colour: str) -> np.ndarray:
    rgb = np.array([int(colour[i : i + 2], 16) for i in (1, 3, 5)]) / 255.0
    linear = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    t = SRGB_TO_XYZ @ linear / SRGB_TO_XYZ.sum(axis=1)
    f = np.where(t > (6 / 29) ** 3, np.cbrt(t), t / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def ciede2000(lab1, lab2) -> float:
    """CIEDE2000 colour difference (kL = kC = kH = 1), as written out step by step in
    Sharma, Wu and Dalal, "The CIEDE2000 color-difference formula: implementation notes,
    supplementary test data, and mathematical observations", Color Res. Appl. 30 (2005)."""
    (l1, a1, b1), (l2, a2, b2) = lab1, lab2
    c_bar = (np.hypot(a1, b1) + np.hypot(a2, b2)) / 2
    g = 0.5 * (1 - np.sqrt(c_bar**7 / (c_bar**7 + 25.0**7)))
    a1p, a2p = (1 + g) * a1, (1 + g) * a2
    c1p, c2p = np.hypot(a1p, b1), np.hypot(a2p, b2)
    h1p = np.degrees(np.arctan2(b1, a1p)) % 360 if c1p else 0.0
    h2p = np.degrees(np.arctan2(b2, a2p)) % 360 if c2p else 0.0
    dh = h2p - h1p if c1p * c2p else 0.0
    dh = dh - 360 if dh > 180 else dh + 360 if dh < -180 else dh
    d_l, d_c = l2 - l1, c2p - c1p
    d_h = 2 * np.sqrt(c1p * c2p) * np.sin(np.radians(dh / 2))
    l_bar, cp_bar = (l1 + l2) / 2, (c1p + c2p) / 2
    if c1p * c2p == 0:
        h_bar = h1p + h2p
    elif abs(h1p - h2p) <= 180:
        h_bar = (h1p + h2p) / 2
    else:
        h_bar = (h1p + h2p + (360 if h1p + h2p < 360 else -360)) / 2
    t = (
        1
        - 0.17 * np.cos(np.radians(h_bar - 30))
        + 0.24 * np.cos(np.radians(2 * h_bar))
        + 0.32 * np.cos(np.radians(3 * h_bar + 6))
        - 0.20 * np.cos(np.radians(4 * h_bar - 63))
    )
    r_c = 2 * np.sqrt(cp_bar**7 / (cp_bar**7 + 25.0**7))
    r_t = -np.sin(np.radians(60 * np.exp(-(((h_bar - 275) / 25) ** 2)))) * r_c
    s_l = 1 + 0.015 * (l_bar - 50) ** 2 / np.sqrt(20 + (l_bar - 50) ** 2)
    s_c, s_h = 1 + 0.045 * cp_bar, 1 + 0.015 * cp_bar * t
    terms = (d_l / s_l, d_c / s_c, d_h / s_h)
    return float(np.sqrt(sum(x * x for x in terms) + r_t * terms[1] * terms[2]))


def colour_distance(a: str, b: str) -> float:
    return ciede2000(srgb_to_lab(a), srgb_to_lab(b))


@pytest.mark.parametrize(
    "lab1, lab2, expected",
    [  # Sharma, Wu and Dalal (2005), Table 1, pairs 1, 2, 3, 7, 17-20 (from memory)
        ((50.0, 2.6772, -79.7751), (50.0, 0.0, -82.7485), 2.0425),
        ((50.0, 3.1571, -77.2803), (50.0, 0.0, -82.7485), 2.8615),
        ((50.0, 2.8361, -74.0200), (50.0, 0.0, -82.7485), 3.4412),
        ((50.0, 0.0, 0.0), (50.0, -1.0, 2.0), 2.3669),
        ((50.0, 2.5, 0.0), (73.0, 25.0, -18.0), 27.1492),
        ((50.0, 2.5, 0.0), (61.0, -5.0, 29.0), 22.8977),
        ((50.0, 2.5, 0.0), (56.0, -27.0, -3.0), 31.9030),
        ((50.0, 2.5, 0.0), (58.0, 24.0, 15.0), 19.4535),
    ],
)
def test_ciede2000_matches_the_published_test_pairs(lab1, lab2, expected):
    assert ciede2000(lab1, lab2) == pytest.approx(expected, abs=5e-5)
    assert ciede2000(lab2, lab1) == pytest.approx(expected, abs=5e-5)


def test_srgb_to_lab_matches_the_primaries():
    # CIELAB (D65) of the sRGB primaries and white, as commonly tabulated (from memory)
    for colour, lab in {
        "#FF0000": (53.24, 80.09, 67.20),
        "#00FF00": (87.73, -86.18, 83.18),
        "#0000FF": (32.30, 79.19, -107.86),
        "#FFFFFF": (100.0, 0.0, 0.0),
    }.items():
        np.testing.assert_allclose(srgb_to_lab(colour), lab, atol=0.05)


#: Least CIEDE2000 difference between the signal accent and any colour a level or a
#: neutral point takes. About 2 is a just-noticeable difference side by side; the old
#: accent (Okabe-Ito vermillion) was 22 from the orange of the second level, read as the
#: same hue on a projector. 30 keeps the accent clearly apart from every stratum.
ACCENT_DISTANCE = 30.0
#: Least difference between two stratum colours (the closest pair of the Okabe-Ito set,
#: orange and yellow, is 21.7).
STRATA_DISTANCE = 20.0


def test_no_stratum_colour_comes_near_the_signal_accent():
    others = (*palette.STRATA_COLORS, palette.OTHERS, palette.POINT, palette.LIMIT)
    distances = {c: colour_distance(palette.ACCENT, c) for c in others}
    assert min(distances.values()) >= ACCENT_DISTANCE, distances
    # the accent the palette had before fails this test: it is not a vacuous check
    assert colour_distance("#D55E00", palette.STRATA_COLORS[1]) < ACCENT_DISTANCE
    strata = palette.STRATA_COLORS
    pairs = [colour_distance(a, b) for i, a in enumerate(strata) for b in strata[i + 1 :]]
    assert min(pairs) >= STRATA_DISTANCE


@given(st.integers(1, 40), st.data())
def test_no_colour_is_used_for_two_levels(count, data):
    levels = [f"L{i}" for i in range(count)]
    highlight = data.draw(st.none() | st.sampled_from(levels))
    colours = draw.palette_for(levels, highlight=highlight)
    coloured = {level: c for level, c in colours.items() if c != palette.OTHERS}
    assert len(set(coloured.values())) == len(coloured)  # never a repeated colour
    if count <= palette.COLOURED:
        assert len(coloured) == count
    else:  # one chosen level coloured, the rest grey
        assert list(coloured) == [highlight or "L0"]


def test_beyond_eight_levels_one_chosen_level_is_coloured_and_the_rest_grey():
    days = tuple(f"day {i}" for i in range(1, 29))
    result = chart_result(k=56, strata=days)
    for highlight, chosen in ((None, "day 1"), ("day 14", "day 14")):
        layout = draw.chart_figure(result, highlight=highlight)
        frame = point_strata(layout)
        colour = dict(zip(frame["s"], frame["c"], strict=False))
        assert colour.pop(chosen) == palette.STRATA_COLORS[0]
        assert set(colour.values()) == {palette.OTHERS}
        # the legend: the chosen level and "others", so it is never cut off
        legend = data_of(layout, "chart_legend")
        assert list(legend["label"]) == [chosen, palette.OTHERS_LABEL]
        assert list(legend["color"]) == [palette.STRATA_COLORS[0], palette.OTHERS]
    eight = draw.chart_figure(chart_result(k=56, strata=days[:8]))
    assert list(data_of(eight, "chart_legend")["label"]) == list(days[:8])  # all listed
    assert point_strata(eight).groupby("s")["c"].first().nunique() == 8
    with pytest.raises(QCDataError, match="highlight: 'day 40'"):
        draw.chart_figure(result, highlight="day 40")


def test_highlight_colours_the_same_level_on_multivari_and_anom():
    levels = tuple(f"N{i}" for i in range(1, 13))
    result = variation_result(levels=levels)
    mv = data_of(draw.multivari_figure(result, highlight={"crew": "N5"}), "multivari_points")
    crew = mv["factor"] == "crew"
    colour = dict(zip(mv["level"][crew], mv["color"][crew], strict=False))
    assert colour.pop("N5") == palette.STRATA_COLORS[0]
    assert set(colour.values()) == {palette.OTHERS}
    anom = data_of(draw.anom_figure(result, "crew", highlight="N5"), "anom_points")
    assert dict(zip(anom["level"], anom["color"], strict=True))["N5"] == palette.STRATA_COLORS[0]
    with pytest.raises(QCDataError, match="highlight"):
        draw.multivari_figure(result, highlight={"shift": "early"})
    with pytest.raises(QCDataError, match="highlight"):
        draw.anom_figure(result, "crew", highlight="N13")


def test_legends_list_every_level_and_wrap_instead_of_running_off():
    result = variation_result()
    models = named(draw.multivari_figure(result))
    assert list(models["multivari_legend_0"].data["label"]) == ["A", "B", "C"]
    assert list(models["multivari_legend_1"].data["label"]) == ["1", "2", "3"]
    # long level names: fewer entries a row, every entry still shown
    long = tuple(f"filling line {i} in the north hall" for i in range(1, 9))
    layout = draw.chart_figure(chart_result(k=16, strata=long))
    fig = named(layout)["chart"]
    legend = fig.above[-1]
    entries = len(data_of(layout, "chart_legend")["label"])
    assert entries == 8 and 1 <= legend.ncols < 8
    longest = max(len(name) for name in long)
    assert legend.ncols * (40 + 8 * longest) <= fig.width  # each row fits the figure


def test_refresh_into_more_levels_than_colours_is_data_only():
    layout = draw.chart_figure(chart_result(k=56, strata=("A", "B", "C")))
    ids = {m.id for m in layout.references()}
    days = tuple(f"day {i}" for i in range(1, 29))
    assert not draw.needs_rebuild(layout, chart_result(k=56, strata=days))
    draw.refresh(layout, chart_result(k=56, strata=days))
    assert {m.id for m in layout.references()} == ids
    frame = point_strata(layout)
    assert set(frame.loc[frame["s"] != "day 1", "c"]) == {palette.OTHERS}
    assert list(data_of(layout, "chart_legend")["label"]) == ["day 1", palette.OTHERS_LABEL]


def test_one_colour_per_stratum_and_the_same_colour_across_figures():
    points = point_strata(draw.chart_figure(chart_result(strata=("A", "B", "C"))))
    by_level = points.groupby("s")["c"]
    assert (by_level.nunique() == 1).all()
    assert by_level.first().nunique() == 3
    split = point_strata(draw.chart_figure(chart_result(strata=("A", "B", "C")), split=True))
    assert list(split["c"]) == list(points["c"])
    multivari = data_of(draw.multivari_figure(variation_result()), "multivari_points")
    crew = multivari["factor"] == "crew"
    mv_colours = dict(zip(multivari["level"][crew], multivari["color"][crew], strict=True))
    assert mv_colours == dict(zip(points["s"], points["c"], strict=True))
    anom = data_of(draw.anom_figure(variation_result(), "crew"), "anom_points")
    assert dict(zip(anom["level"], anom["color"], strict=True)) == mv_colours


def test_unused_categories_keep_the_colours_stable():
    full = chart_result(strata=("A", "B", "C"))
    only_c = full.points[full.points["stratum"] == "C"].reset_index(drop=True)
    colours = point_strata(draw.chart_figure(ChartResult("xbar_r", only_c, full.limits)))["c"]
    assert set(colours) == {draw.palette_for(["A", "B", "C"])["C"]}


def test_no_strata_draws_one_neutral_colour_and_no_legend():
    layout = draw.chart_figure(chart_result(strata=None))
    assert set(data_of(layout, "chart_points")) == {
        "x",
        "value",
        "subgroup",
        "n",
        "point",
        "excluded",
        "time",
    }
    dots = [r for r in named(layout)["chart"].renderers if r.data_source.name == "chart_points"]
    assert dots[0].glyph.fill_color == palette.POINT
    assert not named(layout)["chart"].legend


def test_legend_lists_each_stratum_once_in_its_colour():
    legend = data_of(draw.chart_figure(chart_result(strata=("A", "B", "C"))), "chart_legend")
    assert list(legend["label"]) == ["A", "B", "C"]
    assert list(legend["color"]) == list(draw.palette_for(["A", "B", "C"]).values())


@given(
    st.lists(st.sampled_from(["a", "b", "c", "d", None]), min_size=1, max_size=30),
    st.booleans(),
)
def test_codes_name_each_row_s_level(values, categorical):
    column = pd.Series(pd.Categorical(values) if categorical else pd.Series(values, dtype=object))
    levels = [str(v) for v in encode.levels_of(column)]
    codes = encode.codes_for(column, levels)
    assert list(np.array([*levels, ""], dtype=object)[codes]) == list(encode.labels(column))
    colours_of = draw.palette_for(levels)
    table = np.array([*palette.STRATA_COLORS, palette.OTHERS, palette.POINT], dtype=object)
    colours = table[palette.color_codes(codes, levels)]
    assert list(colours) == [colours_of.get(v, palette.POINT) for v in encode.labels(column)]


def test_colour_mapper_gives_each_code_its_palette_colour():
    # code i -> STRATA_COLORS[i], as palette_for gives the i-th level; the code after
    # them is the grey of the levels not highlighted; no level -> POINT
    mapper = named(draw.chart_figure(chart_result()))["chart_colors"]
    codes = np.arange(-1, palette.COLOURED + 1)
    expected = [palette.POINT, *palette.STRATA_COLORS, palette.OTHERS]
    assert list(mapped_colours(mapper, codes)) == expected
    for count in (palette.COLOURED, palette.COLOURED + 1, 30):
        levels = [f"L{i}" for i in range(count)]
        drawn = mapped_colours(mapper, palette.color_codes(np.arange(count), levels, "L3"))
        assert list(drawn) == list(draw.palette_for(levels, highlight="L3").values())


def test_per_point_and_per_segment_sources_hold_only_number_columns():
    # Number columns reach the page as binary arrays; text would go element by element.
    for split in (False, True):
        layout = draw.chart_figure(chart_result(k=40, strata=("A", "B", "C")), split=split)
        for prefix in ("chart", "secondary"):
            for part in ("points", "signals", "line", "limits"):
                data = data_of(layout, f"{prefix}_{part}")
                kinds = {c: np.asarray(v).dtype.kind for c, v in data.items()}
                assert set(kinds.values()) <= set("iuf"), kinds


def _refresh_message_sizes(k: int) -> tuple[int, int]:
    """Characters of text and bytes of binary that a refresh of k points sends to the page."""
    from jupyter_bokeh import BokehModel

    signals = tuple(range(0, k, 3))
    layout = draw.chart_figure(chart_result(k=k, strata=("A", "B", "C"), signals=signals))
    widget = BokehModel(layout)
    sent = []
    widget.send = lambda content, buffers=None: sent.append((content, buffers or []))
    draw.refresh(layout, chart_result(k=k, strata=("B", "A", "C"), seed=3, signals=signals))
    text = sum(len(str(c.get("payload", ""))) for c, _ in sent if isinstance(c, dict))
    binary = sum(memoryview(b).nbytes for _, bufs in sent for b in bufs)
    return text, binary


def test_refresh_sends_point_columns_as_binary_buffers():
    k = parts.REDUCE_FROM // 2  # k and 2k points are all drawn (no reduction, no statement)
    text, binary = _refresh_message_sizes(k)
    more_text, more_binary = _refresh_message_sizes(2 * k)
    # 2 x k points and 2 x k/3 signals, each some 5-7 number columns of 4-8 bytes
    assert binary > 8 * 2 * k and more_binary > 2 * 8 * 2 * k
    # the text is the column headers and the small lookup sources (some 10,000 characters,
    # a little more late in a long run, as bokeh's model ids lengthen)
    assert text < 15_000
    # and it does not grow with the points: one text column would add at least 4 characters
    # for each of the 2 x k added rows
    assert more_text - text < 100


# --- hover and signals ------------------------------------------------------------------


def test_hover_names_time_subgroup_stratum_n_value_and_rules():
    layout = draw.chart_figure(chart_result())
    for fig in ("chart", "secondary_chart"):
        tools = named(layout)[fig].select({"type": HoverTool})
        by_source = {t.renderers[0].data_source.name: [lb for lb, _ in t.tooltips] for t in tools}
        prefix = fig.removesuffix("_chart")
        expected = ["time", "subgroup", "stratum", "n", "value"]
        assert by_source[f"{prefix}_points"] == expected
        assert by_source[f"{prefix}_signals"] == [*expected, "rules"]
    plain = named(draw.chart_figure(chart_result(strata=None, start=False)))["chart"]
    assert sorted(hover_labels(plain)) == sorted(
        ["subgroup", "n", "value", "subgroup", "n", "value", "rules"]
    )


def test_hover_looks_up_stratum_and_rules_texts_and_formats_times():
    layout = draw.chart_figure(chart_result())
    models = named(layout)
    tools = models["chart"].select({"type": HoverTool})
    marks = next(t for t in tools if t.renderers[0].data_source.name == "chart_signals")
    assert dict(marks.tooltips)["stratum"] == "@stratum_code{custom}"
    assert marks.formatters["@stratum_code"].args["table"] is models["chart_strata"]
    assert marks.formatters["@rules_code"].args["table"] is models["chart_rules"]
    assert marks.formatters["@time"] == "datetime"
    assert list(models["chart_strata"].data["stratum"]) == ["A", "B"]
    # a subgroup that is a time travels as milliseconds and is shown as a date
    result = chart_result(strata=None)
    hours = result.points["start"]
    timed = ChartResult(
        "xbar_r", result.points.assign(subgroup=pd.Categorical(hours, ordered=True)), result.limits
    )
    layout = draw.chart_figure(timed)
    np.testing.assert_array_equal(
        data_of(layout, "chart_points")["subgroup"], encode.time_ms(hours)
    )
    dots = named(layout)["chart"].select({"type": HoverTool})[0]
    assert dict(dots.tooltips)["subgroup"] == "@subgroup{%F %H:%M}"
    assert dots.formatters["@subgroup"] == "datetime"


def test_signals_source_holds_exactly_the_signalled_rows_with_rules_in_words():
    result = chart_result(k=30, signals=(0, 4, 29))
    layout = draw.chart_figure(result)
    signals = data_of(layout, "chart_signals")
    flagged = result.points.loc[result.points["signal"], "subgroup"].astype(str).tolist()
    assert [str(s) for s in signals["subgroup"]] == flagged
    # the rules travel as codes into the small chart_rules source that the hover reads
    texts = data_of(layout, "chart_rules")["rules"]
    words = [texts[c] for c in signals["rules_code"]]
    assert len(words) == 3
    assert all(RULE_TEXT["N1"] in text and "N5" in text for text in words)
    assert "rules_code" not in data_of(layout, "chart_points")  # only signals have rules
    marks = [r for r in named(layout)["chart"].renderers if r.data_source.name == "chart_signals"]
    assert marks[0].glyph.fill_color is None and marks[0].glyph.line_color == palette.ACCENT


def test_limits_vary_per_point_as_step_lines():
    ucl = np.array([13.0, 13.0, 14.0])
    layout = draw.chart_figure(chart_result(k=3, strata=None, start=False, ucl=ucl))
    limits = pd.DataFrame(data_of(layout, "chart_limits"))
    limits["role"] = np.array(charts.ROLES)[limits["role_code"]]
    upper = limits[(limits["role"] == "limit") & (limits[["y0", "y1"]].max(axis=1) > 12)]
    pieces = sorted(map(tuple, upper[["x0", "x1", "y0", "y1"]].to_numpy().tolist()))
    # 13 over subgroups 1-2, 14 over subgroup 3, riser at the boundary 2.5
    assert pieces == [(0.5, 2.5, 13.0, 13.0), (2.5, 2.5, 13.0, 14.0), (2.5, 3.5, 14.0, 14.0)]
    center = limits[limits["role"] == "center"]
    assert center[["x0", "x1", "y0", "y1"]].to_numpy().tolist() == [[0.5, 3.5, 10.0, 10.0]]


@given(
    st.lists(st.tuples(st.integers(0, 8), st.sampled_from([1.0, 2.0, np.nan])), min_size=1),
)
def test_step_lines_do_not_depend_on_the_order_of_the_points(rows):
    # increasing positions take a path without sorting; it must agree with the sorted one
    x = np.array([r[0] for r in rows], dtype=float)
    y = np.array([r[1] for r in rows])
    xu, first = np.unique(x, return_index=True)
    assert parts.increasing(xu)
    given_order = parts.steps(x, {"center": y}, 0.5)
    in_order = parts.steps(xu, {"center": y[first]}, 0.5)
    np.testing.assert_equal(given_order, in_order)
    assert parts.line_ends(x, {"c": y}, 0.5)["x"].tolist() == [in_order["x1"].max()]


def test_line_joins_points_within_a_stratum_when_strata_share_subgroups():
    result = chart_result(k=4, start=False)
    pts = pd.concat([result.points, result.points.assign(stratum="B")]).reset_index(drop=True)
    pts["stratum"] = pd.Categorical(np.repeat(["A", "B"], 4), categories=["A", "B"])
    line = data_of(draw.chart_figure(ChartResult("xbar_r", pts, result.limits)), "chart_line")
    assert len(line["x0"]) == 6  # 3 segments per stratum, none across strata
    assert np.all(line["x1"] - line["x0"] == 1)


# --- labels of every chart kind, and the values written on the lines ----------------------


def y_label(layout, figure: str) -> str:
    return named(layout)[figure].yaxis[0].axis_label


def test_every_chart_kind_of_the_statistics_has_its_own_words():
    from qcexplore.stats.charts import CHART_KINDS

    # the secondary charts and the moving-centre chart of the time structure are kinds too
    drawn = {k.secondary for k in CHART_KINDS.values() if k.secondary} | {"ewma_center"}
    assert drawn <= set(CHART_KINDS)
    for kind in CHART_KINDS.values():
        assert kind.title and kind.axis and kind.label


def test_s_chart_lower_panel_says_standard_deviation():
    layout = draw.chart_figure(chart_result(kind="xbar_s"))
    assert y_label(layout, "chart") == "Subgroup mean"
    assert y_label(layout, "secondary_chart") == "Subgroup standard deviation"
    assert draw.chart_figure(chart_result()).select_one({"name": "secondary_chart_y_axis"})
    split = named(draw.chart_figure(chart_result(kind="xbar_s"), split=True))
    assert split["secondary_chart_0"].title.text == "Subgroup standard deviation, crew = A"
    assert split["secondary_chart_0"].yaxis[0].axis_label == "Subgroup standard deviation"
    for models in (named(layout), split):
        texts = [m.axis_label for m in models.values() if hasattr(m, "axis_label")]
        texts += [m.title.text for m in models.values() if isinstance(m, Plot)]
        assert not any("range" in t.lower() for t in texts), texts


def test_refresh_relabels_the_axes_in_place():
    layout = draw.chart_figure(chart_result(kind="xbar_r"))
    assert y_label(layout, "secondary_chart") == "Subgroup range"
    ids = {m.id for m in layout.references()}
    draw.refresh(layout, chart_result(kind="xbar_s"))
    assert {m.id for m in layout.references()} == ids
    assert y_label(layout, "secondary_chart") == "Subgroup standard deviation"


def test_individuals_chart_says_single_values():
    result = chart_result(strata=None)
    points = result.points.assign(n=1)
    mr = ChartResult("mr", result.secondary.points.assign(n=1), result.limits)
    single = ChartResult("imr", points, result.limits, secondary=mr, statistic="value")
    layout = draw.chart_figure(single)
    assert y_label(layout, "chart") == "Single value"
    assert y_label(layout, "secondary_chart") == "Moving range"
    assert "mean" not in y_label(layout, "chart").lower()


def test_cusum_draws_both_sums_each_labelled():
    layout = draw.chart_figure(cusum_result())
    models = named(layout)
    points = models["chart_points"].data
    np.testing.assert_array_equal(points["value"], CUSUM_UPPER)
    np.testing.assert_array_equal(points["lower"], CUSUM_LOWER)
    fig = models["chart"]
    dots = [r for r in fig.renderers if r.data_source.name == "chart_points"]
    dots = [r for r in dots if r.glyph.marker != "x"]  # not the crosses of left-out points
    assert {(r.glyph.y, r.glyph.marker) for r in dots} == {
        ("value", "triangle"),
        ("lower", "inverted_triangle"),
    }
    # each sum joined by its own line
    line = pd.DataFrame(models["chart_line"].data)
    x = np.arange(1.0, CUSUM_UPPER.size + 1)
    expected = [
        (x[i], y[i], x[i + 1], y[i + 1])
        for y in (CUSUM_UPPER, CUSUM_LOWER)
        for i in range(x.size - 1)
    ]
    assert sorted(map(tuple, line[["x0", "y0", "x1", "y1"]].to_numpy().tolist())) == sorted(
        expected
    )
    label = fig.yaxis[0].axis_label
    assert label.startswith("Cumulative sums") and "C+" in label and "C\u2212" in label
    assert "ewma" not in label.lower() + fig.title.text.lower()
    sums = {}
    for tool in fig.select({"type": HoverTool}):
        tips = dict(tool.tooltips)
        if "sum" in tips:
            sums[tool.renderers[0].glyph.y] = tips["sum"]
    assert sums == {"value": "upper, C+", "lower": "lower, C\u2212"}


def test_cusum_signals_sit_on_the_sum_that_signalled():
    layout = draw.chart_figure(cusum_result())
    signals = pd.DataFrame(data_of(layout, "chart_signals"))
    rings = sorted(zip(signals["x"], signals["value"], strict=True))
    assert rings == [(6.0, 5.0), (7.0, 6.0), (10.0, -5.0), (11.0, -6.0)]
    assert ((signals["value"] > 4) | (signals["value"] < -4)).all()  # none inside the limits


def test_cusum_needs_its_lower_sum():
    result = cusum_result()
    without = dataclasses.replace(result, points=result.points.drop(columns="stat_lower"))
    with pytest.raises(QCDataError, match="stat_lower"):
        draw.chart_figure(without)
    assert draw.needs_rebuild(draw.chart_figure(chart_result(strata=None)), result)


def test_centre_and_limit_values_are_written_at_the_right_end():
    ucl = np.array([13.0, 13.0, 14.0])
    layout = draw.chart_figure(chart_result(k=3, strata=None, start=False, ucl=ucl))
    models = named(layout)
    values = pd.DataFrame(models["chart_limit_values"].data)
    limits = pd.DataFrame(models["chart_limits"].data)
    assert (values["x"] == limits["x1"].max()).all() and values["x"].iloc[0] == 3.5
    # centre 10, lower 7 and upper limit 14 at the last point, to 3 digits of their spread
    assert values["y"].tolist() == [10.0, 7.0, 14.0]
    assert values["text"].tolist() == ["10.00", "7.00", "14.00"]
    written = [r for r in models["chart"].renderers if r.data_source.name == "chart_limit_values"]
    assert [(r.glyph.x, r.glyph.y, r.glyph.text) for r in written] == [("x", "y", "text")]
    assert written[0].glyph.text_align == "right"
    assert "secondary_limit_values" in models
    # small multiples: each panel writes its own values
    split_layout = draw.chart_figure(chart_result(strata=("A", "B")), split=True)
    split = data_of(split_layout, "chart_limit_values")
    assert sorted(split["panel_code"].tolist()) == [0, 0, 0, 1, 1, 1]
    anom = pd.DataFrame(data_of(draw.anom_figure(variation_result(), "crew"), "anom_limit_values"))
    assert anom["x"].tolist() == [3.5] * 3 and anom["y"].tolist() == [2.0, 0.5, 3.5]


def test_anom_rings_the_levels_the_result_marks():
    result = variation_result()
    table = result.comparisons["crew"]
    # level A lies inside its limits but the result marks it: draw follows the result
    marked = table.assign(signal=(table["level"] == "A") & (table["test"] == "anom"))
    marked_result = dataclasses.replace(result, comparisons={"crew": marked})
    models = named(draw.anom_figure(marked_result, "crew"))
    assert list(models["anom_signals"].data["level"]) == ["A"]
    unmarked = {"crew": table.drop(columns="signal")}
    with pytest.raises(QCDataError, match="'signal'"):
        draw.anom_figure(dataclasses.replace(result, comparisons=unmarked), "crew")


# --- large series -----------------------------------------------------------------------


def test_250k_points_build_with_webgl_from_a_display_reduction():
    result = chart_result(k=250_000, strata=("A", "B", "C"), secondary=True, signals=(5, 100_000))
    before = result.points.copy()
    layout = draw.chart_figure(result)
    models = named(layout)
    assert models["chart"].output_backend == "webgl"
    assert models["secondary_chart"].output_backend == "webgl"
    shown = len(models["chart_points"].data["x"])
    # at most the lowest and highest per pixel column and colour, the ends, the signals
    assert shown <= 3 * (2 * parts.WIDTH + 2) + 2
    assert len(models["chart_line"].data["x0"]) == shown - 1  # joined again, in time order
    assert len(models["chart_signals"].data["x"]) == 2
    pd.testing.assert_frame_equal(result.points, before)  # only what is sent is reduced
    small = named(draw.chart_figure(chart_result()))
    assert small["chart"].output_backend == "canvas"
    assert len(small["chart_line"].data["x0"]) == 19


def _bins(x: np.ndarray, columns: int) -> np.ndarray:
    """Pixel column of each x: ``columns`` equal slices of the x range (the last closed)."""
    span = x.max() - x.min()
    scale = columns / span if span > 0 else 0.0
    return np.minimum(np.floor((x - x.min()) * scale), columns - 1).astype(int)


@settings(max_examples=60, deadline=None)
@given(
    values=st.lists(
        st.one_of(st.floats(-1e6, 1e6), st.just(float("nan"))), min_size=1, max_size=300
    ),
    data=st.data(),
)
def test_display_rows_keep_each_column_s_extremes_the_ends_and_every_signal(values, data):
    y = np.array(values)
    size = y.size
    x = np.sort(np.array(data.draw(st.lists(st.floats(0, 1e4), min_size=size, max_size=size))))
    group = np.array(data.draw(st.lists(st.integers(0, 2), min_size=size, max_size=size)))
    keep = np.array(data.draw(st.lists(st.booleans(), min_size=size, max_size=size)))
    columns = data.draw(st.integers(1, 40))
    rows = parts.display_rows(x, [y], keep, group, columns)
    assert (np.diff(rows) > 0).all()
    assert set(np.flatnonzero(keep)) <= set(rows)
    frame = pd.DataFrame({"x": x, "y": y, "g": group, "c": _bins(x, columns)})
    shown = frame.iloc[rows]
    pd.testing.assert_frame_equal(  # a column of missing values only has nothing to draw
        shown.dropna().groupby(["g", "c"])["y"].agg(["min", "max"]),
        frame.dropna().groupby(["g", "c"])["y"].agg(["min", "max"]),
    )
    pd.testing.assert_frame_equal(
        shown.groupby("g")["x"].agg(["min", "max"]), frame.groupby("g")["x"].agg(["min", "max"])
    )
    # nothing more: two per column and group, the two ends of each group, the kept rows
    cells = frame.groupby(["g", "c"]).ngroups
    assert rows.size <= 2 * cells + 2 * frame["g"].nunique() + int(keep.sum())


def test_a_long_chart_says_what_it_is_drawn_from_and_keeps_every_signal():
    k = 20_000
    result = chart_result(k=k, strata=None, signals=(0, 1, 2, 9_999, 19_999), kind="xbar_s")
    layout = draw.chart_figure(result)
    points = data_of(layout, "chart_points")
    title = named(layout)["chart"].title.text.replace("\n", " ")
    assert (
        f"drawn from {k:,} points by the lowest and highest per pixel column and every signal"
        in title
    )
    assert len(points["x"]) <= 2 * parts.WIDTH + 2 + 5
    assert "drawn from" in named(layout)["secondary_chart"].title.text
    # the point column maps each drawn row to its row of the result
    at = np.asarray(points["point"])
    np.testing.assert_array_equal(points["value"], result.points["stat"].to_numpy()[at])
    assert {0, 1, 2, 9_999, 19_999} <= set(at.tolist())
    # each pixel column's extremes are drawn
    x = result.points["stat"].to_numpy()
    c = _bins(np.arange(k, dtype=float), parts.WIDTH)
    assert np.isin(pd.Series(x).groupby(c).idxmax().to_numpy(), at).all()
    assert np.isin(pd.Series(x).groupby(c).idxmin().to_numpy(), at).all()
    # a short chart draws every point and says nothing of a reduction
    short = draw.chart_figure(chart_result(k=parts.REDUCE_FROM, strata=None))
    assert "drawn from" not in named(short)["chart"].title.text
    assert len(data_of(short, "chart_points")["x"]) == parts.REDUCE_FROM


def test_a_long_split_chart_states_the_reduction_in_its_heading():
    layout = draw.chart_figure(chart_result(k=12_000, strata=("A", "B")), split=True)
    assert "drawn from 12,000 points by the lowest" in named(layout)["chart_title"].text
    panels = pd.DataFrame(data_of(layout, "chart_points"))
    # each panel (narrower figures: fewer pixel columns) has its own extremes and ends
    assert set(panels["panel_code"]) == {0, 1}
    assert panels.groupby("panel_code").size().max() <= 2 * (parts.WIDTH // 2) + 2 + 2


def test_refresh_round_trips_on_reduced_charts():
    first, second = (chart_result(k=30_000, strata=("A", "B"), seed=s) for s in (1, 2))
    layout = draw.chart_figure(first)
    doc = Document()
    doc.add_root(layout)
    ids = {m.id for m in layout.references()}
    before = _snapshot(layout)
    title = named(layout)["chart"].title.text
    assert not draw.needs_rebuild(layout, second)
    draw.refresh(layout, second)
    assert {m.id for m in layout.references()} == ids
    fresh = draw.chart_figure(second)
    assert_same(_snapshot(layout), _snapshot(fresh))
    assert named(layout)["chart"].title.text == named(fresh)["chart"].title.text
    draw.refresh(layout, first)
    assert_same(_snapshot(layout), before)
    assert named(layout)["chart"].title.text == title


# --- other figures ----------------------------------------------------------------------


def test_multivari_figure():
    result = variation_result()
    layout = draw.multivari_figure(result)
    models = named(layout)
    assert {"multivari_0", "multivari_1", "multivari_points", "multivari_line"} <= set(models)
    assert len(models["multivari_points"].data["x"]) == len(result.multivari)
    # within each of the 4 subgroups the 3 levels of each factor are joined by 2 segments
    assert len(models["multivari_line"].data["x0"]) == 4 * 2 + 4 * 2
    assert "crew" in models["multivari_0"].title.text


def test_multivari_leaves_out_the_subgroup_mean_rows():
    # stats.variation.multivari_table appends the subgroup means as factor "subgroup":
    # they are not a factor's levels and get no panel of their own.
    result = variation_result()
    mv = result.multivari
    means = mv.groupby("subgroup", observed=True)["mean"].mean().reset_index()
    with_means = pd.concat(
        [mv, means.assign(factor="subgroup", level=means["subgroup"].astype(str), n=6)],
        ignore_index=True,
    )
    layout = draw.multivari_figure(dataclasses.replace(result, multivari=with_means))
    models = named(layout)
    assert "multivari_2" not in models
    assert set(models["multivari_points"].data["factor"]) == {"crew", "nozzle"}
    assert len(models["multivari_points"].data["x"]) == len(mv)


def test_anom_figure_rings_the_signalling_levels():
    result = variation_result()
    models = named(draw.anom_figure(result, "crew"))
    assert {"anom", "anom_points", "anom_signals", "anom_limits"} <= set(models)
    assert list(models["anom_points"].data["level"]) == ["A", "B", "C"]
    assert list(models["anom_signals"].data["level"]) == ["C"]  # 5.0 above 3.5
    assert "crew" in models["anom"].title.text
    with pytest.raises(QCDataError, match="shift"):
        draw.anom_figure(result, "shift")


def test_components_figure():
    result = variation_result()
    models = named(draw.components_figure(result))
    bars = models["components_bars"].data
    assert list(bars["source"]) == ["crew", "nozzle", "residual"]
    np.testing.assert_allclose(bars["share"], [0.25, 0.125, 0.625])
    assert list(bars["label"]) == ["25%", "12%", "62%"]
    assert "ANOVA" in models["components"].title.text


def test_acf_figure():
    models = named(draw.acf_figure(time_result()))
    assert {"acf", "pacf", "acf_bars"} <= set(models)
    np.testing.assert_array_equal(models["acf_bars"].data["lag"], np.arange(1, 11))
    assert models["acf"].x_range is models["pacf"].x_range


def test_shifts_figure_draws_levels_before_and_after():
    result = time_result(k=30, shift_at=15)
    models = named(draw.shifts_figure(result, x="position"))
    steps = pd.DataFrame(models["shifts_steps"].data)
    assert len(models["shifts_series"].data["x"]) == 30
    pieces = sorted(map(tuple, steps[["x0", "x1", "y0", "y1"]].to_numpy().tolist()))
    assert pieces == [(0.5, 15.5, 0.0, 0.0), (15.5, 15.5, 0.0, 1.0), (15.5, 30.5, 1.0, 1.0)]
    assert set(steps["subgroup"]) == {"16"}
    bad = dataclasses.replace(result, shifts=result.shifts.assign(subgroup=99))
    with pytest.raises(QCDataError, match="99"):
        draw.shifts_figure(bad)


def test_capability_figure():
    result = capability_result()
    models = named(draw.capability_figure(result))
    assert len(models["capability_histogram"].data["left"]) == 10
    assert len(models["capability_curve"].data["x"]) == 200
    spec = models["capability_spec"].data
    assert list(spec["label"]) == ["LSL 0.5", "USL 10.5", "target 5", "mean 5"]
    assert list(spec["role"]) == ["limit", "limit", "target", "mean"]


# --- refresh ----------------------------------------------------------------------------

FIGURES = [
    (lambda r: draw.chart_figure(r), lambda s: chart_result(seed=s)),
    (lambda r: draw.chart_figure(r, split=True), lambda s: chart_result(seed=s, signals=(s,))),
    (
        draw.multivari_figure,
        lambda s: VariationResult(
            *(lambda v: (v.structure, v.anova, v.components, v.comparisons))(variation_result()),
            multivari=variation_result().multivari.assign(mean=lambda f: f["mean"] + s),
        ),
    ),
    (lambda r: draw.anom_figure(r, "crew"), lambda s: variation_result()),
    (lambda r: draw.chart_figure(r), lambda s: cusum_result(seed=s, strata=("A", "B"))),
    (draw.components_figure, lambda s: variation_result()),
    (draw.acf_figure, lambda s: time_result()),
    (draw.shifts_figure, lambda s: time_result(shift_at=10 + s)),
    (draw.capability_figure, lambda s: capability_result(shift=s)),
]


def _snapshot(layout) -> dict:
    return {
        m.name: {k: list(v) for k, v in m.data.items()}
        for m in layout.references()
        if m.name and hasattr(m, "data")
    }


def assert_same(a: dict, b: dict) -> None:
    np.testing.assert_equal(a, b)  # NaN equals NaN here


@pytest.mark.parametrize("build, make", FIGURES)
def test_refresh_changes_data_in_place_and_round_trips(build, make):
    first, second = make(1), make(2)
    layout = build(first)
    doc = Document()
    doc.add_root(layout)
    ids = {m.id for m in layout.references()}
    before = _snapshot(layout)
    events = []
    doc.on_change(events.append)
    assert not draw.needs_rebuild(layout, second)
    draw.refresh(layout, second)
    assert {m.id for m in layout.references()} == ids  # nothing new: updated in place
    assert_same(_snapshot(layout), _snapshot(build(second)))
    draw.refresh(layout, first)
    assert_same(_snapshot(layout), before)
    assert events  # the document saw the changes (what jupyter_bokeh sends to the page)


def test_refresh_inside_a_jupyter_widget_sends_data_patches_only():
    from jupyter_bokeh import BokehModel

    layout = draw.chart_figure(chart_result(seed=1))
    widget = BokehModel(layout)
    sent = []
    widget.send = lambda content, buffers=None: sent.append(content)  # no kernel here
    draw.refresh(layout, chart_result(seed=2))
    payload = "".join(m.get("payload", "") for m in sent if isinstance(m, dict))
    assert "ColumnDataChanged" in payload
    assert "RootAdded" not in payload and '"type":"object"' not in payload  # no new models


def test_refresh_recolours_by_data_only():
    layout = draw.chart_figure(chart_result(strata=("A", "B")))
    ids = {m.id for m in layout.references()}
    swapped = chart_result(strata=("B", "A"))  # same panel structure, other level order
    draw.refresh(layout, swapped)
    assert {m.id for m in layout.references()} == ids
    colours = point_strata(layout)
    assert colours["s"][0] == "B"
    assert colours["c"][0] == draw.palette_for(["B", "A"])["B"]


def test_needs_rebuild_when_the_structure_changes():
    layout = draw.chart_figure(chart_result())
    assert draw.needs_rebuild(layout, chart_result(strata=("A", "B", "C"), per_stratum=True))
    assert draw.needs_rebuild(layout, chart_result(secondary=False))
    assert draw.needs_rebuild(layout, chart_result(start=False))
    assert draw.needs_rebuild(layout, chart_result(strata=None))
    assert draw.needs_rebuild(layout, variation_result())
    wide = draw.chart_figure(chart_result(k=parts.WEBGL_FROM, start=False))
    assert draw.needs_rebuild(wide, chart_result(k=parts.WEBGL_FROM + 1, start=False))
    assert not draw.needs_rebuild(wide, chart_result(k=parts.WEBGL_FROM - 1, start=False))
    split = draw.chart_figure(chart_result(), split=True)
    assert draw.needs_rebuild(split, chart_result(strata=("A", "B", "C")))
    assert not draw.needs_rebuild(split, chart_result(seed=3))
    anom = draw.anom_figure(variation_result(), "crew")
    assert draw.needs_rebuild(anom, variation_result(levels=("A", "B", "C", "D")))
    with pytest.raises(QCDataError, match="chart_figure"):
        draw.refresh(layout, chart_result(secondary=False))


# --- properties -------------------------------------------------------------------------


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    k=st.integers(1, 60),
    n_strata=st.integers(0, 4),
    flags=st.lists(st.integers(0, 59), max_size=10),
    split=st.booleans(),
    start=st.booleans(),
)
def test_any_chart_builds_with_one_point_per_row(k, n_strata, flags, split, start):
    strata = tuple("PQRS"[:n_strata]) or None
    result = chart_result(k, strata, start=start, signals=tuple(set(flags)), secondary=k > 1)
    layout = draw.chart_figure(result, split=split)
    points = data_of(layout, "chart_points")
    assert len(points["x"]) == k
    assert len(data_of(layout, "chart_signals")["x"]) == int(result.points["signal"].sum())
    if strata:
        frame = point_strata(layout)
        assert (frame.groupby("s")["c"].nunique() == 1).all()
        assert set(frame["s"]) == set(result.points["stratum"].astype(str))
    else:
        assert "color_code" not in points
    # each panel's centre and limit values sit at the right end of its lines
    limits = pd.DataFrame(data_of(layout, "chart_limits"))
    values = pd.DataFrame(data_of(layout, "chart_limit_values"))
    by = ["panel_code"] if "panel_code" in limits else np.zeros(len(limits), dtype=int)
    ends = limits.groupby(by)["x1"].max().to_numpy()
    by = ["panel_code"] if "panel_code" in values else np.zeros(len(values), dtype=int)
    assert (values.groupby(by)["x"].agg(["min", "max"]).to_numpy().T == ends).all()
    assert not draw.needs_rebuild(layout, result)


# --- resources and the one-way flow -------------------------------------------------------


@pytest.mark.parametrize("build, make", FIGURES)
def test_inline_html_loads_no_script_from_the_network(build, make):
    html = file_html(build(make(1)), resources=INLINE, title="check")
    assert not re.search(r"<script[^>]*\bsrc=[\"']?https?:", html, flags=re.IGNORECASE)
    assert "Bokeh" in html


def test_draw_imports_no_statistics_library():
    allowed_stats = {
        "qcexplore.stats.results",
        "qcexplore.stats.rules",
        "qcexplore.stats.charts.kinds",
    }
    for path in DRAW_DIR.glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            elif isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            else:
                continue
            for name in names:
                assert not name.startswith(("scipy", "statsmodels", "qcexplore.app")), path
                if name.startswith("qcexplore.stats"):
                    assert name in allowed_stats, (path, name)


def test_palette_colours_mean_levels_only_and_the_accent_means_signals_only():
    # DESIGN.md: the same colour for the same level on every panel, one accent for
    # signals. Bars and curves that are not a factor's level use neutral greys, so that
    # a blue bar does not read as the first crew; spec lines are not signals.
    from bokeh.models import GlyphRenderer

    plain = (
        draw.components_figure(variation_result()),
        draw.acf_figure(time_result()),
        draw.capability_figure(capability_result()),
    )
    for layout in plain:
        for renderer in layout.select({"type": GlyphRenderer}):
            glyph = renderer.glyph
            for prop in ("fill_color", "line_color"):
                colour = getattr(glyph, prop, None)
                if isinstance(colour, str):
                    assert colour not in (*palette.STRATA_COLORS, palette.ACCENT), (
                        layout.name,
                        prop,
                    )
            bars = renderer.data_source.data.get("color", [])
            assert not set(bars) & {*palette.STRATA_COLORS, palette.ACCENT}, layout.name


def test_every_figure_is_a_plot_with_a_title_that_fits():
    layouts = [build(make(1)) for build, make in FIGURES]
    layouts.append(draw.chart_figure(chart_result(strata=tuple("ABCDEF")), split=True))
    for layout in layouts:
        for plot in layout.select({"type": Plot}):
            assert plot.title.text, plot.name
            # about 8 pixels a character at 12 pt, beside the toolbar: no line runs off
            room = max(30, (plot.width - 40) // 8)
            for line in plot.title.text.splitlines():
                assert len(line) <= room or " " not in line, (plot.name, line)


def test_figures_build_from_the_study_results_of_the_demo():
    import qcexplore as qx

    frame, _ = qx.demo.filling_line(seed=0)
    study = qx.Study(
        frame,
        value="net_g",
        subgroup="round",
        time="taken_at",
        factors=("crew", "shift", "nozzle"),
        spec=qx.Spec(lsl=495, usl=515, target=505),
    )
    by_crew = study.chart(by="crew")
    layout = draw.chart_figure(by_crew)
    assert len(data_of(layout, "chart_points")["x"]) == len(by_crew.points)
    by_shift = study.chart(by="shift")
    assert not draw.needs_rebuild(layout, by_shift)  # another factor, same structure
    draw.refresh(layout, by_shift)
    assert set(data_of(layout, "chart_legend")["label"]) == {"early", "late", "night"}
    variation = study.variation()
    for build in (draw.multivari_figure, draw.components_figure):
        assert build(variation).name.endswith("_layout")
    # every kind labelled for what it plots; CUSUM rings only beyond the limits
    assert y_label(draw.chart_figure(study.chart(kind="xbar_s")), "secondary_chart") == (
        "Subgroup standard deviation"
    )
    cusum = study.chart(kind="cusum")
    signals = pd.DataFrame(data_of(draw.chart_figure(cusum), "chart_signals"))
    limit = cusum.points.loc[0, "ucl"]
    assert len(signals) >= int(cusum.points["signal"].sum()) > 0
    assert (signals["value"].abs() > limit * (1 - 1e-9)).all()
    single = qx.Study(frame.head(300), value="net_g", time="taken_at").chart()
    assert single.kind == "imr"
    assert y_label(draw.chart_figure(single), "chart") == "Single value"
    time_structure = study.time_structure()
    draw.acf_figure(time_structure)
    draw.shifts_figure(time_structure)
    draw.capability_figure(study.capability())

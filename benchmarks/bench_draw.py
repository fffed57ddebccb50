"""Benchmark: the control-chart figure for 250,000 points, built and refreshed.

Prints the median of 5 runs of
- building ``chart_figure`` (main chart with a secondary chart, three strata overlaid),
- ``refresh`` of that layout with another result of the same shape, alone and inside a
  jupyter_bokeh widget (the data patch serialised into the messages for the page; the
  sending itself is left out: no kernel),
- the floor: a bare bokeh figure with one scatter of the same x and y arrays,
and the ratios against the floor, all measured in the same run.

Run: ``python benchmarks/bench_draw.py [points]``.
"""

from __future__ import annotations

import sys

import numpy as np
import pandas as pd
from _timing import REPEATS, median_seconds
from bokeh.models import ColumnDataSource
from bokeh.plotting import figure
from jupyter_bokeh import BokehModel

from qcexplore.draw import chart_figure, refresh
from qcexplore.stats.results import ChartResult


def make_result(k: int, seed: int) -> ChartResult:
    rng = np.random.default_rng(seed)
    stat = rng.normal(500.0, 2.0, k)
    signal = rng.random(k) < 0.0002
    points = pd.DataFrame(
        {
            "subgroup": pd.Categorical(np.arange(1, k + 1), ordered=True),
            "stratum": pd.Categorical(np.array(["early", "late", "night"])[np.arange(k) % 3]),
            "stat": stat,
            "center": 500.0,
            "lcl": 494.0,
            "ucl": 506.0,
            "n": 1,
            "signal": signal,
            "rules": [("N1",) if s else () for s in signal],
            "start": pd.date_range("2026-01-05", periods=k, freq="min"),
        }
    )
    limits = pd.DataFrame(
        {
            "stratum": [None],
            "center": [500.0],
            "lcl": [494.0],
            "ucl": [506.0],
            "sigma": [2.0],
            "method": ["moving range / d2"],
        }
    )
    mr = points.assign(
        stat=np.abs(np.diff(stat, prepend=np.nan)),
        center=2.26,
        lcl=0.0,
        ucl=7.4,
        signal=False,
        rules=[()] * k,
    )
    return ChartResult(
        "imr",
        points,
        limits,
        secondary=ChartResult("mr", mr, limits, statistic="moving range"),
        statistic="value",
        sigma_method="within",
    )


def main(k: int = 250_000) -> None:
    first, second = make_result(k, 1), make_result(k, 2)
    x = np.arange(1, k + 1, dtype=float)
    y = first.points["stat"].to_numpy()

    def bare() -> object:
        fig = figure(output_backend="webgl")
        fig.scatter("x", "y", source=ColumnDataSource({"x": x, "y": y}))
        return fig

    layout = chart_figure(first)
    floor = median_seconds(bare)
    build = median_seconds(lambda: chart_figure(first))
    swaps = iter([second, first] * REPEATS)
    update = median_seconds(lambda: refresh(layout, next(swaps)))
    shown = chart_figure(first)
    widget = BokehModel(shown)
    widget.send = lambda content, buffers=None: None  # no kernel: serialise, do not send
    swaps = iter([second, first] * REPEATS)
    patched = median_seconds(lambda: refresh(shown, next(swaps)))
    print(f"points: {k:,}  (median of {REPEATS})")
    print(f"bare figure, one scatter: {floor * 1e3:8.1f} ms")
    print(f"chart_figure:             {build * 1e3:8.1f} ms  ratio {build / floor:6.1f}")
    print(f"refresh:                  {update * 1e3:8.1f} ms  ratio {update / floor:6.1f}")
    print(f"refresh in a widget:      {patched * 1e3:8.1f} ms  ratio {patched / floor:6.1f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 250_000)

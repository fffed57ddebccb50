"""Speed of an X-bar/R chart with all Nelson rules on 1,000,000 values (250,000 subgroups of 4).

Two paths: ``control_chart`` on the frame, and a fresh ``Study`` of the frame with its
``chart()`` (what a notebook user runs; the goal is at most 4x the floor). Prints the median of
5 rounds and the median of the per-round ratios to a floor on the same data: the bare
per-subgroup sums (np.bincount of count, sum and sum of squares) plus np.minimum.reduceat /
np.maximum.reduceat for the ranges. Each round times the floor and both paths back to back, so
a ratio compares calls made under the same load (the machine is shared).
Run: python benchmarks/bench_charts.py
"""

from __future__ import annotations

import statistics
import time

import numpy as np
import pandas as pd
from _timing import REPEATS, moments_floor

from qcexplore import Study
from qcexplore.stats.charts import control_chart

N_SUBGROUPS, SIZE = 250_000, 4


def main() -> None:
    rng = np.random.default_rng(0)
    values = rng.normal(500.0, 2.0, N_SUBGROUPS * SIZE)
    codes = np.repeat(np.arange(N_SUBGROUPS), SIZE)
    frame = pd.DataFrame(
        {
            "weight": values,
            "subgroup": pd.Categorical.from_codes(
                codes, categories=np.arange(N_SUBGROUPS), ordered=True
            ),
        }
    )
    starts = np.arange(0, values.size, SIZE)

    def chart() -> None:
        control_chart(frame, value="weight", subgroup="subgroup", kind="xbar_r", rules="nelson")

    def study_chart() -> None:
        Study(frame, value="weight", subgroup="subgroup").chart("xbar_r", rules="nelson")

    runs = {
        "floor (bincount x3 + reduceat min/max):": moments_floor(values, codes, starts),
        "control_chart xbar_r, Nelson rules:    ": chart,
        "Study(...).chart() xbar_r, Nelson:     ": study_chart,
    }
    seconds: dict[str, list[float]] = {name: [] for name in runs}
    for round_ in range(REPEATS + 1):  # round 0 warms up
        for name, run in runs.items():
            start = time.perf_counter()
            run()
            if round_:
                seconds[name].append(time.perf_counter() - start)
    floor = next(iter(seconds.values()))
    print(f"values: {values.size:,}  subgroups: {N_SUBGROUPS:,} of {SIZE}  rounds: {REPEATS}")
    for name, times in seconds.items():
        ratio = statistics.median(t / f for t, f in zip(times, floor, strict=True))
        print(f"{name} {statistics.median(times) * 1e3:8.1f} ms  ratio to floor {ratio:5.1f} x")


if __name__ == "__main__":
    main()

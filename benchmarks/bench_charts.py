"""Speed of control_chart: X-bar/R on 1,000,000 values (250,000 subgroups of 4), Nelson rules.

Prints the median of 5 runs and its ratio to a floor measured in the same run on the same
data: the bare per-subgroup sums (np.bincount of count, sum and sum of squares) plus
np.minimum.reduceat / np.maximum.reduceat for the ranges. Run: python benchmarks/bench_charts.py
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from _timing import REPEATS, median_seconds, moments_floor

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

    floor = moments_floor(values, codes, starts)
    base, ours = median_seconds(floor), median_seconds(chart)
    print(f"values: {values.size:,}  subgroups: {N_SUBGROUPS:,} of {SIZE}  runs: {REPEATS}")
    print(f"floor (bincount x3 + reduceat min/max): {base * 1e3:8.1f} ms")
    print(f"control_chart xbar_r, Nelson rules:    {ours * 1e3:8.1f} ms")
    print(f"ratio to floor:                         {ours / base:8.1f} x")


if __name__ == "__main__":
    main()

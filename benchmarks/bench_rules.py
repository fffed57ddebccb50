"""Time all eight Nelson rules on 1,000,000 points against a floor measured in the same run.

The floor is one pass of numpy sliding-window sums (window 15, the widest Nelson window) over
the same array: the least any windowed rule evaluation must do. Prints medians of 5 runs and
their ratio.

Run: python benchmarks/bench_rules.py
"""

from __future__ import annotations

import numpy as np
from _timing import REPEATS, median_seconds
from numpy.lib.stride_tricks import sliding_window_view

from qcexplore.stats.rules import evaluate_rules

SIZE = 1_000_000


def main() -> None:
    rng = np.random.default_rng(1)
    stat = rng.standard_normal(SIZE)
    segments = np.repeat(np.arange(SIZE // 1000), 1000)

    def floor() -> object:
        return sliding_window_view(stat, 15).sum(axis=1)

    floor_s = median_seconds(floor)
    rows = [("floor: sliding-window sums, window 15", floor_s)]
    rows.append(("nelson N1-N8", median_seconds(lambda: evaluate_rules(stat, 0.0, 1.0, "nelson"))))
    rows.append(
        (
            "nelson N1-N8, 1000 segments",
            median_seconds(lambda: evaluate_rules(stat, 0.0, 1.0, "nelson", segments=segments)),
        )
    )
    print(f"{SIZE:,} points, median of {REPEATS}")
    for name, seconds in rows:
        print(f"{name:42s} {seconds * 1e3:9.1f} ms   ratio {seconds / floor_s:6.1f}")


if __name__ == "__main__":
    main()

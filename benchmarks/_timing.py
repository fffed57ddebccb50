"""Shared pieces of the benchmark scripts: medians of repeated runs and the numpy floor.

Scripts run as ``python benchmarks/NAME.py``, which puts this folder on ``sys.path``.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable

import numpy as np

#: Timed calls per measurement (after one warm-up call): the median is quoted.
REPEATS = 5


def median_seconds(run: Callable[[], object], repeats: int = REPEATS) -> float:
    """Median wall time of ``repeats`` calls after one warm-up call."""
    run()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def moments_floor(values: np.ndarray, codes: np.ndarray, starts: np.ndarray) -> Callable[[], None]:
    """The least any per-subgroup statistic must do, on sorted subgroup codes.

    Counts, sums and sums of squares by ``np.bincount``, minima and maxima by
    ``np.*.reduceat`` over the subgroup ``starts``.
    """
    n_groups = int(codes.max()) + 1

    def floor() -> None:
        np.bincount(codes, minlength=n_groups)
        np.bincount(codes, weights=values, minlength=n_groups)
        np.bincount(codes, weights=values * values, minlength=n_groups)
        np.minimum.reduceat(values, starts)
        np.maximum.reduceat(values, starts)

    return floor


def report(name: str, seconds: float, floor_name: str, floor: float, target: float) -> bool:
    """Print one line with the median and the ratio against the floor; True if on target."""
    ratio = seconds / floor
    verdict = "ok" if ratio <= target else "SLOWER THAN TARGET"
    print(
        f"{name}: median {seconds * 1e3:.1f} ms; {floor_name}: {floor * 1e3:.1f} ms; "
        f"ratio {ratio:.2f} (target <= {target:g}) {verdict}"
    )
    return ratio <= target

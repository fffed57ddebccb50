"""Shared timing helper for the benchmark scripts: medians of repeated runs."""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable


def median_seconds(run: Callable[[], object], repeats: int = 7) -> float:
    """Median wall time of ``repeats`` calls after one warm-up call."""
    run()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def report(name: str, seconds: float, floor_name: str, floor: float, target: float) -> bool:
    """Print one line with the median and the ratio against the floor; True if on target."""
    ratio = seconds / floor
    verdict = "ok" if ratio <= target else "SLOWER THAN TARGET"
    print(
        f"{name}: median {seconds * 1e3:.1f} ms; {floor_name}: {floor * 1e3:.1f} ms; "
        f"ratio {ratio:.2f} (target <= {target:g}) {verdict}"
    )
    return ratio <= target

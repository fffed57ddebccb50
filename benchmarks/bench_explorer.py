"""Benchmark: the explorer on a 200,000-row study (server side, no browser).

Measures, in one run on the same data:

- building the explorer (Study given, imports already loaded): target < 2 s; and the
  first build in a fresh process (a new kernel), with the imports it needs;
- changing split-by with the chart panel visible (the Python callback: chart from the
  Study, data swapped into the figure's sources, the patch serialised for the page):
  target < 150 ms, median of 10 changes; once with the Study's cache cleared before
  each change (every chart computed afresh) and once warm (each split seen before);
- the floor: ``Study.chart`` alone on the same data with its cache cleared, so the
  ratio says what the figure update adds to the statistics.

Run: ``python benchmarks/bench_explorer.py`` (prints medians and ratios).
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time
from typing import TYPE_CHECKING

import pandas as pd

from qcexplore.demo import ROLES, filling_line

if TYPE_CHECKING:
    from qcexplore.study import Study

ROWS = 200_000
SPLITS = ("crew", "shift", "weekday", "hour", None)


def median_ms(times: list[float]) -> float:
    return statistics.median(times) * 1000


def tiled_demo(rows: int) -> pd.DataFrame:
    """The four-week demo repeated back to back (times shifted) until it has ``rows`` rows."""
    frame, _ = filling_line()
    span = pd.Timedelta(days=28)
    copies = -(-rows // len(frame))
    parts = []
    for i in range(copies):
        part = frame.copy()
        part["taken_at"] += i * span
        part["round"] += i * span
        part["day"] += i * 28
        parts.append(part)
    return pd.concat(parts, ignore_index=True).head(rows)


def study_of(frame: pd.DataFrame) -> Study:
    """The benchmark's Study of ``frame`` (imported here: :func:`fresh` times the imports)."""
    from qcexplore.study import Study

    return Study(frame, **ROLES)


def fresh() -> None:
    """In a new process, after ``import qcexplore`` (which the demo data needs): import the
    explorer, build the Study and the first explorer; prints the milliseconds taken."""
    frame = tiled_demo(ROWS)
    began = time.perf_counter()
    from qcexplore.app.explorer import Explorer

    Explorer(study_of(frame))
    print(f"{(time.perf_counter() - began) * 1000:.0f}")


def main() -> None:
    run = subprocess.run(
        [sys.executable, __file__, "--fresh"], capture_output=True, text=True, check=True
    )
    first = float(run.stdout.split()[-1])
    from qcexplore.app.explorer import Explorer
    from qcexplore.study import Study

    frame = tiled_demo(ROWS)
    study = study_of(frame)
    print(f"{len(study):,} rows in {len(study.subgroups):,} subgroups")
    print(
        f"fresh process, after import qcexplore: explorer imports + Study + first build: "
        f"{first:.0f} ms  (target < 2000 ms)"
    )
    Explorer(Study(frame.head(2000), value="net_g", subgroup="round"))  # warm the imports

    began = time.perf_counter()
    ex = Explorer(study)
    build = time.perf_counter() - began
    print(f"build the explorer: {build * 1000:.0f} ms  (target < 2000 ms)  {ex.status.value}")

    floor = []
    for by in SPLITS * 2:
        study._cache.clear()  # the floor is a fresh chart each time
        began = time.perf_counter()
        study.chart(by=by)
        floor.append(time.perf_counter() - began)

    for by in SPLITS:  # every split's figure seen once
        ex.set(by=by)
    cold, warm = [], []
    for by in SPLITS * 2:
        study._cache.clear()
        began = time.perf_counter()
        ex.set(by=by)
        cold.append(time.perf_counter() - began)
    for by in SPLITS * 2:
        began = time.perf_counter()
        ex.set(by=by)
        warm.append(time.perf_counter() - began)
    assert "qcx-error" not in ex.status.value, ex.status.value

    f, c, w = median_ms(floor), median_ms(cold), median_ms(warm)
    print(f"floor, Study.chart alone (uncached): median {f:.0f} ms")
    print(
        f"split-by change, chart computed afresh: median {c:.0f} ms "
        f"(target < 150 ms), {c / f:.1f}x the floor"
    )
    print(
        f"split-by change, chart cached: median {w:.0f} ms (target < 150 ms), "
        f"{w / f:.1f}x the floor"
    )
    print(f"build / floor: {build * 1000 / f:.1f}x")


if __name__ == "__main__":
    fresh() if "--fresh" in sys.argv else main()

"""findings() on the demo tiled to 1 and 2 million rows (10 million with --large).

Run: ``python benchmarks/bench_findings.py`` (``--large`` adds 10,000,000 rows, a few
minutes and several GiB). For each size, on a fresh Study each time (so nothing is
cached):

* ``study.findings()``: the median of 3 runs after one warm-up run (1 run at 10M), the
  Study built outside the timing; the target at 1M rows is at most 10 s;
* its peak memory above what the Study holds (two more runs: the allocations tracemalloc
  traces, and the growth of the resident high-water mark; target under 2 GiB at 1M rows);
* the reference measured in the same run: ``qx.Study(frame, **ROLES)`` itself, which
  reads every row a few times, and the ratio of the two;
* the cost per row against the first size (1.0 when the cost grows linearly).

A profile of one run (``--profile``) shows where the time goes.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import statistics
import time
import tracemalloc

from _tiled import tiled_demo

import qcexplore as qx
from qcexplore.demo import ROLES


def _seconds(frame, repeats: int) -> tuple[float, float]:
    """Median seconds of findings() on fresh Studies, and of building those Studies."""
    found, built = [], []
    for _ in range(repeats + (repeats > 1)):
        start = time.perf_counter()
        study = qx.Study(frame, **ROLES)
        middle = time.perf_counter()
        study.findings()
        found.append(time.perf_counter() - middle)
        built.append(middle - start)
    if repeats > 1:  # the first run warms up (imports, the simulated nulls)
        found, built = found[1:], built[1:]
    return statistics.median(found), statistics.median(built)


def _resident_gib(key: str) -> float:
    """``VmRSS`` or ``VmHWM`` (the resident high-water mark) of this process, in GiB."""
    with open("/proc/self/status") as status:
        line = next(line for line in status if line.startswith(key))
    return int(line.split()[1]) / 2**20


def _peaks(frame) -> tuple[float, float]:
    """Peak memory of findings() above the Study: traced allocations, and resident memory
    (the high-water mark reset first through /proc/self/clear_refs, Linux)."""
    study = qx.Study(frame, **ROLES)
    with open("/proc/self/clear_refs", "w") as clear:
        clear.write("5")
    resident = _resident_gib("VmRSS")
    study.findings()
    resident = _resident_gib("VmHWM") - resident
    study = qx.Study(frame, **ROLES)
    tracemalloc.start()
    study.findings()
    traced = tracemalloc.get_traced_memory()[1] / 2**30
    tracemalloc.stop()
    return traced, resident


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large", action="store_true", help="also 10,000,000 rows")
    parser.add_argument("--profile", action="store_true", help="profile one run at 1M rows")
    args = parser.parse_args()
    if args.profile:
        study = qx.Study(tiled_demo(1_000_000), **ROLES)
        cProfile.runctx("study.findings()", globals(), {"study": study}, "findings.prof")
        pstats.Stats("findings.prof").sort_stats("cumtime").print_stats(40)
        return
    sizes = [1_000_000, 2_000_000] + ([10_000_000] if args.large else [])
    first = None
    for rows in sizes:
        frame = tiled_demo(rows)
        repeats = 3 if rows <= 2_000_000 else 1
        found, built = _seconds(frame, repeats)
        traced, resident = _peaks(frame)
        per_row = found / rows
        first = first or per_row
        target = " (target <= 10 s, < 2 GiB)" if rows == 1_000_000 else ""
        print(
            f"{rows:>11,} rows: findings() {found:6.2f} s, peak +{traced:5.2f} GiB traced, "
            f"+{resident:5.2f} GiB resident{target}; "
            f"Study() {built:5.2f} s; ratio {found / built:5.2f}; cost per row "
            f"{per_row * 1e9:5.0f} ns, {per_row / first:4.2f} x the first size's",
            flush=True,
        )


if __name__ == "__main__":
    main()

"""Benchmark: the HTML report (``Study.report``) of the demo tiled to 1M rows.

Measures, in one run, the size and writing time of the report of the demo's own four
weeks and of the demo repeated back to back to 1,000,000 rows (``tiled_demo`` of
bench_explorer.py): targets at most 8 MB and at most 10 s at 1M rows. Each data set is
measured in a process of its own, so that the peak memory printed is that report's
(the Study is built before the timing; its cache is cleared before each write, so every
result is computed afresh).

Run: ``python benchmarks/bench_report.py [repeats]`` (prints medians; default 3 writes
after one warm-up write).
"""

from __future__ import annotations

import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench_explorer import study_of, tiled_demo

from qcexplore.demo import filling_line

ROWS = 1_000_000
MAX_BYTES = 8_000_000
MAX_SECONDS = 10.0


def measure(rows: int, repeats: int) -> None:
    """In this process: write the report ``repeats`` times after one warm-up; print the
    median seconds, the size in bytes and the peak resident memory in bytes."""
    import statistics

    frame = filling_line()[0] if rows == 0 else tiled_demo(rows)
    study = study_of(frame)
    path = Path(tempfile.mkdtemp()) / "report.html"
    times = []
    for i in range(repeats + 1):
        study._cache.clear()  # every result computed afresh, as on a first report
        began = time.perf_counter()
        study.report(path)
        if i:  # the first write warms imports and bokeh's caches
            times.append(time.perf_counter() - began)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(len(study), len(study.subgroups), statistics.median(times), path.stat().st_size, peak)


def run(rows: int, repeats: int) -> tuple[int, int, float, int, int]:
    out = subprocess.run(
        [sys.executable, __file__, "--measure", str(rows), str(repeats)],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.split()
    n, k, seconds, size, peak = out[-5:]
    return int(n), int(k), float(seconds), int(size), int(peak)


def main(repeats: int) -> None:
    demo = run(0, repeats)
    big = run(ROWS, repeats)
    for name, (n, k, seconds, size, peak) in (("demo", demo), ("tiled", big)):
        print(
            f"{name}: {n:,} rows, {k:,} subgroups: report {size / 1e6:.2f} MB, written in "
            f"median {seconds:.2f} s of {repeats}; peak memory {peak / 2**30:.2f} GiB"
        )
    print(
        f"1M rows / demo: size {big[3] / demo[3]:.2f}x, time {big[2] / demo[2]:.1f}x; "
        f"size {'ok' if big[3] <= MAX_BYTES else 'OVER TARGET'} (target <= 8 MB), "
        f"time {'ok' if big[2] <= MAX_SECONDS else 'OVER TARGET'} (target <= 10 s)"
    )


if __name__ == "__main__":
    if "--measure" in sys.argv:
        at = sys.argv.index("--measure")
        measure(int(sys.argv[at + 1]), int(sys.argv[at + 2]))
    else:
        main(int(sys.argv[1]) if len(sys.argv) > 1 else 3)

"""Cell moments from Parquet through qx.scan against DuckDB's own GROUP BY of the same moments.

Writes N rows (default 10,000,000) of Parquet to a temporary folder in row groups of one
million (deleted at the end), then times, on the same files and the same engine settings:

- ours: ``scan(folder).moments("w", by)`` (the shifted sums, finite values only, cells
  sorted), by subgroup (N / 5 cells) and by crew x nozzle (15 cells);
- the floor: one plain ``SELECT by, COUNT, SUM(w), SUM(w*w), MIN, MAX ... GROUP BY by``
  fetched as a table, the least any implementation must ask DuckDB for.

Prints the medians, their ratio (target <= 2) and the process's peak resident memory.
Run: python benchmarks/bench_sources.py [--rows N]
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import tempfile
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from _timing import median_seconds, report

from qcexplore.data.sources import scan

CHUNK = 1_000_000
SIZE = 5  # values per subgroup


def write(folder: Path, rows: int) -> None:
    rng = np.random.default_rng(0)
    for number, start in enumerate(range(0, rows, CHUNK)):
        count = min(CHUNK, rows - start)
        position = np.arange(start, start + count)
        nozzle = rng.integers(1, 6, count)
        table = pa.table(
            {
                "subgroup": position // SIZE,
                "crew": rng.choice(np.array(["Ann", "Bo", "Cy"]), count),
                "nozzle": nozzle,
                "w": 500.0 + 0.3 * nozzle + rng.normal(0.0, 1.5, count),
            }
        )
        pq.write_table(table, folder / f"part-{number:04d}.parquet")


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    arguments = parser.parse_args()
    rows, repeats = arguments.rows, arguments.repeats
    folder = Path(tempfile.mkdtemp(prefix="qcexplore-bench-sources-"))
    ok = True
    try:
        write(folder, rows)
        source = scan(folder)
        floor_connection = duckdb.connect(
            config={"memory_limit": "1GB", "threads": len(os.sched_getaffinity(0))}
        )
        files = f"read_parquet('{folder}/*.parquet')"
        for by in (["subgroup"], ["crew", "nozzle"]):
            keys = ", ".join(by)
            floor_sql = (
                f"SELECT {keys}, COUNT(*), SUM(w), SUM(w * w), MIN(w), MAX(w) FROM {files} "
                f"GROUP BY {keys}"
            )
            cells = len(source.moments("w", by).cells)
            ours = median_seconds(lambda by=by: source.moments("w", by), repeats)
            floor = median_seconds(
                lambda q=floor_sql: floor_connection.execute(q).fetch_df(), repeats
            )
            ok &= report(
                f"moments by {keys} ({rows:,} rows -> {cells:,} cells)",
                ours,
                "DuckDB GROUP BY",
                floor,
                2.0,
            )
        source.close()
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2
    print(f"peak resident memory of this process: {peak:.2f} GiB (target < 2)")
    return 0 if ok and peak < 2 else 1


if __name__ == "__main__":
    raise SystemExit(main())

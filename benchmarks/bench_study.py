"""Study() on the demo tiled to 1 to 10 million rows: cost per row against a floor.

Run: ``python benchmarks/bench_study.py`` (``--sizes 1e6,2e6`` for other sizes). Prints,
for each size, the median of 3 runs (each after one warm-up run) of

* ``qx.Study(frame, **ROLES)`` on the demo tiled back to back (timestamps, hourly
  subgroups, crew, shift, nozzle; weekday, hour and day derived from the timestamps);
* the floor, measured here on the same frame: what any intake must do, a stable sort by
  time, the codes of the subgroup and of every factor column (``pd.factorize``) and the
  rows taken in time order;

with their ratio, and the cost per row against the first size (1.0 when the cost grows
linearly with the rows). The derived factors alone (``derive_time_factors``) are timed
the same way.
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd
from _tiled import tiled_demo
from _timing import median_seconds

import qcexplore as qx
from qcexplore.data.derive import derive_time_factors
from qcexplore.demo import ROLES

REPEATS = 3


def _floor(frame: pd.DataFrame) -> None:
    order = np.argsort(frame["taken_at"].to_numpy(), kind="stable")
    for column in ("round", "crew", "shift", "nozzle"):
        pd.factorize(frame[column])
    frame.take(order)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="1e6,2e6,5e6,1e7", help="rows, comma-separated")
    sizes = [int(float(s)) for s in parser.parse_args().sizes.split(",")]
    print(f"median of {REPEATS} runs")
    first = None
    for rows in sizes:
        frame = tiled_demo(rows)
        ours = median_seconds(lambda f=frame: qx.Study(f, **ROLES), REPEATS)
        floor = median_seconds(lambda f=frame: _floor(f), REPEATS)
        derive = median_seconds(lambda t=frame["taken_at"]: derive_time_factors(t), REPEATS)
        per_row = ours / rows
        first = first or per_row
        print(
            f"{rows:>11,} rows: Study() {ours:6.2f} s; floor {floor:5.2f} s; ratio "
            f"{ours / floor:5.2f}; derived factors {derive:5.2f} s; cost per row "
            f"{per_row * 1e9:5.0f} ns, {per_row / first:4.2f} x the first size's"
        )


if __name__ == "__main__":
    main()

"""The subgroup table on 1,000,000 values (250,000 subgroups of 4) against the numpy floor.

The floor is the least any implementation must do, measured in the same run on the
same arrays: bincount of count, sum and sum of squares, and reduceat of min and max.
Run: python benchmarks/bench_subgroups.py
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from _timing import median_seconds, moments_floor, report

from qcexplore.stats.subgroups import group_moments, subgroup_table

N_SUBGROUPS, SIZE = 250_000, 4


def main() -> int:
    rng = np.random.default_rng(0)
    values = rng.normal(500.0, 2.0, N_SUBGROUPS * SIZE)
    codes = np.repeat(np.arange(N_SUBGROUPS), SIZE)
    starts = np.arange(0, values.size, SIZE)
    frame = pd.DataFrame(
        {"w": values, "sg": pd.Categorical.from_codes(codes, np.arange(N_SUBGROUPS), ordered=True)}
    )

    floor_s = median_seconds(moments_floor(values, codes, starts))
    moments_s = median_seconds(lambda: group_moments(values, codes, N_SUBGROUPS))
    table_s = median_seconds(lambda: subgroup_table(frame, value="w", subgroup="sg"))
    ok = report("group_moments", moments_s, "numpy floor", floor_s, 3.0)
    ok &= report("subgroup_table", table_s, "numpy floor", floor_s, 3.0)
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())

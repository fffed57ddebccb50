"""Timing of variation() on 200,000 rows against statsmodels on the same one-way model.

Run: ``python benchmarks/bench_variation.py``. Prints the median of 5 runs of

* ``variation()`` with single values and one factor (the one-way analysis, with all the
  comparisons, spread tests, components and multi-vari table it also returns);
* statsmodels ``ols(...).fit()`` + ``anova_lm(typ=2)`` on the same one-way model, and the
  ratio of the two, both measured here in the same run;
* the same without the per-factor comparisons and spread tests (``compare=False``);
* ``variation()`` on a nested/crossed layout (subgroups of 6, nozzle within subgroups,
  crew between subgroups, crew also as measured_by), which statsmodels cannot fit
  directly at this size (33,334 subgroup dummies), balanced and with 1.5% of the rows
  dropped at random (unbalanced: REML components from sufficient statistics);
* ``variation()`` on the demo study (qcexplore.demo.filling_line) over 7 and 28 days, the
  call the explorer makes when the date window changes, against the floor of the same
  call with moment components and no comparisons.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.formula.api as smf
from _timing import REPEATS, median_seconds

from qcexplore.demo import ROLES, filling_line
from qcexplore.stats.variation import variation
from qcexplore.study import Study

ROWS = 200_004  # a multiple of the subgroup size 6


def _frames(seed: int = 0) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    size = 6
    k = ROWS // size
    sg = np.repeat(np.arange(k), size)
    nozzle = np.tile(np.arange(size), k)
    crew = (np.arange(k) // 8) % 3
    y = (
        500
        + rng.normal(0, 1.0, ROWS)
        + 0.3 * (nozzle == 2)
        + rng.normal(0, 0.5, k)[sg]
        + 0.2 * crew[sg]
    )
    nozzle_labels = pd.Categorical(np.array([f"N{i + 1}" for i in range(size)])[nozzle])
    one_way = pd.DataFrame(
        {
            "obs": pd.Categorical(np.arange(ROWS), ordered=True),
            "nozzle": nozzle_labels,
            "weight": y,
        }
    )
    nested = pd.DataFrame(
        {
            "sg": pd.Categorical(sg, ordered=True),
            "nozzle": nozzle_labels,
            "crew": pd.Categorical(np.array(["early", "late", "night"])[crew[sg]]),
            "weight": y,
        }
    )
    return one_way, nested


def main() -> None:
    one_way, nested = _frames()
    ours = median_seconds(
        lambda: variation(one_way, value="weight", subgroup="obs", factors=["nozzle"])
    )
    reference = median_seconds(
        lambda: sm.stats.anova_lm(smf.ols("weight ~ C(nozzle)", one_way).fit(), typ=2)
    )
    ours_core = median_seconds(
        lambda: variation(
            one_way, value="weight", subgroup="obs", factors=["nozzle"], compare=False
        )
    )
    mine = variation(one_way, value="weight", subgroup="obs", factors=["nozzle"]).anova
    theirs = sm.stats.anova_lm(smf.ols("weight ~ C(nozzle)", one_way).fit(), typ=2)
    assert np.isclose(mine.loc[0, "f"], theirs.loc["C(nozzle)", "F"], rtol=1e-8)
    nested_time = median_seconds(
        lambda: variation(
            nested,
            value="weight",
            subgroup="sg",
            factors=["crew", "nozzle"],
            measured_by=["crew"],
        )
    )
    anova_only = median_seconds(
        lambda: variation(
            nested, value="weight", subgroup="sg", factors=["crew", "nozzle"], compare=False
        )
    )
    print(f"rows: {ROWS:,}, median of {REPEATS}")
    print(f"variation() one-way, full result       : {ours * 1e3:8.1f} ms")
    print(f"statsmodels ols + anova_lm(typ=2)      : {reference * 1e3:8.1f} ms")
    print(f"ratio variation() / statsmodels        : {ours / reference:8.2f}")
    print(f"variation() one-way, no compare        : {ours_core * 1e3:8.1f} ms")
    print(f"ratio (no compare) / statsmodels       : {ours_core / reference:8.2f}")
    print(f"variation() nested + crossed, full      : {nested_time * 1e3:8.1f} ms")
    print(f"variation() nested + crossed, no compare: {anova_only * 1e3:8.1f} ms")
    keep = np.random.default_rng(1).random(len(nested)) > 0.015
    unbalanced = nested[keep].reset_index(drop=True)
    unbalanced_time = median_seconds(
        lambda: variation(
            unbalanced,
            value="weight",
            subgroup="sg",
            factors=["crew", "nozzle"],
            measured_by=["crew"],
        )
    )
    print(f"variation() unbalanced {keep.sum():,} rows, full: {unbalanced_time * 1e3:8.1f} ms")
    args = {"value": "net_g", "subgroup": "round", "factors": ["crew", "shift", "nozzle"]}
    for days in (7, 28):
        frame, _ = filling_line(days=days)
        table = Study(frame, **ROLES).data  # the analysed table, copied once outside the timing
        demo = median_seconds(lambda t=table: variation(t, measured_by=["crew"], **args))
        floor = median_seconds(
            lambda t=table: variation(t, components="ems", compare=False, **args)
        )
        method = variation(table, **args).method
        print(f"demo {days:2d} days ({len(table):,} rows), full   : {demo * 1e3:8.1f} ms")
        print(f"demo {days:2d} days, floor (ems, no compare)  : {floor * 1e3:8.1f} ms")
        print(f"ratio full / floor                     : {demo / floor:8.2f}  ({method})")


if __name__ == "__main__":
    main()

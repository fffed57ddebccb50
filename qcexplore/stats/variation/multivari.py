"""The multi-vari table: level means of each factor nested in each subgroup, ready to draw."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from qcexplore.stats.subgroups import group_moments
from qcexplore.stats.variation.factors import Factor, prepare


def multivari_table(
    frame: pd.DataFrame, *, value: str, subgroup: str, factors: Sequence[str]
) -> pd.DataFrame:
    """Level means of each factor nested in each subgroup: a tidy table ready to draw.

    Columns ``subgroup, factor, level, mean, n``: for each factor, one row per
    (subgroup, level) cell that has data; then one row per subgroup with
    ``factor == "subgroup"`` and ``level`` the subgroup's label (the subgroup mean).
    ``subgroup`` keeps the ordered categories of the input (time order); ``level`` is
    text. Checked against pandas ``groupby`` means and sizes (tests/test_variation.py).

    Examples
    --------
    >>> f = pd.DataFrame({"h": pd.Categorical([1, 1, 2, 2], ordered=True),
    ...                   "nozzle": pd.Categorical(list("abab")), "w": [1.0, 2.0, 3.0, 5.0]})
    >>> multivari_table(f, value="w", subgroup="h", factors=["nozzle"])["mean"].tolist()
    [1.0, 2.0, 3.0, 5.0, 1.5, 4.0]
    """
    return multivari_rows(*prepare(frame, value, subgroup, factors))


def multivari_rows(y: np.ndarray, sg: Factor, fs: list[Factor]) -> pd.DataFrame:
    cats = sg.levels
    parts = []
    for f in fs:
        cell = sg.codes * f.n_levels + f.codes
        size = sg.n_levels * f.n_levels
        n = np.bincount(cell, minlength=size)
        total = np.bincount(cell, weights=y, minlength=size)
        present = np.flatnonzero(n)
        parts.append(
            pd.DataFrame(
                {
                    "subgroup": pd.Categorical.from_codes(
                        present // f.n_levels, categories=cats, ordered=True
                    ),
                    "factor": f.name,
                    "level": pd.Index(f.levels).astype(str).to_numpy()[present % f.n_levels],
                    "mean": total[present] / n[present],
                    "n": n[present],
                }
            )
        )
    m = group_moments(y, sg.codes, sg.n_levels)
    present = np.flatnonzero(m.n)
    parts.append(
        pd.DataFrame(
            {
                "subgroup": pd.Categorical.from_codes(present, categories=cats, ordered=True),
                "factor": "subgroup",
                "level": pd.Index(cats).astype(str).to_numpy()[present],
                "mean": m.mean[present],
                "n": m.n[present],
            }
        )
    )
    return pd.concat(parts, ignore_index=True)

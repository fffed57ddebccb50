"""Wide sheets (one column per sample) to one row per measurement."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from qcexplore.data.validate import require_columns, require_frame
from qcexplore.errors import QCDataError


def to_long(
    frame: pd.DataFrame,
    sample_columns: Sequence[str],
    *,
    keep: Sequence[str] | None = None,
    sample: str = "sample",
    value: str = "value",
) -> pd.DataFrame:
    """One row per measurement from a sheet with one column per sample.

    Rows keep the order of the sheet, samples the order of ``sample_columns``;
    the ``sample`` column becomes a categorical factor, since the position of a
    sample often stands for the team or the time that took it.

    Parameters
    ----------
    frame : the wide table (not modified)
    sample_columns : the columns that each hold one sample's measurement
    keep : id columns to carry along (default: every other column)
    sample, value : names of the new factor and value columns

    Examples
    --------
    >>> wide = pd.DataFrame({"day": [1, 2], "s1": [500.1, 499.7], "s2": [500.4, 500.0]})
    >>> to_long(wide, ["s1", "s2"]).values.tolist()
    [[1, 's1', 500.1], [1, 's2', 500.4], [2, 's1', 499.7], [2, 's2', 500.0]]
    """
    require_frame(frame)
    if isinstance(sample_columns, str) or not len(sample_columns):
        raise QCDataError(
            "sample_columns must be a non-empty list of column names, e.g. ['s1', 's2']."
        )
    sample_columns = list(sample_columns)
    require_columns(frame, sample_columns, "sample columns")
    if len(set(sample_columns)) != len(sample_columns):
        raise QCDataError("A sample column is listed twice in sample_columns; list each once.")
    if keep is None:
        keep = [c for c in frame.columns if c not in sample_columns]
    else:
        keep = list(keep)
        require_columns(frame, keep, "keep")
    clash = {sample, value} & set(keep)
    if clash or sample == value:
        raise QCDataError(
            f"The new column names sample={sample!r} and value={value!r} must differ from "
            f"each other and from the kept columns; pass other names (clash: {sorted(clash)})."
        )
    k = len(sample_columns)
    # By position: labels would repeat rows of a frame whose index has duplicates.
    ids = frame[keep].iloc[np.repeat(np.arange(len(frame)), k)].reset_index(drop=True)
    positions = np.tile(np.arange(k), len(frame))
    ids[sample] = pd.Categorical.from_codes(positions, categories=[str(c) for c in sample_columns])
    ids[value] = frame[sample_columns].to_numpy(dtype=object).reshape(-1)
    numeric = pd.to_numeric(ids[value], errors="coerce")
    if numeric.notna().sum() == ids[value].notna().sum():
        ids[value] = numeric.astype(np.float64)
    return ids

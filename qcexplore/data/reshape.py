"""Wide sheets (one column per sample) to one row per measurement."""

from __future__ import annotations

from collections.abc import Hashable, Sequence

import numpy as np
import pandas as pd

from qcexplore.data.coding import shorten as shown
from qcexplore.data.numbers import is_measurement_dtype, number_cells
from qcexplore.data.validate import column_name, column_names, require_columns, require_frame
from qcexplore.errors import QCDataError


def to_long(
    frame: pd.DataFrame,
    sample_columns: Sequence[Hashable],
    *,
    keep: Sequence[Hashable] | None = None,
    sample: Hashable = "sample",
    value: Hashable = "value",
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
    >>> to_long(pd.DataFrame([[1.5, 2.5]]), [0, 1])["value"].tolist()  # a frame from an array
    [1.5, 2.5]
    """
    require_frame(frame)
    sample_columns = list(column_names(sample_columns, "sample_columns"))
    if not sample_columns:
        raise QCDataError(
            "sample_columns must be a non-empty list of column names, e.g. ['s1', 's2']."
        )
    require_columns(frame, sample_columns, "sample columns")
    if len(set(sample_columns)) != len(sample_columns):
        raise QCDataError("A sample column is listed twice in sample_columns; list each once.")
    if keep is None:
        kept = [i for i, c in enumerate(frame.columns) if c not in sample_columns]
    else:
        keep = list(column_names(keep, "keep"))
        require_columns(frame, keep, "keep")
        kept = frame.columns.get_indexer(pd.Index(keep)).tolist()
    sample = column_name(sample, "sample")
    value = column_name(value, "value")
    clash = {sample, value} & set(frame.columns[kept])
    if clash or sample == value:
        raise QCDataError(
            f"The new column names sample={shown(sample)} and value={shown(value)} must differ "
            "from each other and from the kept columns; pass other names "
            f"(clash: {', '.join(shown(c) for c in clash) or 'sample equals value'})."
        )
    k = len(sample_columns)
    # By position: labels would repeat rows of a frame whose index has duplicates, and a
    # column named None or NaN cannot be looked up by its name.
    ids = frame.iloc[np.repeat(np.arange(len(frame)), k), kept].reset_index(drop=True)
    positions = np.tile(np.arange(k), len(frame))
    ids[sample] = pd.Categorical.from_codes(positions, pd.Index([str(c) for c in sample_columns]))
    block = frame.iloc[:, frame.columns.get_indexer(pd.Index(sample_columns)).tolist()]
    if all(is_measurement_dtype(dtype) for dtype in block.dtypes):
        ids[value] = block.to_numpy(dtype=np.float64, na_value=np.nan).reshape(-1)
        return ids
    cells = pd.Series(block.to_numpy(dtype=object).reshape(-1), dtype=object)
    read = number_cells(cells)
    # Numbers when every cell reads as one; otherwise the cells as given, for the Study
    # to name the rows that are not numbers.
    ids[value] = read.values if read.readable else cells
    return ids

"""The demo filling line tiled back to back in time: a large data set of the demo's kind.

Scripts run as ``python benchmarks/NAME.py``, which puts this folder on ``sys.path``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from qcexplore.demo import filling_line

#: Length of one tile: the demo's four weeks.
TILE_DAYS = 28


def tiled_demo(rows: int, seed: int = 0) -> pd.DataFrame:
    """At least ``rows`` rows: copies of the demo's four weeks, each moved on by four weeks.

    Every copy keeps the demo's effects (crew B's scale, nozzle 4's drift from day 15 of
    its four weeks, the autocorrelated hourly level), so the record is a sawtooth of
    drifts; the rounds and days stay unique across copies.
    """
    tile, _ = filling_line(seed, days=TILE_DAYS)
    copies = -(-rows // len(tile))
    index = np.tile(np.arange(len(tile)), copies)
    shift = pd.to_timedelta(np.repeat(np.arange(copies) * TILE_DAYS, len(tile)), unit="D")
    frame = tile.iloc[index].reset_index(drop=True)
    frame["taken_at"] = frame["taken_at"] + shift
    frame["round"] = frame["round"] + shift
    frame["day"] = frame["day"] + np.repeat(np.arange(copies) * TILE_DAYS, len(tile))
    return frame.iloc[:rows]

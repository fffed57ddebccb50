"""Colours of our visual language: the strata, the signal accent and the neutral greys.

Strata take their colour from one colour-blind-safe categorical set in a fixed order,
so the same level keeps its colour on every panel that is given the same ordered
levels: the Okabe-Ito set (Okabe and Ito, "Color Universal Design", 2008) without its
vermillion, which reads as its orange, and with the indigo of Paul Tol's muted scheme
(Tol, "Colour Schemes", SRON technical note, 2021) as the eighth colour. Signals take a
plain red that no stratum colour and no grey comes near: at least 30 CIEDE2000 units
from each (tests/test_draw.py computes it from the sRGB and CIELAB formulas).

Up to :data:`COLOURED` levels each get their own colour. Beyond that a palette would
have to repeat, and two levels of one colour read as one, so one chosen level (the
``highlight``, by default the first) is coloured and the others are :data:`OTHERS` grey.

Nothing here computes a statistic: these functions only turn levels into colours.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd
from bokeh.models import LinearColorMapper

from qcexplore.errors import QCDataError

#: Strata colours in the order levels take them; yellow last, the weakest on white.
STRATA_COLORS: tuple[str, ...] = (
    "#0072B2",  # blue (Okabe-Ito)
    "#E69F00",  # orange (Okabe-Ito)
    "#009E73",  # bluish green (Okabe-Ito)
    "#CC79A7",  # reddish purple (Okabe-Ito)
    "#56B4E9",  # sky blue (Okabe-Ito)
    "#000000",  # black (Okabe-Ito)
    "#332288",  # indigo (Tol, muted)
    "#F0E442",  # yellow (Okabe-Ito)
)
#: Most levels that each get their own colour.
COLOURED = len(STRATA_COLORS)
#: Signals and detected steps only (chosen as the red farthest from every colour here).
ACCENT = "#CC0000"
#: Levels other than the highlighted one when there are more than :data:`COLOURED`.
OTHERS = "#c8c8c8"
# Values when there are no strata, and bars and curves that are not a level of a factor:
# a palette colour there would read as that level (the first crew, the first nozzle).
POINT = "#3b3b3b"
LINE = "#b0b0b0"  # thin joining line
CENTER = "#3b3b3b"
LIMIT = "#8a8a8a"
BAND = "#d9d9d9"
BACKGROUND = "#ffffff"
GRID = "#ececec"
#: Legend text of the grey levels when one level is highlighted.
OTHERS_LABEL = "others"


def highlight_index(levels: Sequence[Any], highlight: Any = None) -> int | None:
    """Position of the coloured level among ``levels``, or None when every level has a colour.

    With more than :data:`COLOURED` levels, ``highlight`` (compared as text) picks the
    level to colour, by default the first.

    Raises
    ------
    QCDataError
        When ``highlight`` is not one of ``levels``.

    Examples
    --------
    >>> highlight_index(["A", "B"]), highlight_index([f"day {i}" for i in range(9)], "day 4")
    (None, 4)
    """
    texts = [str(level) for level in levels]
    if highlight is not None and str(highlight) not in texts:
        shown = ", ".join(texts[:10]) + (" ..." if len(texts) > 10 else "")
        raise QCDataError(
            f"highlight: {highlight!r} is not a level here; choose one of {shown} "
            "(or leave it out to colour the first)."
        )
    if len(texts) <= COLOURED:
        return None
    return 0 if highlight is None else texts.index(str(highlight))


def palette_for(levels: Iterable[Any], highlight: Any = None) -> dict[Any, str]:
    """Colour of each stratum level, in the order given.

    The i-th distinct level gets the i-th colour of :data:`STRATA_COLORS`, so the same
    ordered list of levels always gives the same colours. With more levels than
    colours, only the ``highlight`` level (default: the first) is coloured and the rest
    are :data:`OTHERS` grey: no colour is ever used for two levels.

    Parameters
    ----------
    levels : iterable
        The levels in their display order (for a pandas Categorical, its categories).
    highlight : optional
        The level to colour when there are more than :data:`COLOURED` levels.

    Returns
    -------
    dict
        ``{level: "#rrggbb"}``.

    Examples
    --------
    >>> palette_for(["crew A", "crew B"])
    {'crew A': '#0072B2', 'crew B': '#E69F00'}
    >>> sorted(set(palette_for(range(1, 29), highlight=14).values()))
    ['#0072B2', '#c8c8c8']
    """
    distinct = list(dict.fromkeys(levels))
    chosen = highlight_index(distinct, highlight)
    if chosen is None:
        return dict(zip(distinct, STRATA_COLORS, strict=False))
    return {level: STRATA_COLORS[0] if i == chosen else OTHERS for i, level in enumerate(distinct)}


def colors_for(column: Sequence[Any], levels: Sequence[Any], highlight: Any = None) -> np.ndarray:
    """One colour per row: its level's colour, or :data:`POINT` where it is not a level.

    Examples
    --------
    >>> colors_for(["b", None], ["a", "b"]).tolist()
    ['#E69F00', '#3b3b3b']
    """
    palette = palette_for(levels, highlight)
    codes = pd.Index(list(palette), dtype=object).get_indexer(np.asarray(column, dtype=object))
    colours = np.array([*palette.values(), POINT], dtype=object)
    return colours[np.where(codes >= 0, codes, len(palette))]


def color_codes(codes: np.ndarray, levels: Sequence[Any], highlight: Any = None) -> np.ndarray:
    """Row of each level code's colour in the :func:`strata_color_mapper` palette.

    Code i is colour i while every level has one; with more levels, the highlighted
    level's code becomes 0 and the others :data:`COLOURED` (the grey). -1 (no level)
    stays -1 and is drawn in :data:`POINT`.

    Examples
    --------
    >>> color_codes(np.array([0, 2, -1]), ["a", "b", "c"]).tolist()
    [0, 2, -1]
    >>> color_codes(np.array([0, 8, -1]), list("abcdefghi"), highlight="i").tolist()
    [8, 0, -1]
    """
    chosen = highlight_index(levels, highlight)
    if chosen is None:
        return np.asarray(codes, dtype=np.int32)
    out = np.where(codes == chosen, 0, COLOURED)
    return np.where(codes >= 0, out, -1).astype(np.int32)


def strata_color_mapper(name: str) -> LinearColorMapper:
    """Colour of a ``color_code`` column (see :func:`color_codes`); -1 is :data:`POINT`.

    The palette is fixed, so re-colouring for another split factor, or highlighting
    another level, changes only the codes in the data.

    Examples
    --------
    >>> m = strata_color_mapper("demo_colors"); m.palette[-1] == OTHERS
    True
    """
    palette = [*STRATA_COLORS, OTHERS]
    # Edges half a code beyond each end: every whole code falls in the middle of its bin.
    return LinearColorMapper(
        name=name,
        palette=palette,
        low=-0.5,
        high=len(palette) - 0.5,
        low_color=POINT,
        high_color=POINT,
        nan_color=POINT,
    )


def legend_entries(
    levels: Sequence[Any], present: Iterable[Any], highlight: Any = None
) -> tuple[list[str], list[str]]:
    """Labels and colours of a legend: every level present, or the highlighted one and
    "others" when there are more levels than colours. Never more entries than colours,
    so a legend is never cut off.

    Examples
    --------
    >>> legend_entries(["A", "B", "C"], ["C", "A"])
    (['A', 'C'], ['#0072B2', '#009E73'])
    >>> legend_entries(list(range(1, 29)), range(1, 29), highlight=3)
    (['3', 'others'], ['#0072B2', '#c8c8c8'])
    """
    palette = palette_for(levels, highlight)
    shown = set(present)
    labels = [str(level) for level in palette if level in shown]
    colours = [palette[level] for level in palette if level in shown]
    chosen = highlight_index(list(palette), highlight)
    if chosen is None:
        return labels, colours
    top = str(list(palette)[chosen])
    keep = [top] if top in labels else []
    others = [OTHERS_LABEL] if len(labels) > len(keep) else []
    return keep + others, [STRATA_COLORS[0]] * len(keep) + [OTHERS] * len(others)

"""Run rules (Western Electric and Nelson) evaluated over a whole series at once.

Each rule looks at the standardised distance of each plotted point from the centre line,
z = (stat - center) / sigma, where sigma is the standard error of that point. Windows are
counted with cumulative sums, so the cost is a handful of array passes whatever the length.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from functools import cache

import numpy as np

from qcexplore.errors import QCDataError

RULE_SETS: dict[str, tuple[str, ...]] = {
    "western_electric": ("WE1", "WE2", "WE3", "WE4"),
    "nelson": ("N1", "N2", "N3", "N4", "N5", "N6", "N7", "N8"),
}

RULE_TEXT: dict[str, str] = {
    "WE1": "one point beyond the control limits",
    "WE2": "two of three points in a row more than 2 sigma from the centre, on the same side",
    "WE3": "four of five points in a row more than 1 sigma from the centre, on the same side",
    "WE4": "eight points in a row on the same side of the centre line",
    "N1": "one point beyond the control limits",
    "N2": "nine points in a row on the same side of the centre line",
    "N3": "six points in a row steadily increasing or steadily decreasing",
    "N4": "fourteen points in a row alternating up and down",
    "N5": "two of three points in a row more than 2 sigma from the centre, on the same side",
    "N6": "four of five points in a row more than 1 sigma from the centre, on the same side",
    "N7": "fifteen points in a row within 1 sigma of the centre (either side)",
    "N8": "eight points in a row more than 1 sigma from the centre (either side)",
}


def resolve_rules(rules: str | Sequence[str]) -> tuple[str, ...]:
    """Turn a rule-set name, a rule id or a sequence of them into a tuple of rule ids.

    Parameters
    ----------
    rules : str or sequence of str
        ``"western_electric"``, ``"nelson"``, a single id such as ``"N2"``, or a sequence
        of ids and set names (case is ignored; duplicates are dropped, order is kept).

    Returns
    -------
    tuple of str
        Rule ids in the order given.

    Raises
    ------
    QCDataError
        For an unknown name or id.

    Examples
    --------
    >>> resolve_rules("western_electric")
    ('WE1', 'WE2', 'WE3', 'WE4')
    >>> resolve_rules(["n1", "N5"])
    ('N1', 'N5')
    """
    if isinstance(rules, str):
        items = [rules]
    elif isinstance(rules, Iterable):
        items = list(rules)
    else:
        raise QCDataError(
            f"rules={rules!r}: give a rule-set name ('nelson', 'western_electric'), "
            "a rule id such as 'N1', or a sequence of them."
        )
    out: list[str] = []
    for item in items:
        if not isinstance(item, str):
            raise QCDataError(f"rules: {item!r} is not a rule id; use ids such as 'N1' or 'WE2'.")
        key = item.strip()
        if key.lower() in RULE_SETS:
            expanded = RULE_SETS[key.lower()]
        elif key.upper() in RULE_TEXT:
            expanded = (key.upper(),)
        else:
            raise QCDataError(
                f"rules: unknown rule {item!r}; use 'western_electric', 'nelson' or ids from "
                f"{', '.join(RULE_TEXT)}."
            )
        out.extend(r for r in expanded if r not in out)
    return tuple(out)


def _as_column(name: str, value: object, size: int | None) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.ndim > 1:
        raise QCDataError(f"{name}: expected a one-dimensional array, got shape {arr.shape}.")
    if size is not None and arr.ndim == 1 and arr.size != size:
        raise QCDataError(
            f"{name}: has {arr.size} values but stat has {size}; pass one per plotted point."
        )
    return np.broadcast_to(arr, (size,)) if size is not None else arr


def _window(hit: np.ndarray, width: int, pos: np.ndarray, need: int) -> np.ndarray:
    """True where ``hit`` holds here and in at least ``need`` of the last ``width`` points.

    ``pos`` counts the points before each one in its segment. Windows are cut at the start of
    each segment, so a pattern never spans two segments; a cut window still completes an
    m-of-w pattern once it holds m hits (as a run-rule chart started afresh would signal).
    """
    total = np.zeros(hit.size + 1, dtype=np.int64)
    np.cumsum(hit, out=total[1:])
    count = total[1:].copy()
    if hit.size > width:
        count[width:] -= total[1 : hit.size + 1 - width]
    cut = np.flatnonzero(pos < width - 1)
    count[cut] = total[cut + 1] - total[cut - pos[cut]]
    return hit & (count >= need)


def _rule_masks(
    z: np.ndarray, dev: np.ndarray, pos: np.ndarray, ids: tuple[str, ...], sigma_level: float
) -> dict[str, np.ndarray]:
    """Boolean mask per rule id over points grouped by segment (``pos``: place in segment)."""

    @cache
    def steps() -> tuple[np.ndarray, np.ndarray]:
        """Up and down steps of ``dev``: only trend and alternation rules need them."""
        step = np.zeros(z.size)
        step[1:] = np.diff(dev)
        step[pos < 1] = 0.0  # no step across a segment boundary
        return step > 0, step < 0

    @cache
    def size() -> np.ndarray:
        return np.abs(z)

    def run(hit: np.ndarray, width: int) -> np.ndarray:
        return _window(hit, width, pos, width)

    def same_side(level: float, need: int, width: int) -> np.ndarray:
        return _window(z > level, width, pos, need) | _window(z < -level, width, pos, need)

    def alternating(width: int) -> np.ndarray:
        up, down = steps()
        turn = np.zeros(z.size, dtype=bool)
        turn[1:] = (up[1:] & down[:-1]) | (down[1:] & up[:-1])
        turn &= pos >= 2
        return run(turn, width)

    makers = {
        "beyond": lambda: size() > sigma_level,
        "2of3": lambda: same_side(2.0, 2, 3),
        "4of5": lambda: same_side(1.0, 4, 5),
        "side8": lambda: run(z > 0, 8) | run(z < 0, 8),
        "side9": lambda: run(z > 0, 9) | run(z < 0, 9),
        "trend6": lambda: run(steps()[0], 5) | run(steps()[1], 5),
        "alt14": lambda: alternating(12),
        "inside15": lambda: run(size() < 1.0, 15),
        "outside8": lambda: run(size() > 1.0, 8),
    }
    pattern = {
        "WE1": "beyond", "WE2": "2of3", "WE3": "4of5", "WE4": "side8",
        "N1": "beyond", "N2": "side9", "N3": "trend6", "N4": "alt14",
        "N5": "2of3", "N6": "4of5", "N7": "inside15", "N8": "outside8",
    }  # fmt: skip
    made: dict[str, np.ndarray] = {}
    for rule in ids:
        key = pattern[rule]
        if key not in made:
            made[key] = makers[key]()
    return {rule: made[pattern[rule]] for rule in ids}


def fired_rules(
    stat: Sequence[float] | np.ndarray,
    center: float | Sequence[float] | np.ndarray,
    sigma: float | Sequence[float] | np.ndarray,
    rules: str | Sequence[str],
    *,
    sigma_level: float = 3.0,
    segments: Sequence[int] | np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`evaluate_rules` with ``fired`` as an object array of tuples, one per point: a
    table column takes it as it is, where a list of a million tuples would be copied."""
    ids = resolve_rules(rules)
    stat_arr = _as_column("stat", stat, None)
    size = stat_arr.size
    center_arr = _as_column("center", center, size)
    sigma_arr = _as_column("sigma", sigma, size)
    if not (np.isfinite(sigma_level) and sigma_level > 0):
        raise QCDataError(f"sigma_level={sigma_level!r}: must be a positive number, e.g. 3.")
    negative = np.flatnonzero(sigma_arr < 0)
    if negative.size:
        raise QCDataError(
            f"sigma: negative standard errors at positions {negative[:5].tolist()}; "
            "sigma must be the (non-negative) standard error of each point."
        )
    dev_all = stat_arr - center_arr
    with np.errstate(divide="ignore", invalid="ignore"):
        z_all = dev_all / sigma_arr
    keep = np.flatnonzero(~np.isnan(z_all))
    if segments is not None:
        seg = np.asarray(segments)
        if seg.shape != (size,):
            raise QCDataError(
                f"segments: has shape {seg.shape} but stat has {size} values; "
                "pass one segment label per point."
            )
        seg = seg[keep]
        order = np.argsort(seg, kind="stable")
        keep, seg = keep[order], seg[order]
        new_segment = np.zeros(keep.size, dtype=bool)
        new_segment[1:] = seg[1:] != seg[:-1]
        new_segment[:1] = True
        place = np.arange(keep.size)
        pos = place - np.maximum.accumulate(np.where(new_segment, place, 0))
    else:
        pos = np.arange(keep.size)

    every = segments is None and keep.size == size  # points in order, none skipped
    z_kept, dev_kept = (z_all, dev_all) if every else (z_all[keep], dev_all[keep])
    masks = _rule_masks(z_kept, dev_kept, pos, ids, float(sigma_level))
    kept_code = np.zeros(keep.size, dtype=np.int64)
    for bit, rule in enumerate(ids):
        kept_code[masks[rule]] |= 1 << bit
    if every:
        code = kept_code
    else:
        code = np.zeros(size, dtype=np.int64)
        code[keep] = kept_code
    # Map each distinct combination once, then spread it with one gather (no per-point loop).
    counts = np.bincount(code, minlength=1)
    table = np.empty(counts.size, dtype=object)
    for c in np.flatnonzero(counts).tolist():
        table[c] = tuple(rule for bit, rule in enumerate(ids) if c >> bit & 1)
    return code > 0, table[code]


def evaluate_rules(
    stat: Sequence[float] | np.ndarray,
    center: float | Sequence[float] | np.ndarray,
    sigma: float | Sequence[float] | np.ndarray,
    rules: str | Sequence[str],
    *,
    sigma_level: float = 3.0,
    segments: Sequence[int] | np.ndarray | None = None,
) -> tuple[np.ndarray, list[tuple[str, ...]]]:
    """Flag the points of a control chart that complete a run-rule pattern.

    Parameters
    ----------
    stat : array of float
        The plotted points in time order.
    center, sigma : float or array of float
        Centre line and standard error of each plotted point (zone k is center +- k*sigma).
    rules : str or sequence of str
        Rule-set name or rule ids (see :func:`resolve_rules`).
    sigma_level : float, default 3.0
        Limits for the "beyond the limits" rules (WE1, N1) are center +- sigma_level*sigma;
        the zone rules stay at 1 and 2 sigma.
    segments : array of int, optional
        Segment label of each point (e.g. one per stratum of a split chart); each segment's
        points, in their order, are evaluated as a sequence of their own.

    Returns
    -------
    signal : ndarray of bool
        True where at least one rule fires.
    fired : list of tuple of str
        For each point, the ids of the rules that fire there, in the order of ``rules``.

    Notes
    -----
    Points whose stat, center or sigma is NaN are skipped: they never fire and the patterns
    run on across them. The point that completes a pattern is flagged (for "m of w" rules,
    only a point that is itself on the far side of the zone line). A point exactly on the
    centre line breaks a same-side run; an exactly equal neighbour breaks a trend or an
    alternation. Trends and alternation are read on stat - center. Rule definitions follow
    the Western Electric Statistical Quality Control Handbook (1956) and Nelson, Journal of
    Quality Technology 16 (1984) (common practice); each is checked against sequences built
    to have, and to just miss, its pattern, and against a plain per-point loop.

    Examples
    --------
    >>> import numpy as np
    >>> signal, fired = evaluate_rules([0, 0.5, 3.5, 0], 0.0, 1.0, "nelson")
    >>> signal.tolist(), fired[2]
    ([False, False, True, False], ('N1',))
    """
    signal, fired = fired_rules(
        stat, center, sigma, rules, sigma_level=sigma_level, segments=segments
    )
    return signal, fired.tolist()


def evaluate_rows(
    z: np.ndarray, rules: str | Sequence[str], *, sigma_level: float = 3.0
) -> np.ndarray:
    """Which points of each row complete a pattern, every row being a sequence of its own.

    A lean form of :func:`evaluate_rules` for many standardised series of equal length (as in
    a simulation): no NaN handling and no per-point rule lists.

    Parameters
    ----------
    z : 2-D array of float
        Standardised points (stat - center) / sigma, one series per row, no NaN.
    rules : str or sequence of str
        Rule-set name or rule ids.
    sigma_level : float, default 3.0
        Limits of the "beyond the limits" rules, in sigma.

    Returns
    -------
    ndarray of bool, same shape as ``z``
        True where at least one rule fires.

    Notes
    -----
    Agrees with :func:`evaluate_rules` run with one segment per row (checked in the tests).

    Examples
    --------
    >>> evaluate_rows(np.array([[0.0, 3.5], [2.5, 2.5]]), "nelson").tolist()
    [[False, True], [False, True]]
    """
    ids = resolve_rules(rules)
    z = np.asarray(z, dtype=float)
    if z.ndim != 2 or np.isnan(z).any():
        raise QCDataError("z: expected a two-dimensional array without NaN, one series per row.")
    rows, width = z.shape
    pos = np.tile(np.arange(width), rows)
    flat = z.ravel()
    masks = _rule_masks(flat, flat, pos, ids, float(sigma_level))
    hit = np.zeros(flat.size, dtype=bool)
    for mask in masks.values():
        hit |= mask
    return hit.reshape(rows, width)

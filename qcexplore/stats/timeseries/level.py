"""The level of a series and what explains its structure: the mean, the steps found, a ramp
(a drift), each judged by the AR(1) fit of the residuals about it (see the package notes)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from qcexplore.stats.onset import ramp_rss
from qcexplore.stats.results import AR1Fit
from qcexplore.stats.timeseries.ar1 import ar1_fit
from qcexplore.stats.timeseries.series import dot
from qcexplore.stats.timeseries.steps import MIN_SIDE, best_splits

#: The explanations ``time_structure`` can give, in the order they are listed.
EXPLANATIONS = ("steps", "drift", "autocorrelation", "change_or_autocorrelation")


def fitted_ramp(x: np.ndarray) -> tuple[np.ndarray, int, float]:
    """The least-squares ramp a + b max(0, t - onset) over every onset: level, onset, slope.

    Each side of the onset keeps at least ``MIN_SIDE`` points; t is the point's position.
    """
    n = x.size
    t = np.arange(n, dtype=np.float64)
    hinges = np.arange(1, n - 1)
    rss = np.where((hinges >= MIN_SIDE) & (n - 1 - hinges >= MIN_SIDE), ramp_rss(t, x), np.inf)
    onset = int(hinges[np.argmin(rss)])
    rise = np.maximum(0.0, t - onset)
    centred = rise - rise.mean()
    slope = dot(centred, x - x.mean()) / dot(centred, centred)
    return x.mean() + slope * centred, onset, slope


def level_models(
    x: np.ndarray, cuts: np.ndarray, alpha: float
) -> tuple[pd.DataFrame, tuple[str, ...], str, dict[str, tuple[np.ndarray, AR1Fit]], float]:
    """The level models, the explanation, the chosen model, each level and fit, and the p
    value of the autocorrelation that the explanation rests on (see the package notes)."""
    n = x.size
    confirmed = cuts.size > 2
    means = np.add.reduceat(x, cuts[:-1]) / np.diff(cuts)
    models: dict[str, tuple[np.ndarray, int, int]] = {"mean": (np.full(n, x.mean()), 0, -1)}
    if confirmed:
        models["steps"] = (np.repeat(means, np.diff(cuts)), cuts.size - 2, int(cuts[1]))
    else:
        split = int(best_splits(np.cumsum(x - x.mean())[:-1]))
        level = np.r_[np.full(split, x[:split].mean()), np.full(n - split, x[split:].mean())]
        models["single_step"] = (level, 1, split)
    ramp, onset, _ = fitted_ramp(x)
    models["drift"] = (ramp, 1, onset + 1)
    fits: dict[str, tuple[np.ndarray, AR1Fit]] = {}
    rows = []
    for name, (level, changes, position) in models.items():
        # Level parameters (a mean per segment and a position per change; a ramp's
        # intercept, onset and slope), plus phi and the innovation variance.
        fitted = 1 + 2 * changes
        linear = 1 + changes if name != "drift" else 2
        fit = ar1_fit(x - level, fitted=fitted, linear=linear)
        fits[name] = (level, fit)
        parameters = fitted + 2
        rows.append(
            {
                "model": name,
                "changes": changes,
                "position": position,
                "parameters": parameters,
                "phi": fit.phi,
                "se": fit.se,
                "p": fit.p,
                "loglik": fit.loglik,
                "bic": -2.0 * fit.loglik + parameters * math.log(n),
            }
        )
    table = pd.DataFrame(rows)
    bic = dict(zip(table["model"], table["bic"], strict=True))
    if confirmed:
        chosen = "drift" if bic["drift"] < bic["steps"] else "steps"
        p_auto = fits[chosen][1].p
    else:
        chosen = "mean"
        p_auto = float(np.fmax.reduce(table["p"].to_numpy()))
    words = [chosen] if confirmed else []
    if not p_auto >= alpha:  # NaN: phi at the edge of (-1, 1), as correlated as can be
        words.append("autocorrelation")
    elif not confirmed and not fits["mean"][1].p >= alpha:
        words.append("change_or_autocorrelation")
    table = table.assign(chosen=table["model"] == chosen)
    return table, tuple(words), chosen, fits, p_auto


def drift_table(series: pd.DataFrame, level: np.ndarray | None, onset: int) -> pd.DataFrame:
    """``subgroup, position, time, slope, before, after`` of the drift (no row without one)."""
    labels = series["subgroup"].array
    moves = [] if level is None else [(level[-1] - level[-2], level[onset], level[-1])]
    at = [onset + 1 for _ in moves]
    return pd.DataFrame(
        {
            "subgroup": pd.Categorical(
                [labels[i] for i in at], categories=labels.categories, ordered=True
            ),
            "position": np.array(at, dtype=np.int64),
            "time": series["start"].iloc[at].reset_index(drop=True),
            "slope": [float(slope) for slope, _, _ in moves],
            "before": [float(before) for _, before, _ in moves],
            "after": [float(after) for _, _, after in moves],
        }
    )

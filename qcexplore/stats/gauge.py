"""Measurement-system study for crossed parts x operators x repeats.

The same parts are measured several times by each operator. A two-way random-effects
analysis of variance with interaction splits the measurement variation into
repeatability (the same operator measuring the same part again) and reproducibility
(operator to operator, and the operator x part interaction), and sets both against the
part-to-part variation. The variance components come from the expected mean squares of
the balanced two-way random model; the interaction is pooled into repeatability when its
p-value exceeds 0.25 (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from qcexplore.data.coding import is_real_number
from qcexplore.data.validate import finite_column, require_columns
from qcexplore.errors import QCDataError
from qcexplore.stats.results import GaugeResult
from qcexplore.stats.subgroups import group_moments

__all__ = ["gauge_study"]

#: The interaction is pooled into repeatability when its p-value exceeds this (common practice).
POOL_ABOVE = 0.25


def _codes(frame: pd.DataFrame, name: str) -> tuple[np.ndarray, pd.Index]:
    column = frame[name]
    if column.isna().any():
        rows = frame.index[column.isna().to_numpy()][:5].tolist()
        raise QCDataError(f"column {name!r} has missing labels at rows {rows}; fill or drop them.")
    codes, levels = pd.factorize(column, sort=True)
    return codes.astype(np.intp), pd.Index(levels)


def gauge_study(
    frame: pd.DataFrame,
    *,
    part: str,
    operator: str,
    value: str,
    tolerance: float | None = None,
    study_width: float = 6.0,
) -> GaugeResult:
    """Repeatability and reproducibility of a crossed parts x operators x repeats study.

    Every operator measures every part the same number of times (at least twice).
    Mean squares of the two-way analysis with interaction; F for part and operator
    against the interaction mean square and for the interaction against repeatability
    (random model). When the interaction's p-value exceeds 0.25 it is pooled into
    repeatability and part and operator are tested against the pooled mean square.
    Components (expected mean squares, negative estimates set to zero):
    repeatability = MS_E; interaction = (MS_PO - MS_E) / r;
    operator = (MS_O - MS_PO) / (p r); part = (MS_P - MS_PO) / (o r)
    (MS_PO and MS_E replaced by the pooled mean square when pooled).
    ``pct_study_variation`` = 100 sd / sd_total; ``pct_tolerance`` =
    100 ``study_width`` sd / ``tolerance`` (``study_width`` = 6 standard deviations,
    common practice; some sites use 5.15); ``ndc`` = floor(1.41 sd_part / sd_gauge)
    (infinite when the gauge variance estimate is zero).

    Checked against statsmodels ``anova_lm`` (sums of squares, F, p) and a hand
    computation of the expected-mean-square formulas, and against statsmodels MixedLM
    (REML equals these estimates for balanced data with positive components);
    see tests/test_gauge.py.

    Raises QCDataError when a part x operator cell is missing, the cells have different
    numbers of repeats, there are no repeats, or every value is the same.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> f = pd.DataFrame({"part": np.repeat(np.arange(5), 6),
    ...                   "operator": np.tile(np.repeat(["a", "b", "c"], 2), 5)})
    >>> f["mm"] = f["part"] * 0.5 + rng.normal(0, 0.05, len(f))
    >>> g = gauge_study(f, part="part", operator="operator", value="mm", tolerance=4.0)
    >>> g.parts, g.operators, g.repeats, g.ndc >= 5
    (5, 3, 2, True)
    """
    if not isinstance(frame, pd.DataFrame):
        raise QCDataError(
            f"gauge_study: frame is a {type(frame).__name__}; pass a DataFrame with one row "
            "per measurement (part, operator, value columns)."
        )
    require_columns(frame, [part], "part")
    require_columns(frame, [operator], "operator")
    y = finite_column(frame, value, "value")
    if np.ptp(y) == 0.0:
        raise QCDataError(
            f"value column {value!r} has the same value in every row: there is no variation "
            "to split; check the gauge resolution or the column."
        )
    if tolerance is not None and not (is_real_number(tolerance) and tolerance > 0):
        raise QCDataError(f"tolerance={tolerance!r}: give the width of the specification (> 0).")
    p_codes, p_levels = _codes(frame, part)
    o_codes, o_levels = _codes(frame, operator)
    n_p, n_o = len(p_levels), len(o_levels)
    if n_p < 2 or n_o < 2:
        raise QCDataError(
            f"need at least two parts ({part!r}: {n_p}) and two operators ({operator!r}: {n_o})."
        )
    cell = p_codes * n_o + o_codes
    m = group_moments(y, cell, n_p * n_o)
    empty = np.flatnonzero(m.n == 0)
    if empty.size:
        pairs = [(p_levels[c // n_o], o_levels[c % n_o]) for c in empty[:5]]
        raise QCDataError(
            f"the layout is not crossed: no measurements for ({part}, {operator}) = {pairs}; "
            "every operator must measure every part."
        )
    if np.unique(m.n).size != 1:
        c = int(np.argmin(m.n))
        raise QCDataError(
            f"unequal repeats per ({part}, {operator}) cell ({int(m.n.min())} to "
            f"{int(m.n.max())}, e.g. {(p_levels[c // n_o], o_levels[c % n_o])}); "
            "give every operator the same number of measurements of every part."
        )
    r = int(m.n[0])
    if r < 2:
        raise QCDataError(
            f"no repeats: each ({part}, {operator}) cell has one measurement; repeatability "
            "needs each operator to measure each part at least twice."
        )
    cell_mean = m.mean.reshape(n_p, n_o)
    grand = cell_mean.mean()
    part_mean, op_mean = cell_mean.mean(axis=1), cell_mean.mean(axis=0)
    inter = cell_mean - part_mean[:, None] - op_mean[None, :] + grand
    ss = {
        "part": n_o * r * float(np.sum((part_mean - grand) ** 2)),
        "operator": n_p * r * float(np.sum((op_mean - grand) ** 2)),
        "part x operator": r * float(np.sum(inter**2)),
        "repeatability": float(np.sum(m.ss)),
    }
    df = {
        "part": n_p - 1,
        "operator": n_o - 1,
        "part x operator": (n_p - 1) * (n_o - 1),
        "repeatability": n_p * n_o * (r - 1),
    }
    ms = {k: ss[k] / df[k] for k in ss}

    def f_test(num: str, den_ms: float, den_df: int) -> tuple[float, float]:
        if den_ms <= 0:
            return float("nan"), float("nan")
        f = ms[num] / den_ms
        return f, float(stats.f.sf(f, df[num], den_df))

    f_int, p_int = f_test("part x operator", ms["repeatability"], df["repeatability"])
    pooled = bool(p_int > POOL_ABOVE) if np.isfinite(p_int) else False
    notes: list[str] = []
    if pooled:
        e_df = df["part x operator"] + df["repeatability"]
        e_ms = (ss["part x operator"] + ss["repeatability"]) / e_df
        term = "repeatability (interaction pooled)"
        notes.append(
            f"part x operator interaction p = {p_int:.3g} > {POOL_ABOVE}: pooled into "
            "repeatability (common practice)."
        )
        sources = ["part", "operator"]
        rows = [(s, *f_test(s, e_ms, e_df), term) for s in sources]
        rows.append(("repeatability", float("nan"), float("nan"), ""))
        anova_ss = {**ss, "repeatability": ss["part x operator"] + ss["repeatability"]}
        anova_df = {**df, "repeatability": e_df}
        var = {
            "part": (ms["part"] - e_ms) / (n_o * r),
            "operator": (ms["operator"] - e_ms) / (n_p * r),
            "residual": e_ms,
        }
    else:
        po_ms, po_df = ms["part x operator"], df["part x operator"]
        rows = [
            ("part", *f_test("part", po_ms, po_df), "part x operator"),
            ("operator", *f_test("operator", po_ms, po_df), "part x operator"),
            ("part x operator", f_int, p_int, "repeatability"),
            ("repeatability", float("nan"), float("nan"), ""),
        ]
        anova_ss, anova_df = ss, df
        var = {
            "part": (ms["part"] - po_ms) / (n_o * r),
            "operator": (ms["operator"] - po_ms) / (n_p * r),
            "part x operator": (po_ms - ms["repeatability"]) / r,
            "residual": ms["repeatability"],
        }
    anova = pd.DataFrame(
        [
            {
                "source": s,
                "df": anova_df[s],
                "ss": anova_ss[s],
                "ms": anova_ss[s] / anova_df[s],
                "f": f,
                "p": p,
                "error_term": term,
            }
            for s, f, p, term in rows
        ]
    )
    for name, v in var.items():
        if v < 0:
            notes.append(f"the {name} variance estimate came out negative and is set to zero.")
    var = {k: max(v, 0.0) for k, v in var.items()}
    total = sum(var.values())
    components = pd.DataFrame(
        {
            "source": list(var),
            "variance": list(var.values()),
            "sd": np.sqrt(list(var.values())),
            "share": [v / total if total > 0 else np.nan for v in var.values()],
        }
    )
    repro = var["operator"] + var.get("part x operator", 0.0)
    gauge = var["residual"] + repro
    summary_var = {
        "repeatability": var["residual"],
        "reproducibility": repro,
        "operator": var["operator"],
        **({} if pooled else {"part x operator": var["part x operator"]}),
        "gauge": gauge,
        "part": var["part"],
        "total": total,
    }
    sd = {k: math.sqrt(v) for k, v in summary_var.items()}
    sd_total = sd["total"]
    summary = pd.DataFrame(
        {
            "source": list(summary_var),
            "variance": list(summary_var.values()),
            "sd": list(sd.values()),
            "pct_contribution": [
                100 * v / total if total > 0 else np.nan for v in summary_var.values()
            ],
            "pct_study_variation": [
                100 * s / sd_total if sd_total > 0 else np.nan for s in sd.values()
            ],
            "pct_tolerance": [
                100 * study_width * s / tolerance if tolerance else np.nan for s in sd.values()
            ],
        }
    )
    ndc = math.floor(1.41 * sd["part"] / sd["gauge"]) if sd["gauge"] > 0 else float("inf")
    return GaugeResult(
        anova=anova,
        components=components,
        summary=summary,
        ndc=float(ndc),
        pooled=pooled,
        parts=n_p,
        operators=n_o,
        repeats=r,
        tolerance=tolerance,
        study_width=study_width,
        notes=tuple(notes),
    )

"""The entry point: :func:`variation` runs every part on one design and gathers the result."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import pandas as pd

from qcexplore.data.coding import real_number
from qcexplore.errors import QCDataError
from qcexplore.stats.results import VariationResult
from qcexplore.stats.variation.anova import anova_table
from qcexplore.stats.variation.comparisons import compare_levels, marginal_note, spread_table
from qcexplore.stats.variation.components import components_table
from qcexplore.stats.variation.multivari import multivari_rows
from qcexplore.stats.variation.nesting import nesting_table
from qcexplore.stats.variation.offsets import (
    OFFSET_COLUMNS,
    confounding_notes,
    offsets_design,
    offsets_table,
)
from qcexplore.stats.variation.structure import Design, design


def _design_notes(d: Design, measured_by: Sequence[str], compare: bool) -> list[str]:
    """What the reader must know about the design: confounded offsets, associated factors,
    single values."""
    confounded = confounding_notes(d, measured_by)
    notes = [f"offsets of {m!r}: {text}." for m, text in confounded.items()]
    if compare:
        notes += marginal_note(d)
    if d.single:
        notes.append("single values: subgroup-to-subgroup and residual variation coincide.")
    return notes


def variation(
    frame: pd.DataFrame,
    *,
    value: str,
    subgroup: str,
    factors: Sequence[str],
    measured_by: Sequence[str] = (),
    alpha: float = 0.05,
    components: str = "auto",
    level: float = 0.95,
    compare: bool = True,
    nested: Mapping[str, str] | None = None,
    pool_above: float | None = None,
) -> VariationResult:
    """Split the variance of ``value`` into its sources, each tested with the right error.

    Parameters
    ----------
    frame : long table in time order (see the internal data contract in DESIGN.md).
    value, subgroup : column names; ``subgroup`` is the rational subgroup (use
        observation numbers for single values).
    factors : stratification columns; ``measured_by`` the subset that describes sampling
        or measurement (their offsets go to ``offsets``).
    alpha : level of the analysis-of-means decision limits and Tukey intervals.
    components : ``"auto"`` (expected mean squares for balanced data, REML for
        unbalanced data, computed from sufficient statistics so that its cost does not
        grow with the rows; moment estimates with effective group sizes, with a note, when
        the factors have more than a few hundred levels in all), ``"ems"`` or ``"reml"``.
    level : confidence level of the component and offset intervals.
    compare : ``False`` leaves ``comparisons`` and ``spread`` empty (quicker, for
        simulations and first looks).
    nested : ``{factor: parent}`` for factors whose levels belong to one level of another
        factor or (parent = the ``subgroup`` column) of one subgroup, labelled by position
        (casks a, b, c in every batch). Each label is read per level of its parent
        (``parent/label``), the factor is estimated as a variance component nested in the
        parent, the parent is not adjusted for it and is tested against it. A factor that
        changes inside subgroups while each of its levels lies in one subgroup is nested in
        the subgroups without being asked. ``nesting`` lists them, and the factors whose
        labels look nested without being declared so.
    pool_above : the stated rule for pooling the subgroup x factor interaction of a factor
        inside the subgroups into the within-cell error: when the interaction's p-value
        exceeds ``pool_above`` (0.25 is the common-practice rule of gauge studies).
        ``None`` (default) never pools: the subgroups are random, so a factor inside them
        is tested against its interaction with them.

    Returns
    -------
    VariationResult
        ``structure`` (see :func:`design_structure`); ``anova`` with Type II sums of
        squares: between-subgroup factors from subgroup means weighted by size and tested
        against "subgroups within <those factors>"; each within-subgroup factor tested
        against its subgroup x factor interaction ("subgroup x <factor>"; the residual
        itself, named "subgroup x <factor> (residual)", when each subgroup x level cell
        holds one value; "within cells" when it has no interaction df, as for a factor
        nested in the subgroups), the subgroup against the pooled interactions (or its
        nested factors), each interaction against the within-cell error; rows without
        degrees of freedom are left out with a note; ``components`` (random-effects
        variances of an additive model: every factor and the subgroup random, the
        subgroup x factor interaction pooled into the residual; negative estimates set to
        zero with a note; ``lower``/``upper`` are Satterthwaite intervals, chi-square for
        the residual, NaN for REML); per-factor
        ``comparisons``, from the least-squares fit value = block + level: on subgroup
        means in one block (the one-way analysis) for between-subgroup factors, on
        subgroup x level cell means with the subgroup as the block otherwise, so that a
        level missing from some subgroups is compared fairly (the level means are then
        least-squares means, the fitted level averaged over the subgroups, and
        ``notes`` says so); ``tukey`` pairs (Tukey-Kramer on those means, each pair with
        the standard error of its own difference, ``statistic`` the studentized range q);
        ``effect`` rows: level mean minus the size-weighted average of the level means
        (size: subgroups or cells of the level) with its ``se`` and t test; ``anom``
        rows: level mean, ``lower``/``upper`` the decision limits of the analysis of
        means, that average +- h * se, ``signal`` True where the level mean lies outside
        them (False on the other rows), and ``p`` the matching adjusted p-value: when the
        effects are correlated as k equal groups' (equal sizes, every subgroup holding
        every level; up to 100 levels) h is the exact critical value h(alpha; k, df) of
        max |mean_i - grand| / se for independent normal means (see
        ``distributions.anom_cdf``); otherwise the Sidak value
        t(1 - (1 - (1 - alpha)^(1/k)) / 2, df), a documented approximation that is
        slightly conservative, with Sidak-adjusted p; ``kruskal_wallis`` on the units less
        their subgroup's fitted effect); no comparisons for levels that never meet in a
        subgroup (a note says so); each factor's comparisons ignore the other
        factors, and ``notes`` says so when two factors go together (Cramer's V at
        least ``ASSOCIATION_NOTE_V``); ``spread`` (Levene and
        Brown-Forsythe on deviations from the subgroup mean, or on single values; levels
        with fewer than three values left out, NaN with a note when fewer than two levels
        remain);
        ``offsets`` (:func:`measurement_offsets`; a measured_by factor confounded with
        another factor keeps its offsets, whose ``note`` says that they carry the other
        factor's effect too, and ``notes`` repeats it); ``multivari``
        (:func:`multivari_table`); ``nesting`` (``factor, parent, kind, main_variance,
        interaction_variance, residual_variance, p_interaction, note``: see ``nested``).

    Checked against R's documented examples (PlantGrowth one-way F, InsectSprays
    Kruskal-Wallis), Bates' lme4 book values for Dyestuff and Pastes, statsmodels
    ``anova_lm`` (Type II), MixedLM (REML) and OLS (the comparisons with empty subgroup x
    level cells), scipy ``tukey_hsd`` and ``levene``, Nelson's ANOM table and simulation;
    see tests/test_variation.py and tests/test_level_fit.py.

    Examples
    --------
    >>> import numpy as np
    >>> f = pd.DataFrame({"hour": pd.Categorical(np.repeat(np.arange(6), 2), ordered=True),
    ...                   "nozzle": pd.Categorical(["a", "b"] * 6),
    ...                   "w": [10.0, 11.2, 9.8, 11.0, 10.1, 11.3, 9.9, 11.1, 10.2, 11.0,
    ...                         10.0, 11.4]})
    >>> r = variation(f, value="w", subgroup="hour", factors=["nozzle"])
    >>> r.anova[["source", "error_term"]].values.tolist()[:2]
    [['subgroup', 'subgroup x nozzle (residual)'], ['nozzle', 'subgroup x nozzle (residual)']]
    """
    if components not in ("auto", "ems", "reml"):
        raise QCDataError(f"components={components!r}: use 'auto', 'ems' or 'reml'.")
    factors = (factors,) if isinstance(factors, str) else tuple(factors)
    measured_by = (measured_by,) if isinstance(measured_by, str) else tuple(measured_by)
    unknown = [m for m in measured_by if m not in factors]
    if unknown:
        raise QCDataError(
            f"measured_by {unknown} are not among factors {list(factors)}; list them in both."
        )
    if pool_above is not None:
        pool_above = real_number("pool_above", pool_above, lower=0, upper=1, what="a p-value")
    d = design(frame, value, subgroup, factors, nested)
    anova = anova_table(d, pool_above)
    comps, method, comp_notes = components_table(d, anova, components, level)
    comparisons, compare_notes = compare_levels(d, alpha) if compare else ({}, [])
    spread, spread_notes = spread_table(d, d.factors if compare else [])
    offsets = pd.DataFrame(columns=OFFSET_COLUMNS)
    if measured_by:
        od = offsets_design(frame, value, subgroup, measured_by, factors, d, nested)
        errors = anova.errors if od is d else anova_table(od, pool_above).errors
        offsets = offsets_table(od, measured_by, level, errors)
    nesting = nesting_table(d, anova)
    notes = [
        *d.notes, *anova.notes, *comp_notes, *_design_notes(d, measured_by, compare),
        *compare_notes, *spread_notes, *nesting.loc[nesting["kind"] == "probably_nested", "note"],
    ]  # fmt: skip
    return VariationResult(
        structure=d.structure,
        anova=anova.table,
        components=comps,
        comparisons=comparisons,
        spread=spread,
        offsets=offsets,
        multivari=multivari_rows(d.y, d.subgroup, d.factors),
        method=f"Type II sums of squares; components by {method}",
        notes=tuple(notes),
        nesting=nesting,
    )

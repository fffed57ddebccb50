"""Sources of variation: which factor moves the value, tested with the right error term.

The design decides the test. The subgroups are random (another hour, another day). A
factor that changes inside a subgroup (a nozzle, a position) is crossed with time: it is
compared within subgroups (the subgroup as a block) and tested against the subgroup x
factor interaction, so values repeated inside one subgroup x level cell do not count as
independent evidence. A factor that is constant inside each subgroup (the crew on shift,
the raw-material lot) can only be compared through subgroup means, so its error term is
the subgroup-to-subgroup variation within its levels; testing either against single values
would be pseudo-replication. A factor nested in another, or in the subgroups, is estimated
hierarchically. Two factors whose levels fix each other cannot be separated at all, and a
level that goes with a period of time cannot be told from a change in time: the results
say so.

Everything is computed from per-group sufficient statistics (counts, weighted sums,
within-group sums of squares) so that 200,000 rows take a fraction of a second. One module
per job:

========================  ==========================================================
``factors``               the factors as integer codes (the input of every part)
``structure``             how factors relate to subgroups and to each other; the design
``anova``                 Type II sums of squares and the error term of each test
``components``            variance components (expected mean squares, REML)
``comparisons``           Tukey, level effects, analysis of means, Kruskal-Wallis, spread
``distributions``         the ANOM and studentized-range distributions they use
``offsets``               measurement offsets and the values with them taken off
``removal``               :func:`remove_offsets`, the one way a study takes offsets off
``multivari``             the multi-vari table
``nesting``               nested factors, and labels that are probably nested
``timeline``              factor levels against changes in time; offsets safe for a step search
``analysis``              :func:`variation`, the entry point
========================  ==========================================================
"""

from __future__ import annotations

from qcexplore.stats.variation.analysis import variation
from qcexplore.stats.variation.comparisons import ASSOCIATION_NOTE_V
from qcexplore.stats.variation.multivari import multivari_table
from qcexplore.stats.variation.offsets import adjusted_values, measurement_offsets
from qcexplore.stats.variation.removal import remove_offsets
from qcexplore.stats.variation.structure import CONFOUNDING_THRESHOLD, design_structure
from qcexplore.stats.variation.timeline import step_safe_offsets, time_confounding

__all__ = [
    "ASSOCIATION_NOTE_V",
    "CONFOUNDING_THRESHOLD",
    "adjusted_values",
    "design_structure",
    "measurement_offsets",
    "multivari_table",
    "remove_offsets",
    "step_safe_offsets",
    "time_confounding",
    "variation",
]

"""The next study that would settle a finding, sized from the measured variation.

A finding says what the data suggest; a plan says what to collect so that the next data
decide it:

* a measurement offset between two measurement levels (two scales, two crews): measure the
  same units on both (a paired comparison); ``comparison_plan("paired", ...)``;
* a difference between streams (one nozzle, head or cavity against another): units from
  each stream (a two-sample comparison); ``comparison_plan("two_sample", ...)``;
* two factors that always go together (crew and shift): run every level of one with every
  level of the other, and the two effects come apart; ``rotation_plan``;
* a step change: the subgroups where it happened, to ask what changed then;
  ``step_lookup``.

The comparisons are sized for a two-sided t test at ``alpha``: the fewest units whose
power, from the noncentral t distribution, reaches the planned power. Both comparisons
estimate a difference of two single readings, whose sd is sqrt(2) times the sd of one
reading (the repeatability for the same unit read twice, the within-stream sd for two
units), so both have the standard error sqrt(2) sd / sqrt(n); the paired test has n - 1
degrees of freedom, the two-sample test 2n - 2.

One module per job: ``sizing`` (the comparisons and the rotation, sized by the power of a t
test), ``lookup`` (where to look for a step's cause), ``checks`` (their inputs, refused with
a ``QCDataError``) and ``words`` (the numbers in their sentences).
"""

from __future__ import annotations

from qcexplore.stats.plans.lookup import StepLookup, step_lookup
from qcexplore.stats.plans.sizing import (
    ComparisonPlan,
    RotationPlan,
    SampleSize,
    comparison_plan,
    rotation_plan,
)

__all__ = [
    "ComparisonPlan",
    "RotationPlan",
    "SampleSize",
    "StepLookup",
    "comparison_plan",
    "rotation_plan",
    "step_lookup",
]

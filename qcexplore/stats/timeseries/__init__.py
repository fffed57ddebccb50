"""Time structure of a plotted series: autocorrelation, an AR(1) fit, steps and a drift.

The series is one value per subgroup in time order (subgroup means, or single values
for individuals). Everything here is computed from that one column of numbers, in time
and memory linear in its length: the autocovariances by FFT, the AR(1) likelihood from
six sums of the series, the step test and the drift from cumulative sums. One module per
model:

=======================  ============================================================
``series``               the plotted series, and the sums every model is built from
``autocorrelation``      the ACF, PACF and Ljung-Box tables
``ar1``                  the AR(1) fit by exact likelihood, and its innovations
``steps``                change points: the CUSUM step test and binary segmentation
``level``                the level models (mean, steps, a ramp) and the explanation
``analysis``             :func:`time_structure`, the entry point
=======================  ============================================================

The charts to read when the series is autocorrelated are built in
``stats.charts.forecast``.

Which explanation the data support
----------------------------------
A step, a drift and autocorrelation all make neighbouring points alike, so each is judged
with the others allowed for (``time_structure``):

1. steps: binary segmentation with a CUSUM test whose null distribution allows for
   autocorrelation (``change_points``);
2. a drift: when a change is confirmed, the fitted steps are compared with a ramp (a
   constant level, then a straight-line rise or fall from an onset) by the BIC of the
   AR(1) likelihood of the residuals about each; the ramp is the drift when it fits
   better;
3. autocorrelation: the AR(1) fit of the residuals about the level chosen in 1-2 (the
   mean when no change is confirmed). When no change is confirmed, autocorrelation is
   claimed only if the residuals about the best single step and about the best ramp are
   correlated as well: a step the test could not confirm is not read as autocorrelation.

Simulated share of series whose explanation includes autocorrelation (2000 series each,
benchmarks/bench_time.py --calibration): a pure step of 2 or 3 sd at a third of a
white-noise series, 0.032 to 0.054 for N = 30 to 200; a pure ramp, 0.039 to 0.056; an
AR(1) series with phi = 0.5 and no change, 0.42 at N = 30, 0.79 at 50, 0.995 at 100 and
1.000 at 200.
"""

from qcexplore.stats.timeseries.analysis import time_structure
from qcexplore.stats.timeseries.ar1 import ar1_fit, ar1_residuals
from qcexplore.stats.timeseries.autocorrelation import autocorrelation, ljung_box
from qcexplore.stats.timeseries.level import EXPLANATIONS
from qcexplore.stats.timeseries.steps import change_points

__all__ = [
    "EXPLANATIONS",
    "ar1_fit",
    "ar1_residuals",
    "autocorrelation",
    "change_points",
    "ljung_box",
    "time_structure",
]

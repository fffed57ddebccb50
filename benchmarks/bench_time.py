"""time_structure() on long series against statsmodels, and its calibration by simulation.

Run: ``python benchmarks/bench_time.py`` for the timings, ``--calibration`` for the
simulation of the step test and of the explanation (a few minutes; ``--reps`` sets the
series per cell).

Timings (median of 5 runs, each after one warm-up run), on one AR(1) series (phi = 0.5) of
individual values:

* ``time_structure()`` (ACF, PACF and Ljung-Box at the default lags, the exact AR(1) fit
  of the series and of the residuals about each level model, the step test, the best
  ramp, and, as the series is autocorrelated, the residual chart and the moving-centre
  chart) on 1,000,000 values;
* the reference, measured here on the same series: statsmodels ``acf(x, nlags,
  fft=True)`` plus ``AutoReg(x, lags=1).fit()`` (the conditional least-squares AR(1) fit,
  the cheapest AR(1) fit statsmodels has; its exact-likelihood ``ARIMA(1, 0, 0)`` takes
  about a minute at this length), and their ratio (target <= 3);
* the same at 100,000 values, and the peak memory (tracemalloc) at 250,000, 500,000 and
  1,000,000 values with its growth per value (linear in N when the bytes per value stay
  flat).

The calibration (``--calibration``) simulates, with the same seeds each run:

* the share of in-control AR(1) series with any reported step, N = 20 .. 200 and
  phi = 0 .. 0.8, against alpha = 0.05 plus two binomial standard errors, with the share
  the Kolmogorov limit alone would give on the same series (the test before calibration);
* the power on a step of 1 and 2 marginal sd at a third of the series, both ways;
* the level of the AR(1) test on white noise, likelihood ratio against Wald;
* the explanation: how often a pure step with independent noise, a pure ramp with
  independent noise, and an AR(1) series without a change are said to show
  autocorrelation.
"""

from __future__ import annotations

import argparse
import math
import time
import tracemalloc

import numpy as np
import pandas as pd
from _timing import REPEATS, median_seconds
from scipy import signal, stats
from statsmodels.tsa.ar_model import AutoReg
from statsmodels.tsa.stattools import acf

from qcexplore.stats.timeseries import ar1_fit, change_points, time_structure
from qcexplore.stats.timeseries.steps import cusum_statistics


def _ar1(rng: np.random.Generator, phi: float, shape: tuple[int, ...]) -> np.ndarray:
    """Stationary AR(1) series of unit marginal variance along the last axis."""
    e = rng.standard_normal(shape)
    scale = math.sqrt(1.0 - phi * phi)
    return signal.lfilter([scale], [1.0, -phi], e, axis=-1, zi=(1.0 - scale) * e[..., :1])[0]


def _individuals(x: np.ndarray) -> pd.DataFrame:
    return pd.DataFrame({"sg": pd.Categorical(np.arange(x.size), ordered=True), "w": x})


def _speed(n: int) -> None:
    x = _ar1(np.random.default_rng(0), 0.5, (n,))
    frame = _individuals(x)
    result = time_structure(frame, value="w", subgroup="sg")
    lags = len(result.acf)
    np.testing.assert_allclose(result.acf["acf"], acf(x, nlags=lags, fft=True)[1:], atol=1e-10)
    ours = median_seconds(lambda: time_structure(frame, value="w", subgroup="sg"))
    reference = median_seconds(lambda: (acf(x, nlags=lags, fft=True), AutoReg(x, lags=1).fit()))
    print(
        f"N = {n:>9,}: time_structure {ours * 1e3:8.1f} ms; statsmodels acf(fft=True) + "
        f"AutoReg(1) {reference * 1e3:7.1f} ms; ratio {ours / reference:5.2f} "
        f"(target <= 3); explanation {result.explanation}"
    )


def _memory(sizes: tuple[int, ...]) -> None:
    for n in sizes:
        frame = _individuals(_ar1(np.random.default_rng(0), 0.5, (n,)))
        tracemalloc.start()
        time_structure(frame, value="w", subgroup="sg")
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        print(f"N = {n:>9,}: peak {peak / 2**20:7.1f} MiB, {peak / n:6.0f} bytes per value")


def _band(rate: float, reps: int) -> float:
    return rate + 2.0 * math.sqrt(rate * (1.0 - rate) / reps)


def _first_test(x: np.ndarray) -> tuple[bool, bool]:
    """Any step reported (calibrated); and by the Kolmogorov limit alone on the same test."""
    calibrated = bool(change_points(x)[0])
    t = cusum_statistics(x[None, :], np.zeros(4), 0, 0)[0][0]
    return calibrated, bool(stats.kstwobign.sf(t) < 0.05)


def _calibration(reps: int) -> None:
    rng = np.random.default_rng(2026)
    limit = _band(0.05, reps)
    print(f"\nfalse-step rate at alpha = 0.05, {reps} series per cell; band <= {limit:.3f}")
    print("(calibrated test; Kolmogorov limit alone in brackets)")
    print("   N  " + "".join(f"phi = {phi:<12}" for phi in (0.0, 0.3, 0.6, 0.8)))
    for n in (20, 30, 50, 100, 200):
        cells = []
        for phi in (0.0, 0.3, 0.6, 0.8):
            hits = np.array([_first_test(x) for x in _ar1(rng, phi, (reps, n))])
            ours, before = hits.mean(axis=0)
            flag = "" if ours <= limit else "!"
            cells.append(f"{ours:.3f}{flag} ({before:.3f})  ")
        print(f"{n:4d}  " + "".join(cells))
    print("\npower on a step at a third of the series (marginal sd units)")
    for size in (1.0, 2.0):
        for n in (20, 30, 50, 100):
            cells = []
            for phi in (0.0, 0.3):
                x = _ar1(rng, phi, (reps, n))
                x[:, n // 3 :] += size
                ours, before = np.array([_first_test(row) for row in x]).mean(axis=0)
                cells.append(f"phi = {phi}: {ours:.3f} ({before:.3f})  ")
            print(f"step {size:g}, N = {n:3d}: " + "".join(cells))
    print("\nAR(1) test on white noise, share of p < 0.05 (likelihood ratio; Wald in brackets)")
    for n in (20, 30, 50, 100):
        fits = [ar1_fit(rng.standard_normal(n)) for _ in range(reps)]
        ratio = np.mean([f.p < 0.05 for f in fits])
        wald = np.mean([2 * stats.norm.sf(abs(f.phi) / f.se) < 0.05 for f in fits])
        print(f"N = {n:3d}: {ratio:.3f} ({wald:.3f})")
    print("\nshare of series whose explanation includes autocorrelation (alpha = 0.05)")
    for n in (30, 50, 100, 200):
        for case in _CASES:
            words = [
                time_structure(
                    _individuals(_case(rng, case, n)), value="w", subgroup="sg"
                ).explanation
                for _ in range(reps)
            ]
            share = np.mean(["autocorrelation" in w for w in words])
            kinds = pd.Series([" + ".join(w) or "none" for w in words]).value_counts()
            top = ", ".join(f"{k} {v / reps:.2f}" for k, v in kinds.head(3).items())
            print(f"N = {n:3d}, {case:28s}: {share:.3f}   ({top})")
    print(f"(a pure step or ramp with independent noise: at most {limit:.3f} allowed)")


_CASES = (
    "2-sd step, white noise",
    "3-sd step, white noise",
    "ramp of 3 sd, white noise",
    "AR(1) phi = 0.5, no change",
)


def _case(rng: np.random.Generator, case: str, n: int) -> np.ndarray:
    """One series of a case of the explanation check; changes start at a third."""
    if case.startswith("AR(1)"):
        return _ar1(rng, 0.5, (n,))
    t = np.arange(n)
    change = {"2": 2.0 * (t >= n // 3), "3": 3.0 * (t >= n // 3)}.get(
        case[0], 3.0 * np.maximum(0, t - n // 3) / n
    )
    return rng.standard_normal(n) + change


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--calibration", action="store_true", help="run the simulations")
    parser.add_argument("--reps", type=int, default=2000, help="series per simulated cell")
    args = parser.parse_args()
    if args.calibration:
        start = time.perf_counter()
        _calibration(args.reps)
        print(f"simulations: {time.perf_counter() - start:.0f} s")
        return
    print(f"median of {REPEATS} runs")
    for n in (100_000, 1_000_000):
        _speed(n)
    _memory((250_000, 500_000, 1_000_000))


if __name__ == "__main__":
    main()

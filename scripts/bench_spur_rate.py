"""Benchmark of the spur search's false-exclusion rate on clean noise, one run.

Prints, per trace length and averaging, the number of spurs found in clean noise (independent
gamma-distributed points) over the number the design allows (the one-sided normal tail of the
threshold per point, times points and traces): a ratio near or below 1 at every length is the
goal. At 3 sigma the rate is countable in seconds; the 5-sigma rows (the default threshold) need
many traces and mostly print 0 found against a design below 1.

Measured in the run that landed the order-statistic threshold (before -> after, 3 sigma):
9 points 6.4x -> 0.74x, 27 points 2.3x -> 0.66x, 27 points x 10 averages 1.2x -> 0.80x,
101 points 1.4x -> 0.88x, 401 points -> 0.97x.

Run:  python scripts/bench_spur_rate.py [traces]
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy import stats

from noisebench.bench.acquisition import AcquisitionSettings, Trace
from noisebench.science.estimator import _prepare

CASES = [(9, 1), (27, 1), (27, 10), (101, 1), (401, 1)]


def count(points: int, averages: int, traces: int, sigma: float, seed: int) -> tuple[int, float]:
    """(spurs found, spurs the design allows) over ``traces`` clean traces."""
    s = AcquisitionSettings(
        center_hz=1e9,
        span_hz=3e6 * (points - 1),  # points 3 RBW apart: independent
        rbw_hz=1e6,
        averages=averages,
        points=points,
        detector="rms",
        averaging_scale="power",
        detector_samples=1,
    )
    rng = np.random.default_rng(seed)
    freqs = s.frequencies_hz()
    found = 0
    for _ in range(traces):
        p = rng.gamma(averages, 1e-12 / averages, points)
        trace = Trace(freq_hz=freqs, values=10 * np.log10(p / 1e-3), settings=s)
        found += _prepare(trace, reject_spurs=True, threshold_sigma=sigma).spurs_hz.size
    return found, stats.norm.sf(sigma) * points * traces


def main() -> None:
    traces = int(sys.argv[1]) if len(sys.argv) > 1 else 2000
    for sigma, n_traces in ((3.0, traces), (5.0, 10 * traces)):
        print(f"threshold {sigma:g} sigma, {n_traces} traces per row")
        for points, averages in CASES:
            start = time.perf_counter()
            found, design = count(points, averages, n_traces, sigma, 1000 + points + averages)
            ratio = found / design
            print(
                f"  {points:4d} points x {averages:3d} averages: found {found:5d}, design "
                f"{design:9.3f}, ratio {ratio:5.2f}  ({time.perf_counter() - start:.1f} s)"
            )


if __name__ == "__main__":
    main()

"""Benchmark of the noise-density estimator: speed and statistical efficiency, one run.

Prints ratios measured in this run (no thresholds):
  1. host time of ``estimate_densities`` (one preparation per trace) vs a loop of
     ``estimate_density`` calls (one preparation per band), 100 001-point trace, 201 bands;
  2. host time per trace for 1 001 / 10 001 / 100 001 points (spur search included);
  3. variance of the density from log-averaged vs power-averaged traces with the same number of
     averages (sample detector), measured over seeds, against the model's prediction
     (pi^2/6 = 1.645 asymptotically, docs/references.md §6c).

Run:  python scripts/bench_estimator.py
"""

from __future__ import annotations

import math
import time

import numpy as np

from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector, Trace
from noisebench.science.detection import point_model
from noisebench.science.estimator import estimate_densities, estimate_density


def _trace(
    rng: np.random.Generator,
    points: int,
    scale: AveragingScale,
    averages: int,
    detector: Detector = Detector.SAMPLE,
    span_hz: float | None = None,
) -> Trace:
    """Independent points (spacing 10 RBW) with the exact per-point distribution."""
    rbw = 1e4
    span = span_hz if span_hz is not None else 10 * rbw * (points - 1)
    s = AcquisitionSettings(
        center_hz=2e9,
        span_hz=span,
        rbw_hz=rbw,
        detector=detector,
        averaging_scale=scale,
        averages=averages,
        points=points,
        detector_samples=1,
    )
    x = rng.exponential(1.0, (averages, points))
    if scale is AveragingScale.POWER:
        p = x.mean(axis=0)
    elif scale is AveragingScale.LOG_POWER:
        p = np.exp(np.log(x).mean(axis=0))
    else:
        p = np.sqrt(x).mean(axis=0) ** 2
    values = 10 * np.log10(p * 1e-17 * s.enbw_hz / 1e-3)
    return Trace(freq_hz=s.frequencies_hz(), values=values, settings=s)


def bench_vectorised(rng: np.random.Generator) -> None:
    trace = _trace(rng, 100_001, AveragingScale.POWER, 16, span_hz=1e8)
    freqs = np.linspace(2e9 - 4e7, 2e9 + 4e7, 201)
    t0 = time.perf_counter()
    many = estimate_densities(trace, freqs, 1e6)
    t_vec = time.perf_counter() - t0
    t0 = time.perf_counter()
    loop = [estimate_density(trace, freq_hz=float(f), band_hz=1e6) for f in freqs[:20]]
    t_loop = (time.perf_counter() - t0) * len(freqs) / 20
    assert math.isclose(loop[0].density_w_per_hz, many[0].density_w_per_hz, rel_tol=1e-12)
    print(
        f"1. 201 bands of a 100 001-point trace: estimate_densities {t_vec:.3f} s, "
        f"loop of estimate_density {t_loop:.2f} s (extrapolated from 20): "
        f"ratio {t_loop / t_vec:.1f}x"
    )


def bench_sizes(rng: np.random.Generator) -> None:
    parts = []
    for n in (1_001, 10_001, 100_001):
        trace = _trace(rng, n, AveragingScale.LOG_POWER, 16)
        reps = max(1, 20_000 // n)
        t0 = time.perf_counter()
        for _ in range(reps):
            estimate_density(trace)
        parts.append(f"{n} points {1e3 * (time.perf_counter() - t0) / reps:.1f} ms")
    print("2. host time per whole-trace estimate (log scale, spur search on): " + ", ".join(parts))


def bench_efficiency(rng: np.random.Generator) -> None:
    averages, seeds = 32, 1500
    out = {}
    for scale in (AveragingScale.POWER, AveragingScale.LOG_POWER, AveragingScale.VOLTAGE):
        v = [
            estimate_density(_trace(rng, 101, scale, averages)).density_w_per_hz
            for _ in range(seeds)
        ]
        out[scale] = float(np.var(v, ddof=1))
    for scale in (AveragingScale.LOG_POWER, AveragingScale.VOLTAGE):
        model = point_model(Detector.SAMPLE, scale, averages, 1).relative_variance() * averages
        measured = out[scale] / out[AveragingScale.POWER]
        print(
            f"3. variance {scale.value} / power averaging, N={averages}: measured "
            f"{measured:.3f} (chi-square 2-sigma ~ +/-{2 * measured * math.sqrt(4 / seeds):.2f})"
            f", model {model:.3f}"
        )


def main() -> None:
    rng = np.random.default_rng(2024)
    bench_vectorised(rng)
    bench_sizes(rng)
    bench_efficiency(rng)


if __name__ == "__main__":
    main()

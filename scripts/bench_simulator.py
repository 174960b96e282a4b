"""Benchmark of the simulated analyzer's trace synthesis (host CPU time, one run).

Prints, for an averaged 10 001-point trace with 100 averages:
  * averaged traces per second through ``SimAnalyzer.acquire_trace`` for every detector and
    averaging scale, against the target of 20 per second, and against drawing every look
    (``exact_statistics``, the brute-force path the tests compare with);
  * a naive implementation of the same maths with a Python loop over traces (one correlated
    trace at a time, ``np.convolve`` on the fine grid), and the speed-up ratio;
  * sustained single-sweep acquisitions per second through ``SimAnalyzer.acquire_trace`` and
    the simulated-instrument-time to host-time ratio.

Run: ``python scripts/bench_simulator.py [--quick]``. Numbers are ratios measured in this run
on this machine; they are not asserted anywhere.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from noisebench.bench.acquisition import AcquisitionRequest, AveragingScale, Detector
from noisebench.science.filters import RbwFilter
from noisebench.sims.bench import Path, SimulatedBench
from noisebench.sims.noisegen import Axis, _kernel_values, field_kernel


def timed(fn, repeat: int) -> float:
    """Best-of-``repeat`` wall time of ``fn()``, seconds."""
    best = math.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def naive_average(
    rng: np.random.Generator, n_traces: int, n_points: int, spacing_rbw: float, log: bool
) -> np.ndarray:
    """Same statistics as the vectorised SAMPLE detector path, one trace per loop turn, every
    sample drawn (log-power or power averaging)."""
    kernel = field_kernel(RbwFilter(), spacing_rbw, Axis.FREQUENCY)
    step = kernel.grid_step
    lo, hi = kernel.support
    offsets = np.arange(math.ceil(lo / step), math.floor(hi / step) + 1) * step
    taps = _kernel_values(kernel.filt, offsets, Axis.FREQUENCY)
    taps /= np.sqrt(np.sum(taps**2))
    m = int(round(spacing_rbw / step)) if step <= spacing_rbw else 1
    q = 1 if step <= spacing_rbw else int(round(step / spacing_rbw))
    acc = np.zeros(n_points)
    for _ in range(n_traces):
        n_grid = (n_points // q + 1) * m + taps.size
        white = (rng.standard_normal(n_grid) + 1j * rng.standard_normal(n_grid)) / math.sqrt(2)
        if q == 1:
            field = np.convolve(white, taps, mode="valid")[: (n_points - 1) * m + 1 : m]
        else:  # one convolution per phase of the finer point grid
            field = np.empty(n_points, dtype=complex)
            for r in range(q):
                t_r = _kernel_values(kernel.filt, offsets + r * spacing_rbw, Axis.FREQUENCY)
                t_r /= np.sqrt(np.sum(t_r**2))
                conv = np.convolve(white, t_r, mode="valid")
                idx = np.arange(r, n_points, q)
                field[idx] = conv[idx // q]
        power = np.abs(field) ** 2
        acc += np.log(power) if log else power
    return np.exp(acc / n_traces) if log else acc / n_traces


TARGET_TRACES_PER_S = 20.0


def acquisition_benchmarks(repeat: int, brute_force: bool) -> None:
    """Every detector x averaging scale through ``SimAnalyzer.acquire_trace``: averaged traces
    per second against the target, and (``brute_force``) against drawing every look."""
    bench = SimulatedBench.from_scenario("demo-lna", seed=1)
    bench.set_path(Path.DUT)
    an = bench.analyzer
    spans = (("0.1 RBW spacing", 1e9), ("0.75 RBW spacing", 7.5e9))
    print(
        f"averaged 10 001-point traces, 100 averages, RBW 1 MHz, tones in view (host time per "
        f"acquisition; target >= {TARGET_TRACES_PER_S:g} traces/s)"
    )
    print(
        f"  {'detector':<13} {'scale':<9} {'spacing':<16} {'looks':>5} {'ms':>7} "
        f"{'traces/s':>9} {'target':>7} {'ok':>3}"
        + (f" {'every look ms':>13} {'x':>6}" if brute_force else "")
    )
    worst = math.inf
    for det in Detector:
        for scale in AveragingScale:
            for label, span in spans:
                an.exact_statistics = False
                an.configure(
                    AcquisitionRequest(
                        center_hz=3.75e9,
                        span_hz=span,
                        rbw_hz=1e6,
                        points=10_001,
                        averages=100,
                        detector=det,
                        averaging_scale=scale,
                    )
                )
                an.acquire_trace()  # warm the kernel caches
                t = timed(an.acquire_trace, repeat)
                worst = min(worst, 1.0 / t)
                ok = "yes" if 1 / t >= TARGET_TRACES_PER_S else "NO"
                line = (
                    f"  {det.value:<13} {scale.value:<9} {label:<16} "
                    f"{an.settings.detector_samples or 1:>5g} {t * 1e3:7.1f} {1 / t:9.1f} "
                    f"{TARGET_TRACES_PER_S:>7g} {ok:>3}"
                )
                if brute_force:
                    an.exact_statistics = True
                    t_all = timed(an.acquire_trace, 1)
                    line += f" {t_all * 1e3:13.1f} {t_all / t:6.1f}"
                print(line)
    an.exact_statistics = False
    print(
        f"  slowest combination: {worst:.1f} traces/s = {worst / TARGET_TRACES_PER_S:.2f}x the "
        f"target of {TARGET_TRACES_PER_S:g}/s"
    )


def naive_comparison(repeat: int) -> None:
    from noisebench.sims.noisegen import TraceRecipe, generate_trace

    spacing = 0.1
    kernel = field_kernel(RbwFilter(), spacing, Axis.FREQUENCY)
    rng = np.random.default_rng(0)
    ones = np.ones(10_001)
    print(
        "vectorised generator vs a naive per-trace loop (same statistics, SAMPLE detector, "
        "0.1 RBW spacing, 10 001 points, 100 averages):"
    )
    for scale, log in ((AveragingScale.LOG_POWER, True), (AveragingScale.POWER, False)):
        recipe = TraceRecipe(
            n_traces=100,
            n_points=10_001,
            looks=1,
            detector=Detector.SAMPLE,
            averaging_scale=scale,
            kernel=kernel,
        )
        generate_trace(rng, recipe, ones)
        t_vec = timed(lambda r=recipe: generate_trace(rng, r, ones), repeat)
        t_naive = timed(
            lambda lg=log: naive_average(rng, 100, 10_001, spacing, lg), max(1, repeat // 2)
        )
        how = "exact distribution of the average" if log else "mean of 100 looks in one step"
        print(
            f"  {scale.value:<9s} ({how:<35s}) vectorised {t_vec * 1e3:7.1f} ms   "
            f"naive {t_naive * 1e3:7.1f} ms   ratio {t_naive / t_vec:6.1f}x"
        )


def sustained_sweeps(seconds: float) -> None:
    bench = SimulatedBench.from_scenario("demo-lna", seed=2)
    bench.set_path(Path.DUT)
    an = bench.analyzer
    an.configure(
        AcquisitionRequest(
            center_hz=2e9, span_hz=100e6, rbw_hz=1e6, points=1001, averages=1, detector=Detector.RMS
        )
    )
    t_sim0, t0, n = bench.clock.now_s, time.perf_counter(), 0
    while time.perf_counter() - t0 < seconds:
        an.acquire_trace()
        n += 1
    host = time.perf_counter() - t0
    sim = bench.clock.now_s - t_sim0
    print(
        f"sustained single sweeps (1001 points, RMS): {n / host:8.0f} sweeps/s host; "
        f"simulated {sim:.3f} s in {host:.3f} s host ({sim / host:.2f}x real time)"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions")
    parser.add_argument(
        "--no-brute-force", action="store_true", help="skip the every-look comparison"
    )
    args = parser.parse_args()
    repeat = 2 if args.quick else 5
    acquisition_benchmarks(repeat, not args.no_brute_force)
    naive_comparison(repeat)
    sustained_sweeps(1.0 if args.quick else 3.0)


if __name__ == "__main__":
    main()

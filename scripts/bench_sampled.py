"""Benchmark of the sampled-data analyzer: host time per point for a 1 Msample capture, one run.

Prints ratios measured in this run (no thresholds):
  1. host time of one acquisition of 1 048 576 complex samples through the sampled analyzer
     (clipping check, DC removal, IQ-imbalance estimate and correction, Welch, scaling) plus the
     density estimate of one band, vs two physical baselines: one bare FFT over the same
     samples (the least any spectral method must do) and the capture's own duration at the
     sample rate (how much faster than real time the host keeps up);
  2. the same Welch average done naively, one periodogram per segment in a Python loop, vs
     scipy.signal.welch as used;
  3. host time per point for the windows offered (the flat top needs the longest segments).

Samples come from a fixed array (the source's own synthesis is not part of the analyzer's host
time; its cost is printed separately).

Run:  python scripts/bench_sampled.py
"""

from __future__ import annotations

import time

import numpy as np

from noisebench.bench.acquisition import AcquisitionRequest
from noisebench.sampled import SampleBlock, SampledAnalyzer, SourceInfo
from noisebench.sampled.welch import SUPPORTED_WINDOWS, plan_segments
from noisebench.science.estimator import estimate_densities

N = 1 << 20
FS = 2e6
RBW = 10e3
SPAN = 500e3
F0 = 1e9


class _Fixed:
    """A source returning slices of one pre-drawn noise record (no synthesis cost)."""

    def __init__(self, samples: np.ndarray) -> None:
        self.samples = samples
        self.info = SourceInfo(identity="bench", sample_rate_hz=FS, tunable=True, scale_known=True)

    def capture(self, request):
        return SampleBlock(
            samples=self.samples[: request.samples],
            sample_rate_hz=FS,
            center_hz=request.center_hz,
            scale_w_per_fs2=1e-8,
        )

    def close(self) -> None:
        pass


def _best(fn, repeat: int = 5) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main() -> None:
    rng = np.random.default_rng(1)
    t = time.perf_counter()
    x = (rng.standard_normal(N) + 1j * rng.standard_normal(N)) * 0.01
    x = x + 0.02 * np.conj(x) + 0.003  # imbalance and DC, so every correction runs
    synth_s = time.perf_counter() - t
    print(f"synthesis of {N} complex samples (not in the analyzer's time): {synth_s * 1e3:.1f} ms")

    source = _Fixed(x)
    print(f"\n1. one point from a {N}-sample capture, {FS / 1e6:g} MS/s, RBW {RBW / 1e3:g} kHz")
    for window in SUPPORTED_WINDOWS:
        analyzer = SampledAnalyzer(source, window=window)
        plan = plan_segments(FS, RBW, 1, window=window)
        segments = plan.segments_in(N)
        request = AcquisitionRequest(center_hz=F0, span_hz=SPAN, rbw_hz=RBW, averages=segments)
        analyzer.configure(request)

        def point(a=analyzer):
            trace = a.acquire_trace()
            estimate_densities(trace, [F0], 0.95 * SPAN)

        host = _best(point)
        bare = _best(lambda: np.fft.fft(x))
        duration = plan.with_segments(segments).duration_s
        print(
            f"   {window:15s} {segments:6d} segments of {plan.length:4d}: host {host * 1e3:7.1f} ms"
            f" = {host / bare:5.1f} x one bare FFT of the block ({bare * 1e3:.1f} ms),"
            f" {duration / host:6.1f} x faster than real time"
        )

    print("\n2. Welch average: scipy.signal.welch vs a per-segment Python loop (hann)")
    plan = plan_segments(FS, RBW, 1).with_segments(plan_segments(FS, RBW, 1).segments_in(N))
    from scipy import signal

    def scipy_welch():
        signal.welch(
            x[: plan.samples],
            fs=FS,
            window="hann",
            nperseg=plan.length,
            noverlap=plan.overlap,
            detrend=False,
            return_onesided=False,
        )

    w = signal.get_window("hann", plan.length)
    norm = FS * np.sum(w**2)

    def naive():
        acc = np.zeros(plan.length)
        for k in range(plan.segments):
            seg = x[k * plan.step : k * plan.step + plan.length]
            acc += np.abs(np.fft.fft(seg * w)) ** 2
        return acc / plan.segments / norm

    t_scipy, t_naive = _best(scipy_welch), _best(naive, repeat=2)
    print(
        f"   {plan.segments} segments: scipy {t_scipy * 1e3:.1f} ms, loop {t_naive * 1e3:.1f} ms "
        f"-> {t_naive / t_scipy:.1f} x"
    )


if __name__ == "__main__":
    main()

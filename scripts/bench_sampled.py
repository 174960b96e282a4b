"""Benchmark of the sampled-data analyzer: host time per point for a 1 Msample capture, one run.

Prints ratios measured in this run (no thresholds):
  1. host time of one acquisition of 1 048 576 complex samples through the sampled analyzer
     (clipping check, DC removal, IQ-imbalance estimate and correction, Welch, scaling) plus the
     density estimate of one band, vs two physical baselines: one bare FFT over the same
     samples (the least any spectral method must do) and the capture's own duration at the
     sample rate (how much faster than real time the host keeps up);
  2. the same Welch average done naively, one periodogram per segment in a Python loop, vs
     scipy.signal.welch as used;
  3. accuracy over seeds on ideal simulated benches (Y-factor and gain method, live simulated
     sampled receiver, target 0.05 dB): bias, scatter against the stated u, share within 2 u.

Samples come from a fixed array (the source's own synthesis is not part of the analyzer's host
time; its cost is printed separately).

Run:  python scripts/bench_sampled.py [--seeds N] [--first-seed S] [--accuracy-only]
      (section 3 takes about 5 s per seed)
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


def accuracy(seeds: int, first_seed: int = 1) -> None:
    import sys
    from pathlib import Path
    from tempfile import TemporaryDirectory

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
    from _sequencer_helpers import (  # the tests' ideal bench
        IDEAL_INPUT_LOSS_DB,
        IDEAL_OUTPUT_LOSS_DB,
        ideal_sim,
    )

    from noisebench.bench.registry import simulated_session
    from noisebench.running.plan import parse_plan
    from noisebench.running.sequencer import run_plan
    from noisebench.sims.samples import SimSampleReceiver

    freqs = [1e9, 2e9, 3e9, 4e9]
    print(
        f"\n3. accuracy over {seeds} seeds ({first_seed}..{first_seed + seeds - 1}) x "
        f"{len(freqs)} points, ideal bench, target 0.05 dB"
    )
    for method in ("y_factor", "gain"):
        data = {
            "method": method,
            "bench": {"analyzer": {"resource": "sim://demo-lna?receiver=sampled"}},
            "acquisition": {"rbw_hz": 10e3, "span_hz": 400e3, "target_u_nf_db": 0.05},
            "sweep": {"freqs_hz": freqs},
            "corrections": {"input_loss": IDEAL_INPUT_LOSS_DB, "source_temperature_k": 296.0},
            "expect": {"dut_gain_db": 20.0},
            "output": {"plots": False, "report": False},
        }
        if method == "gain":
            data["corrections"]["output_loss"] = IDEAL_OUTPUT_LOSS_DB
            data["bench"]["generator"] = {"resource": "sim", "max_level_dbm": -10.0}
            data["bench"]["noise_source"] = {"drive": "none"}
            data["gain"] = {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 14.0}
        plan = parse_plan(data)
        err, u = [], []
        host = 0.0
        with TemporaryDirectory() as tmp:
            for seed in range(first_seed, first_seed + seeds):
                sim = ideal_sim(seed, ambient_k=296.0, noise_source__physical_temperature_k=296.0)
                analyzer = SampledAnalyzer(SimSampleReceiver(sim, seed=seed))
                session = simulated_session(sim, plan.bench, analyzer=analyzer)
                t = time.process_time()
                record, _ = run_plan(
                    plan, folder=Path(tmp) / f"{method}{seed}", outputs=False, session=session
                )
                host += time.process_time() - t
                truth = sim.truth(freqs)["nf_db"]
                for p, nf in zip(record.points, truth, strict=True):
                    err.append(p.nf_db - nf)
                    u.append(float(p.notes.get("u_nf_db_with_gain", p.u_nf_db)))
        e, uu = np.asarray(err), np.asarray(u)
        u_bias = e.std(ddof=1) / np.sqrt(e.size)
        print(
            f"   {method:8s} bias {e.mean():+.4f} dB (its own u {u_bias:.4f}),"
            f" scatter {e.std(ddof=1):.4f} dB vs stated u {np.sqrt(np.mean(uu**2)):.4f} dB,"
            f" {100 * np.mean(np.abs(e) <= 2 * uu):.1f} % within 2 u;"
            f" host CPU {host / e.size:.2f} s per point"
        )


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--accuracy-only", action="store_true", help="skip sections 1 and 2")
    args = parser.parse_args()
    if not args.accuracy_only:
        main()
    accuracy(args.seeds, args.first_seed)

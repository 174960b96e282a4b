"""Benchmark of the run store, figures and report (prints what one run measured).

    python scripts/bench_results.py [--points 1001] [--folder DIR]

Measures, on this machine and file system: the cost of one durable journal append
(write + fsync) compared with a buffered append without fsync, the time to rebuild a killed run
from its journal, to finish (results.json + results.csv), to draw the figures and to write the
report (wide and narrow figures apart, CPU time), and the sizes of the files. Ratios are from
this one run.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from noisebench.results.plots import NARROW, WIDE, plot_run, render_figures
from noisebench.results.report import write_report
from noisebench.results.store import RunInfo, RunWriter, collect_versions, load_run
from noisebench.science.point import Method, PointResult

T0_K = 290.0


def make_points(n: int) -> list[PointResult]:
    rng = np.random.default_rng(7)
    freqs = np.geomspace(10e6, 6e9, n)
    points = []
    for f in freqs:
        nf = 1.5 + 0.05 * rng.standard_normal()
        points.append(
            PointResult(
                freq_hz=float(f),
                method=Method.Y_FACTOR,
                nf_db=nf,
                te_k=T0_K * (10 ** (nf / 10) - 1),
                u_nf_db=0.04,
                u_te_k=2.8,
                gain_db=20.0,
                u_gain_db=0.03,
                y_db=12.9,
                enr_db=15.0,
                floor_margin_db=17.0,
                averages=32,
                instrument_time_s=0.12,
                densities_w_per_hz={
                    "hot": 1.2e-17,
                    "cold": 6.1e-19,
                    "hot_cal": 1.9e-19,
                    "cold_cal": 6.4e-20,
                },
            )
        )
    return points


def budget(freq_hz: float) -> dict:
    return {
        "freq_hz": freq_hz,
        "contributions": [
            {"name": n, "u": 0.1, "unit": "dB", "sensitivity": 1.0, "contribution_db": 0.05}
            for n in ("ENR", "Tc", "jitter hot", "jitter cold", "linearity")
        ],
        "u_combined_db": 0.12,
        "k": 2.0,
        "U_expanded_db": 0.24,
        "method": "gum",
    }


def buffered_append_s(lines: list[bytes], folder: Path) -> float:
    start = time.perf_counter()
    with open(folder / "buffered.jsonl", "ab") as handle:
        for line in lines:
            handle.write(line)
    return time.perf_counter() - start


def _cpu_s(work) -> float:
    """CPU seconds of this process for ``work()`` (steadier than wall time on a busy machine)."""
    start = time.process_time()
    work()
    return time.process_time() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=1001)
    parser.add_argument("--folder", type=Path, default=None)
    args = parser.parse_args()
    base = args.folder or Path(tempfile.mkdtemp(prefix="nb-bench-"))
    folder = base / "run"
    points = make_points(args.points)
    info = RunInfo(
        run_id="bench", method=Method.Y_FACTOR, dut_id="bench DUT", versions=collect_versions()
    )

    writer = RunWriter.create(folder, info)
    start = time.perf_counter()
    for p in points:
        writer.add_point(p, budget=budget(p.freq_hz))
    durable_s = time.perf_counter() - start
    writer.close()
    lines = [line + b"\n" for line in (folder / "points.jsonl").read_bytes().splitlines()]
    plain_s = buffered_append_s(lines, base)

    start = time.perf_counter()
    record = load_run(folder)
    load_s = time.perf_counter() - start
    writer = RunWriter.resume(folder)
    start = time.perf_counter()
    record = writer.finish()
    finish_s = time.perf_counter() - start
    start = time.perf_counter()
    plots = plot_run(record, folder)
    plots_s = time.perf_counter() - start
    start = time.perf_counter()
    report = write_report(record, folder / "report.html", plots=plots)
    report_s = time.perf_counter() - start

    n = len(points)
    print(f"points: {n}   folder: {folder}")
    print(
        f"durable append (write+fsync): {1e3 * durable_s / n:.3f} ms/point; buffered "
        f"append without fsync: {1e3 * plain_s / n:.4f} ms/point; ratio "
        f"{durable_s / max(plain_s, 1e-12):.0f}x"
    )
    print(f"rebuild from journal: {1e3 * load_s:.1f} ms ({1e3 * load_s / n:.3f} ms/point)")
    print(f"finish (results.json + results.csv): {1e3 * finish_s:.1f} ms")
    print(f"figures ({len(plots)}, wide and narrow): {plots_s:.2f} s; report: {report_s:.2f} s")
    wide_cpu_s, narrow_cpu_s = (
        min(_cpu_s(lambda layout=layout: render_figures(record, layout=layout)) for _ in range(3))
        for layout in (WIDE, NARROW)
    )
    print(
        f"figures, CPU (best of 3): wide {wide_cpu_s:.2f} s, narrow {narrow_cpu_s:.2f} s; both "
        f"{(wide_cpu_s + narrow_cpu_s) / wide_cpu_s:.2f}x the wide alone"
    )
    for name in ("points.jsonl", "results.json", "results.csv"):
        print(f"{name}: {os.path.getsize(folder / name) / 1024:.0f} kB")
    print(
        f"report.html: {os.path.getsize(report) / 1024:.0f} kB "
        f"(figures {sum(os.path.getsize(p) for p in plots) / 1024:.0f} kB as PNG)"
    )


if __name__ == "__main__":
    main()

"""The forecast (``noisebench estimate``) against what the simulated run really used.

For a set of plans on the simulated bench (scenarios of ``noisebench/sims``, both methods,
noise-source settling 0.02-0.5 s, 11-201 points, targets 0.05-0.2 dB) it forecasts the plan
with a model of the very bench the run uses (same scenario, seed and overrides), runs the plan
on that bench in process, and prints forecast / actual for

- instrument time: calibration, measurement and whole run, on the simulator's clock (the
  clock's reading when the measurement phase starts and when the run ends);
- noise-source switches (counted at the simulated source, only real state changes);
- acquisitions (analyzer traces) and trace averages.

A ratio of 1 is a perfect forecast. Usage: ``python scripts/bench_forecast_schedule.py
[--quick]`` (``--quick``: the first four cases only).
"""

from __future__ import annotations

import math
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from noisebench.bench.registry import simulated_session
from noisebench.running.forecast import forecast_plan
from noisebench.running.plan import parse_plan
from noisebench.running.progress import MEASUREMENT, NullProgress
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.forecast_model import SimulatedBenchModel


@dataclass(frozen=True)
class Case:
    scenario: str
    method: str
    settle_s: float
    points: int
    target_db: float
    start_hz: float = 1.0e9
    stop_hz: float = 2.9e9
    time_limit_s: float = 20.0


CASES = [
    Case("demo-lna", "y_factor", 0.05, 11, 0.1),
    Case("demo-lna", "gain", 0.05, 11, 0.1),
    Case("demo-lna", "y_factor", 0.5, 11, 0.2),
    Case("high-nf", "y_factor", 0.02, 11, 0.1),
    Case("demo-lna", "y_factor", 0.05, 51, 0.05),
    Case("demo-lna", "y_factor", 0.2, 51, 0.1),
    Case("attenuator-6db", "y_factor", 0.1, 51, 0.1),
    Case("demo-lna", "gain", 0.05, 51, 0.05),
    Case("high-nf", "gain", 0.05, 51, 0.2),
    Case("demo-lna", "y_factor", 0.05, 201, 0.1),
    Case("demo-lna", "y_factor", 0.02, 201, 0.2),
]


class _PhaseClock(NullProgress):
    """Notes the simulator's clock when the measurement phase starts."""

    def __init__(self, sim: SimulatedBench) -> None:
        self.sim = sim
        self.measurement_at_s: float | None = None

    def phase(self, name: str, total: int) -> None:
        if name == MEASUREMENT:
            self.measurement_at_s = self.sim.clock.now_s


def _plan(case: Case) -> Any:
    # the DUT's gain as its operator would declare it: the path's (no loss corrections in
    # these plans) lowest in the band, so the gain method never reads a negative Te
    truth = _sim(case).truth(np.linspace(case.start_hz, case.stop_hz, 64))
    path = truth["gain_db"] - truth["input_loss_db"] - truth["output_loss_db"]
    gain_db = math.floor(10 * float(np.min(path))) / 10
    data: dict[str, Any] = {
        "method": case.method,
        "dut": {"id": "BENCH"},
        "bench": {
            "analyzer": {"resource": f"sim://{case.scenario}?seed=1", "compression_dbm": -3.0}
        },
        "acquisition": {
            "attenuation_db": 0,
            "rbw_hz": 1e6,
            "span_hz": 10e6,
            "target_u_nf_db": case.target_db,
            "time_limit_s": case.time_limit_s,
        },
        "sweep": {
            "segments": [
                {"start_hz": case.start_hz, "stop_hz": case.stop_hz, "points": case.points}
            ]
        },
        "expect": {"dut_gain_db": gain_db},
    }
    if case.method == "gain":
        data["gain"] = {"source": "constant", "value_db": gain_db}
    return parse_plan(data)


def _sim(case: Case) -> SimulatedBench:
    return SimulatedBench.from_scenario(
        case.scenario, seed=1, noise_source__settle_time_s=case.settle_s
    )


def measure(case: Case, folder: Path) -> dict[str, float]:
    """Forecast and actual figures of one case."""
    plan = _plan(case)
    fc = forecast_plan(plan, model=SimulatedBenchModel(_sim(case)))
    sim = _sim(case)
    counts = {"switches": 0, "traces": 0, "averages": 0}
    set_hot, acquire = sim.noise_source.set_hot, sim.analyzer.acquire_trace

    def counting_set_hot(hot: bool) -> None:
        counts["switches"] += sim.noise_source.is_hot != hot
        set_hot(hot)

    def counting_acquire():
        trace = acquire()
        counts["traces"] += 1
        counts["averages"] += trace.settings.averages
        return trace

    sim.noise_source.set_hot = counting_set_hot  # type: ignore[method-assign]
    sim.analyzer.acquire_trace = counting_acquire  # type: ignore[method-assign]
    progress = _PhaseClock(sim)
    wall = time.monotonic()
    Sequencer(plan, simulated_session(sim, plan.bench), progress=progress).run(folder)
    wall = time.monotonic() - wall
    end = sim.clock.now_s
    cal = progress.measurement_at_s if progress.measurement_at_s is not None else end
    return {
        "cal_fc": fc.calibration_time_s,
        "cal": cal,
        "meas_fc": fc.measurement_time_s,
        "meas": end - cal,
        "total_fc": fc.total_time_s,
        "total": end,
        "switches_fc": float(getattr(fc, "switches", float("nan"))),
        "switches": counts["switches"],
        "traces_fc": float(getattr(fc, "traces", float("nan"))),
        "traces": counts["traces"],
        "averages_fc": float(getattr(fc, "trace_averages", float("nan"))),
        "averages": counts["averages"],
        "wall": wall,
    }


def _ratio(a: float, b: float) -> str:
    if b == 0:
        return "  -  " if a == 0 else " inf "
    if a != a:  # NaN: the forecast has no such figure
        return "  -  "
    return f"{a / b:5.2f}"


def main(quick: bool = False) -> None:
    cases = CASES[:4] if quick else CASES
    print(
        "forecast / actual (simulator's clock); actual instrument time, switches, traces "
        "in brackets"
    )
    print(
        f"{'scenario':>14} {'method':>8} {'settle':>6} {'pts':>4} {'target':>6} | "
        f"{'cal':>5} {'meas':>5} {'total':>5} {'switch':>6} {'traces':>6} {'avgs':>5} | actual"
    )
    totals = []
    with tempfile.TemporaryDirectory() as tmp:
        for i, case in enumerate(cases):
            m = measure(case, Path(tmp) / f"run{i}")
            totals.append(m["total_fc"] / m["total"])
            print(
                f"{case.scenario:>14} {case.method:>8} {case.settle_s:>6.2f} {case.points:>4d} "
                f"{case.target_db:>6.2f} | {_ratio(m['cal_fc'], m['cal'])} "
                f"{_ratio(m['meas_fc'], m['meas'])} {_ratio(m['total_fc'], m['total'])} "
                f"{_ratio(m['switches_fc'], m['switches']):>6} "
                f"{_ratio(m['traces_fc'], m['traces']):>6} "
                f"{_ratio(m['averages_fc'], m['averages'])} | "
                f"[{m['total']:.1f} s, {m['switches']} sw, {m['traces']} tr; "
                f"{m['wall']:.1f} s wall]"
            )
    worst = max(totals, key=lambda r: abs(r - 1))
    print(
        f"whole-run instrument time, forecast / actual: {min(totals):.2f}-{max(totals):.2f} "
        f"(worst {worst:.2f})"
    )


if __name__ == "__main__":
    main(quick="--quick" in sys.argv[1:])

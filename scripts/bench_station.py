"""Benchmark of station mode on the simulated bench (prints what one run measured).

    python scripts/bench_station.py [--units 10] [--folder DIR]

Measures, on this machine: the wall time per unit of the bare sequencer (one plan run per
unit on one open bench, calibration reused) and of a station (the same plus simulated unit
variation, budgets and verdict, results rewrite, report without figures, SQLite row and
summary file), the station's overhead as a ratio, the calibration's share of the first unit,
and the simulated instrument time per unit. Ratios are from this one run.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from noisebench.bench.registry import simulated_session
from noisebench.frontends.station import Station, StationSettings, UnitId
from noisebench.running.calibration import CalibrationStore
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

PLAN = {
    "method": "y_factor",
    "name": "station benchmark",
    "bench": {"analyzer": "sim://demo-lna?seed=1"},
    "acquisition": {
        "rbw_hz": 1e6,
        "span_hz": 4e6,
        "attenuation_db": 0.0,
        "min_averages": 8,
        "max_averages": 400,
        "target_u_nf_db": 0.05,
        "time_limit_s": 10.0,
    },
    "sweep": {"freqs_hz": [1e9, 1.5e9, 2e9, 2.5e9, 3e9]},
    "uncertainty": {"enr_db": 0.1, "cold_temperature_k": 1.0, "linearity_db": 0.02},
    "limits": {"bands": [{"start_hz": 0.9e9, "stop_hz": 3.1e9, "nf_max_db": 1.3}]},
    "output": {"plots": False, "report": True},
}


def bare_sequencer(plan, units: int, folder: Path) -> tuple[float, float, float]:
    """(first unit s, mean later unit s, instrument s per unit) of plain sequencer runs."""
    sim = SimulatedBench.from_scenario("demo-lna", seed=1)
    session, store = simulated_session(sim, plan.bench), CalibrationStore()
    times = []
    clock0 = sim.clock.now_s
    for i in range(units):
        start = time.perf_counter()
        Sequencer(plan, session, calibrations=store).run(folder / f"bare-{i}")
        times.append(time.perf_counter() - start)
    return times[0], sum(times[1:]) / (units - 1), (sim.clock.now_s - clock0) / units


def station(plan, units: int, folder: Path) -> tuple[float, float, float]:
    """The same for a station run (variation, verdict, report, database, summary)."""
    sim = SimulatedBench.from_scenario("demo-lna", seed=1)
    settings = StationSettings(station_id="bench-b", folder=folder / "station")
    with Station(plan, settings, session=simulated_session(sim, plan.bench)) as st:
        summary = st.run([UnitId(f"B{i:03d}") for i in range(units)])
    times = [u.duration_s for u in summary.units]
    instrument = [u.instrument_time_s or 0.0 for u in summary.units]
    return times[0], sum(times[1:]) / (units - 1), sum(instrument) / units


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--units", type=int, default=10)
    parser.add_argument("--folder", type=Path, default=None)
    args = parser.parse_args()
    if args.units < 2:
        parser.error("--units must be at least 2")
    folder = args.folder or Path(tempfile.mkdtemp(prefix="nb-station-bench-"))
    plan = parse_plan(PLAN, base_dir=folder)
    warm = SimulatedBench.from_scenario("demo-lna", seed=2)  # one-time imports, not timed
    Sequencer(plan, simulated_session(warm, plan.bench)).run(folder / "warm-up")
    b_first, b_next, b_instr = bare_sequencer(plan, args.units, folder)
    s_first, s_next, s_instr = station(plan, args.units, folder)
    points = len(plan.points())
    print(f"{args.units} units, {points} points each, demo-lna simulated bench, in {folder}")
    print(
        f"bare sequencer: first unit {b_first:.3f} s (calibration included), later units "
        f"{b_next:.3f} s; instrument time {b_instr:.2f} s per unit"
    )
    print(
        f"station:        first unit {s_first:.3f} s, later units {s_next:.3f} s; "
        f"instrument time {s_instr:.2f} s per unit"
    )
    print(
        f"station / bare (later units): {s_next / b_next:.2f}x host time; "
        f"first / later unit (station): {s_first / s_next:.2f}x"
    )


if __name__ == "__main__":
    main()

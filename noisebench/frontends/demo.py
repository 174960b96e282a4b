"""``noisebench demo``: both methods on the invented ``demo-lna`` simulated bench.

The demo writes what an operator would have on a real bench into the output folder (the noise
source's ENR table, the two cables' loss tables, one plan per method), runs both plans on the
in-process simulated bench and writes results, plots and reports. Because the bench is
simulated, it then compares every point with the simulator's truth. All of it is an invented
scenario: no number describes a real product.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from noisebench.errors import InputError
from noisebench.running.progress import RunProgress

logger = logging.getLogger(__name__)

SCENARIO = "demo-lna"
START_HZ, STOP_HZ = 0.5e9, 6.0e9
MIN_POINTS = 2


@dataclass
class MethodOutcome:
    method: str
    folder: Path
    status: str
    points: int
    nf_error_db: list[float] = field(default_factory=list)
    z_scores: list[float] = field(default_factory=list)
    instrument_time_s: float = 0.0


@dataclass
class DemoSummary:
    outcomes: list[MethodOutcome]

    @property
    def complete(self) -> bool:
        return all(o.status == "complete" for o in self.outcomes)


def _write_loss_table(path: Path, freq_hz: np.ndarray, loss_db: np.ndarray, what: str) -> None:
    lines = [
        f"# description: {what} (invented demo bench)",
        "# temperature_k: 296.0",
        "freq_hz,loss_db,u_loss_db",
    ]
    lines += [
        f"{float(f)!r},{float(loss):.4f},0.02" for f, loss in zip(freq_hz, loss_db, strict=True)
    ]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def _plan_text(method: str, seed: int, points: int) -> str:
    common = f"""\
# Demo plan ({method.replace("_", "-")} method) for the invented simulated bench '{SCENARIO}'.
method = "{method}"
name = "demo {method.replace("_", "-")}"
operator = "demo"
station = "simulated bench"

[dut]
id = "DEMO-LNA-0001"
description = "invented 0.5-6 GHz low-noise amplifier"

[bench]
analyzer = {{ resource = "sim://{SCENARIO}?seed={seed}", compression_dbm = -3.0 }}

[acquisition]
rbw_hz = 1e6
span_hz = 10e6
attenuation_db = 0
target_u_nf_db = 0.05
time_limit_s = 20

[[sweep.segments]]
start_hz = {START_HZ!r}
stop_hz = {STOP_HZ!r}
points = {points}

[expect]
dut_gain_db = 20.0

[output]
folder = "."

[uncertainty]          # standard uncertainties of the influence quantities (ENR: the table's)
cold_temperature_k = 1.0
linearity_db = 0.02
absolute_amplitude_db = 0.15
input_loss_db = 0.02
output_loss_db = 0.02
source_cold_gamma = 0.03
source_hot_gamma = 0.05
dut_input_gamma = 0.10
dut_output_gamma = 0.10
analyzer_input_gamma = 0.08

[limits]
[[limits.bands]]
name = "operating band"
start_hz = 0.5e9
stop_hz = 6.0e9
nf_max_db = 2.2
gain_min_db = 19.0
"""
    if method == "y_factor":
        return (
            common
            + """
[enr]
table = "enr.csv"

[corrections]
input_loss = "input_cable.csv"   # source -> DUT input (not in the calibration path)
"""
        )
    return (
        common.replace("compression_dbm = -3.0 }", 'compression_dbm = -3.0 }\ngenerator = "sim"')
        + """
[gain]
source = "measure"
max_gain_db = 30.0
dut_p1db_out_dbm = 14.0

[corrections]
input_loss = "input_cable.csv"
output_loss = "output_cable.csv"
"""
    )


def write_demo_files(folder: Path, *, points: int, seed: int) -> dict[str, Path]:
    """ENR table, cable loss tables and the two plans of the demo, written into ``folder``."""
    from noisebench.bench.registry import simulated_enr_table
    from noisebench.sims.bench import SimulatedBench

    folder.mkdir(parents=True, exist_ok=True)
    sim = SimulatedBench.from_scenario(SCENARIO, seed=seed)
    simulated_enr_table(sim).to_csv(folder / "enr.csv")
    grid = np.linspace(0.4e9, 6.5e9, 62)
    truth = sim.truth(grid)
    _write_loss_table(
        folder / "input_cable.csv",
        grid,
        truth["input_loss_db"],
        "cable from the noise source to the DUT input",
    )
    _write_loss_table(
        folder / "output_cable.csv",
        grid,
        truth["output_loss_db"],
        "cable from the DUT output to the analyzer",
    )
    plans = {}
    for method in ("y_factor", "gain"):
        path = folder / f"demo_{method}.toml"
        path.write_text(_plan_text(method, seed, points), encoding="utf-8")
        plans[method] = path
    return plans


def fresh_run_folder(out: Path, method: str) -> Path:
    """``out/<method>``, or ``out/<method>-2``, ``-3``, ... when that already holds files: a
    demo run again in the same folder keeps the earlier runs and never needs resuming."""
    candidate, number = out / method, 1
    while candidate.exists() and (not candidate.is_dir() or any(candidate.iterdir())):
        number += 1
        candidate = out / f"{method}-{number}"
    return candidate


def _compare(record: Any, session_truth: Any) -> tuple[list[float], list[float]]:
    freqs = [p.freq_hz for p in record.points]
    if not freqs:
        return [], []
    truth = session_truth(freqs)
    errors, z = [], []
    budgets = {b["freq_hz"]: b for b in record.budgets}
    for point, nf in zip(record.points, truth["nf_db"], strict=True):
        u = (budgets.get(point.freq_hz) or {}).get("u_combined_db") or point.u_nf_db
        errors.append(point.nf_db - float(nf))
        z.append((point.nf_db - float(nf)) / u if u > 0 else math.inf)
    return errors, z


def run_demo(
    out: Path,
    *,
    points: int = 56,
    seed: int = 1,
    stream: TextIO | None = None,
    progress: RunProgress | None = None,
) -> DemoSummary:
    """Write the demo files into ``out``, run both plans, report and compare with the truth.

    ``progress`` shows each run's phases and points as ``noisebench run`` does."""
    from noisebench.bench.registry import open_bench
    from noisebench.results.store import format_summary
    from noisebench.running.plan import load_plan
    from noisebench.running.sequencer import run_plan

    if points < MIN_POINTS:
        raise InputError("--points", f"must be >= {MIN_POINTS} (got {points})")
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError("--out", f"{out} is a file", fix="name a folder for the demo")
    folders = {method: fresh_run_folder(out, method) for method in ("y_factor", "gain")}
    plans = write_demo_files(out, points=points, seed=seed)
    outcomes = []
    for method, plan_path in plans.items():
        plan = load_plan(plan_path)
        session = open_bench(plan.bench)
        try:
            record, folder = run_plan(
                plan, folder=folders[method], session=session, progress=progress
            )
            errors, z = _compare(record, session.sim.truth)
        finally:
            session.close()
        outcome = MethodOutcome(
            method,
            folder,
            record.info.status,
            len(record.points),
            errors,
            z,
            sum(p.instrument_time_s or 0.0 for p in record.points),
        )
        outcomes.append(outcome)
        if stream is not None:
            print(format_summary(record), file=stream)
            print(_truth_line(outcome), file=stream)
            print(f"  files      {folder}", file=stream)
            print("", file=stream)
    if stream is not None:
        print(
            f"demo plans, ENR and cable tables in {out} (run them with `noisebench run`)",
            file=stream,
        )
    return DemoSummary(outcomes)


def _truth_line(o: MethodOutcome) -> str:
    if not o.nf_error_db:
        return "  truth      no points"
    err = np.asarray(o.nf_error_db)
    z = np.asarray(o.z_scores)
    inside = float(np.mean(np.abs(z) <= 2.0)) * 100
    return (
        f"  vs truth   NF error mean {err.mean():+.3f} dB, rms {math.sqrt(np.mean(err**2)):.3f}"
        f" dB, max {np.max(np.abs(err)):.3f} dB; {inside:.0f} % of points within 2 u_c "
        f"of the budget; {o.instrument_time_s:.1f} s instrument time"
    )

"""A seeded run on the simulated bench repeats exactly: no wall-clock time enters the
measuring path of a ``sim://`` bench (settling waits, acquisition times and drift all run on
the simulator's clock, ``noisebench/sims/clock.py``), and no per-process state (string hash
seeds, set order) changes a number. Checked by running the CLI twice in fresh processes with
different ``PYTHONHASHSEED`` values and comparing ``results.csv`` byte for byte.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from _sequencer_helpers import ideal_sim, make_plan

from noisebench.bench.registry import simulated_session
from noisebench.running.plan import load_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
SCENARIOS = Path(__file__).resolve().parent.parent / "noisebench" / "sims" / "scenarios"
CHILD_TIMEOUT_S = 300.0  # a broken child only; a run takes seconds


def _drifting_scenario(folder: Path) -> Path:
    """demo-lna with a receiver gain drift that is linear plus a small curvature: every
    number then depends on when each reading was taken, so a wall-clock read would show."""
    text = (SCENARIOS / "demo-lna.toml").read_text(encoding="utf-8")
    text = text.replace(
        "[analyzer]\n",
        "[analyzer]\ngain_drift_db_per_s = 0.01\ngain_drift_db_per_s2 = -1e-4\n",
        1,
    )
    path = folder / "drifting-lna.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _yfactor_plan(folder: Path) -> Path:
    scenario = _drifting_scenario(folder)
    plan = folder / "plan.toml"
    plan.write_text(
        f"""\
method = "y_factor"
[dut]
id = "REPEAT-1"
[bench]
analyzer = {{ resource = "sim://{scenario.name}?seed=7", compression_dbm = -3.0 }}
[acquisition]
rbw_hz = 1e6
span_hz = 10e6
attenuation_db = 0
target_u_nf_db = 0.1
time_limit_s = 0.4
[switching]
mode = "per_sweep"
[sweep]
freqs_hz = [1e9, 1.5e9, 2e9, 2.5e9, 3e9]
[corrections]
source_temperature_k = "bench"
[expect]
dut_gain_db = 20.0
[output]
plots = false
report = false
""",
        encoding="utf-8",
    )
    return plan


def _converter_plan(folder: Path) -> Path:
    for name in ("downconverter_image_rejection.csv", "input_cable.csv"):
        shutil.copy(EXAMPLES / name, folder / name)
    text = (EXAMPLES / "downconverter_simulated.toml").read_text(encoding="utf-8")
    text = text.replace("points = 9", "points = 3").replace('folder = "runs"', "plots = false")
    plan = folder / "plan.toml"
    plan.write_text(text + "report = false\n", encoding="utf-8")
    return plan


def _run_twice(folder: Path, make) -> tuple[bytes, bytes]:
    plan = make(folder)
    out = []
    for hash_seed in ("1", "2"):
        target = folder / f"run{hash_seed}"
        env = dict(os.environ, PYTHONHASHSEED=hash_seed, MPLBACKEND="Agg")
        done = subprocess.run(
            [sys.executable, "-m", "noisebench.frontends.cli", "run", str(plan), "--out", target],
            env=env,
            cwd=folder,
            capture_output=True,
            text=True,
            timeout=CHILD_TIMEOUT_S,
            check=False,
        )
        assert done.returncode == 0, done.stderr[-2000:]
        out.append((target / "results.csv").read_bytes())
    return out[0], out[1]


@pytest.mark.parametrize("make", [_yfactor_plan, _converter_plan], ids=["drifting", "converter"])
def test_same_seed_gives_the_same_results_csv(tmp_path, make):
    first, second = _run_twice(tmp_path, make)
    assert first.count(b"\n") >= 4  # header and the points
    assert first == second


def test_lo_settling_passes_on_the_simulated_clock_not_the_wall(tmp_path):
    # a simulated bench never sleeps: its settling waits advance its own clock, so instrument
    # time (and any drift) counts them and a run repeats whatever the machine's load. The same
    # seeded run with a 1 s instead of a 50 ms LO settling takes at least 9 x 0.95 s more
    # simulated time (fixed IF: the LO is tuned once per RF point)
    for name in ("downconverter_image_rejection.csv", "input_cable.csv"):
        shutil.copy(EXAMPLES / name, tmp_path / name)
    text = (EXAMPLES / "downconverter_simulated.toml").read_text(encoding="utf-8")
    elapsed = []
    for settle in ("0.05", "1.0"):
        path = tmp_path / f"plan-{settle}.toml"
        path.write_text(text.replace("settle_time_s = 0.05", f"settle_time_s = {settle}"))
        plan = load_plan(path)
        sim = SimulatedBench.from_scenario("demo-downconverter", seed=1)
        record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / settle)
        assert len(record.points) == 9
        elapsed.append(sim.clock.now_s)
    assert elapsed[1] - elapsed[0] >= 9 * 0.95


def test_sequencer_times_an_untimed_trace_on_the_bench_clock(tmp_path):
    # a trace without its acquisition time is charged by the bench's clock when it has one
    plan = make_plan("y_factor", freqs_hz=(1e9, 2e9), target=0.2)
    timed = Sequencer(plan, simulated_session(ideal_sim(3), plan.bench)).run(tmp_path / "a")
    sim = ideal_sim(3)
    original = sim.analyzer.acquire_trace

    def untimed():
        trace = original()
        return trace.model_copy(update={"acquisition_time_s": None})

    sim.analyzer.acquire_trace = untimed
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / "b")
    # the simulated clock advances by exactly the acquisition time the trace would have
    # carried, so the instrument time is the same to rounding (the wall clock would differ)
    for a, b in zip(timed.points, record.points, strict=True):
        assert b.instrument_time_s == pytest.approx(a.instrument_time_s, rel=1e-9)
        assert b.averages == a.averages

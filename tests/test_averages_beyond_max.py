"""A point that needs more averages than the analyzer can do in one trace: several traces,
combined on the averaging scale, reach the target; coverage of the stated uncertainty checked
over seeds against the simulator's truth; the SCPI path no longer sends a refused count."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from _sequencer_helpers import ideal_sim as make_sim
from _sequencer_helpers import make_plan
from scipy.stats import chi2

from noisebench.bench.registry import simulated_enr_table, simulated_session
from noisebench.drivers.profile import load_profile
from noisebench.running.sequencer import run_plan
from noisebench.sims.scpi_server import SimServer

MAX_PER_TRACE = 60
TARGET_U_NF_DB = 0.03  # needs about 230 averages per reading here: ~4x the maximum
SEEDS = range(40)
FREQ_HZ = 2e9


def run_seed(folder: Path, seed: int, scale: str = "power"):
    plan = make_plan(
        "y_factor",
        freqs_hz=(FREQ_HZ,),
        target=TARGET_U_NF_DB,
        acquisition={"rbw_hz": 1e6, "max_averages": 100_000, "averaging_scale": scale},
    )
    sim = make_sim(seed, analyzer__max_averages=MAX_PER_TRACE)
    record, _ = run_plan(
        plan,
        folder=folder / f"run-{scale}-{seed}",
        outputs=False,
        session=simulated_session(sim, plan.bench),
    )
    return record.points[0], float(sim.truth([FREQ_HZ])["nf_db"][0])


def test_the_simulated_analyzer_declares_its_maximum():
    sim = make_sim(1, analyzer__max_averages=MAX_PER_TRACE)
    assert sim.analyzer.max_averages_per_trace == MAX_PER_TRACE


@pytest.mark.parametrize("scale", ["power", "log_power"])
def test_target_reached_and_coverage_over_seeds(tmp_path, scale):
    """40 seeds: every point reaches the target with several traces per reading, and the
    normalised errors z = (NF - truth)/u behave like N(0, 1): sum z^2 inside the chi-square
    99.9 % interval with 40 degrees of freedom, and at least 34 of 40 inside +-2u (binomial
    with p = 0.954: P(X < 34) = 0.3 %)."""
    z = []
    for seed in SEEDS:
        point, truth = run_seed(tmp_path, seed, scale)
        per_reading = point.notes["averages_per_reading"]
        assert min(per_reading.values()) >= 3 * MAX_PER_TRACE, per_reading
        assert point.u_nf_db <= TARGET_U_NF_DB * 1.001
        z.append((point.nf_db - truth) / point.u_nf_db)
    z = np.asarray(z)
    low, high = chi2.ppf(0.0005, len(z)), chi2.ppf(0.9995, len(z))
    assert low < float(np.sum(z**2)) < high, (np.sum(z**2), low, high)
    assert int(np.sum(np.abs(z) <= 2.0)) >= 34
    assert abs(float(np.mean(z))) < 4 / math.sqrt(len(z))  # no bias from the combination


def test_scpi_run_with_a_small_maximum_splits_instead_of_failing(tmp_path):
    """The profile says 60 averages per trace and the instrument refuses more: before, the
    run ended with 'outside the range [1, 60]'; now each reading takes several traces."""
    text = open(load_profile("generic").source, encoding="utf-8").read()
    text = text.replace(
        'set = "AVER:COUN {value:d}"\nget = "AVER:COUN?"\nmin = 1\nmax = 100000',
        'set = "AVER:COUN {value:d}"\nget = "AVER:COUN?"\nmin = 1\nmax = 60',
    )
    profile = tmp_path / "small.toml"
    profile.write_text(text.replace('name = "generic"', 'name = "small"'), encoding="utf-8")
    sim = make_sim(7, analyzer__max_averages=MAX_PER_TRACE)
    with SimServer(sim) as server:
        from _sequencer_helpers import plan_dict

        from noisebench.running.plan import parse_plan

        simulated_enr_table(sim).to_csv(tmp_path / "enr.csv")
        data = plan_dict("y_factor", freqs_hz=(FREQ_HZ,), target=TARGET_U_NF_DB)
        data["bench"] = {
            "analyzer": {"resource": server.resource("analyzer"), "profile": str(profile)},
            "noise_source": {
                "drive": "supply",
                "resource": server.resource("supply"),
                "drive_v": 28.0,
                "settle_time_s": 0.02,
            },
        }
        data["acquisition"] = {**data["acquisition"], "rbw_hz": 1e6, "max_averages": 100_000}
        data["enr"] = {"table": str(tmp_path / "enr.csv")}
        data["corrections"] = {**data["corrections"], "source_temperature_k": 296.0}
        data["output"] = {"plots": False, "report": False}
        plan = parse_plan(data)
        record, _ = run_plan(plan, folder=tmp_path / "run")
        counts = [  # program message units: a compound line holds several
            int(unit.split()[-1])
            for who, line in server.command_log
            if who == "analyzer"
            for unit in (u.strip().lstrip(":") for u in line.split(";"))
            if unit.startswith("AVER:COUN ")
        ]
    assert record.info.status == "complete"
    assert max(counts) <= MAX_PER_TRACE
    assert min(record.points[0].notes["averages_per_reading"].values()) >= 3 * MAX_PER_TRACE


def test_forecast_charges_every_split_trace_its_overhead():
    """The forecast counts the traces a reading takes: hot-cold-cold-hot rounds (two traces
    per state per round: a pilot of min_averages, then one top-up with the rest) and, above
    the analyzer's maximum, each trace split into ceil(averages / maximum) traces; every trace
    pays the analyzer's per-trace time (here the simulated analyzer's settling, 5000 RBW
    periods = 5 ms at 1 MHz). Same plan and bench, maximum 60 vs none: the same averages, and
    the forecast time differs by exactly the extra traces x the per-trace time."""
    from noisebench.running.forecast import forecast_plan
    from noisebench.sims.forecast_model import SimulatedBenchModel

    plan = make_plan(
        "y_factor",
        freqs_hz=(FREQ_HZ,),
        target=TARGET_U_NF_DB,
        acquisition={"rbw_hz": 1e6, "max_averages": 100_000, "min_averages": 4},
    )
    settle = {"analyzer__retune_settle_rbw_periods": 5000.0}
    one = forecast_plan(plan, model=SimulatedBenchModel(make_sim(1, **settle))).points[0]
    split = forecast_plan(
        plan,
        model=SimulatedBenchModel(make_sim(1, analyzer__max_averages=MAX_PER_TRACE, **settle)),
    ).points[0]
    assert split.averages == one.averages and split.limited_by is None
    per_state = one.averages // 2  # hot and cold readings
    top_up_trace = math.ceil((per_state - 4) / 2)  # the top-up's two traces per state
    assert top_up_trace > MAX_PER_TRACE  # the case: the top-up's traces are split
    extra_traces = 2 * 2 * (math.ceil(top_up_trace / MAX_PER_TRACE) - 1)  # 2 states x 2 traces
    per_trace_s = 5000.0 / 1e6
    assert split.time_s - one.time_s == pytest.approx(extra_traces * per_trace_s, rel=1e-9)
    assert extra_traces >= 4


def test_forecast_takes_the_maximum_from_the_profile_for_real_instruments(tmp_path):
    """Without a bench model (a real analyzer) the maximum comes from the plan's profile."""
    from noisebench.running.forecast import _max_per_trace

    text = open(load_profile("generic").source, encoding="utf-8").read()
    profile = tmp_path / "small.toml"
    profile.write_text(
        text.replace("min = 1\nmax = 100000", "min = 1\nmax = 60").replace(
            'name = "generic"', 'name = "small"'
        ),
        encoding="utf-8",
    )
    bench = {"analyzer": {"resource": "TCPIP0::127.0.0.1::5025::SOCKET", "profile": str(profile)}}
    from _sequencer_helpers import plan_dict

    from noisebench.running.plan import parse_plan

    plan = parse_plan(plan_dict("y_factor", bench=bench), check_files=False)
    assert _max_per_trace(plan, None) == 60

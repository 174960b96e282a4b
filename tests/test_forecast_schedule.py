"""The forecast (``running/forecast.py``, ``noisebench estimate``) models the schedule the
sequencer runs: sweep-level Y-factor blocks (two switches per block, a pilot round of every
group, one block per round here) and the per-group rounds where the sequencer still uses them.
Each check runs the plan on the simulated bench and compares the forecast with what the run
used on the simulator's own clock (instrument time, noise-source switches, acquisitions).
Tolerances: the sequencer plans from noisy u estimates (a seed may take one round more than
the forecast: two switches, a round's time), so counts are compared within one round and
times within a factor 0.75..1.35 (common practice for a run-time forecast)."""

from __future__ import annotations

import pytest
from _sequencer_helpers import ideal_sim, make_plan

from noisebench.bench.registry import simulated_session
from noisebench.running.forecast import forecast_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.forecast_model import SimulatedBenchModel

FREQS = (1.0e9, 1.5e9, 2.0e9, 2.5e9)


def _actual(plan, sim, folder):
    """(instrument seconds on the simulator's clock, switches, acquisitions) of a run."""
    counts = {"switches": 0, "traces": 0}
    set_hot, acquire = sim.noise_source.set_hot, sim.analyzer.acquire_trace

    def counting_set_hot(hot: bool) -> None:
        counts["switches"] += sim.noise_source.is_hot != hot
        set_hot(hot)

    def counting_acquire():
        counts["traces"] += 1
        return acquire()

    sim.noise_source.set_hot = counting_set_hot
    sim.analyzer.acquire_trace = counting_acquire
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(folder)
    assert record.info.status == "complete" and len(record.points) == len(plan.points())
    return sim.clock.now_s, counts["switches"], counts["traces"]


@pytest.mark.parametrize(
    ("method", "mode", "settle_s"),
    [("y_factor", "per_sweep", 0.3), ("y_factor", "per_group", 0.3), ("gain", "auto", 0.3)],
    ids=["sweep", "group", "gain"],
)
def test_forecast_counts_the_switches_and_time_the_run_uses(tmp_path, method, mode, settle_s):
    plan = make_plan(method, freqs_hz=FREQS, target=0.1, switching={"mode": mode})
    overrides = {"noise_source__settle_time_s": settle_s}
    forecast = forecast_plan(plan, model=SimulatedBenchModel(ideal_sim(4, **overrides)))
    seconds, switches, traces = _actual(plan, ideal_sim(4, **overrides), tmp_path / mode)
    assert forecast.schedule == ("per_group" if method == "gain" else mode)
    if method == "gain":  # the source stays cold: group by group, no switch
        assert forecast.switches == switches == 0 and forecast.settle_time_s == 0.0
    # per sweep: two switches per block, a pilot round and one planned round per phase, one
    # block each (4 groups far below max_block_s): 8; per group: each group's calibration and
    # measurement switch 3 times in the first round, 2 in each further one, once at the end
    assert abs(forecast.switches - switches) <= 2, (forecast.switches, switches)
    assert 0.75 < forecast.total_time_s / seconds < 1.35, (forecast.total_time_s, seconds)
    assert 0.75 < forecast.traces / traces < 1.35, (forecast.traces, traces)
    if mode == "per_sweep":
        assert forecast.switches == 8
        # the settling the forecast charges is its switches' (before: three to five per group
        # and phase, several times what the run spent)
        assert forecast.settle_time_s == pytest.approx(8 * settle_s)


def test_forecast_warns_of_calibrations_the_time_limit_leaves_without_a_usable_y(tmp_path):
    """10 dB of input attenuation and a 100 kHz band: the system calibration's Y - 1 at 5.5
    and 6 GHz is a few tenths of its u per average, so within 5 s per point it never reaches
    4 u(Y) (the refusal rule, ``Y_SIGNIFICANCE_SIGMAS``) and the run refuses both; 1 GHz is
    fine. The forecast names them and the time limit that lets them through; with that limit
    the run measures all three."""
    import re

    def plan_with(limit_s: float):
        acquisition = {"attenuation_db": 10, "rbw_hz": 30e3, "span_hz": 100e3}
        return make_plan(
            "y_factor",
            freqs_hz=(1e9, 5.5e9, 6e9),
            target=0.05,
            acquisition={**acquisition, "time_limit_s": limit_s},
        )

    tight = plan_with(5.0)
    forecast = forecast_plan(tight, model=SimulatedBenchModel(ideal_sim(2)))
    assert [p.limited_by == "weak Y" for p in forecast.points] == [False, True, True]
    (warning,) = forecast.warnings
    assert warning.startswith("2 point(s) (first 5.5 GHz) will be refused")
    assert "warning: 2 point(s)" in forecast.format()
    record = Sequencer(tight, simulated_session(ideal_sim(2), tight.bench)).run(tmp_path / "a")
    skipped = record.info.notes["skipped_points"]
    assert sorted((s["freq_hz"], s["stage"]) for s in skipped) == [
        (5.5e9, "calibration"),
        (6e9, "calibration"),
    ]
    minutes, seconds = re.search(r"time_limit_s to about (\d+) min (\d+) s", warning).groups()
    suggested = 60 * int(minutes) + int(seconds)
    assert 60 < suggested < 600  # a real change, not a token one
    enough = plan_with(float(suggested))
    assert forecast_plan(enough, model=SimulatedBenchModel(ideal_sim(2))).warnings == []
    record = Sequencer(enough, simulated_session(ideal_sim(2), enough.bench)).run(tmp_path / "b")
    assert record.info.notes.get("skipped_points", []) == [] and len(record.points) == 3

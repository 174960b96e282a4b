"""The sequencer on the in-process simulated bench: accuracy, calibration reuse, adaptive
averaging, time limits, safety refusals, Ctrl-C and instrument faults."""

from __future__ import annotations

import math

import numpy as np
import pytest
from _sequencer_helpers import (
    IDEAL_INPUT_LOSS_DB,
    ideal_session,
    ideal_sim,
    make_plan,
    plan_dict,
)

from noisebench.bench.registry import Connection, simulated_session
from noisebench.errors import CommunicationError, SafetyError
from noisebench.results.store import load_run
from noisebench.running.calibration import CalibrationStore
from noisebench.running.groups import plan_groups
from noisebench.running.plan import parse_plan
from noisebench.running.safety import (
    InputLimits,
    check_input_power,
    hot_source_temperature_k,
    total_noise_power_dbm,
)
from noisebench.running.sequencer import Sequencer
from noisebench.science.averaging import averages_for_target, combine_densities
from noisebench.science.density import NoiseDensity
from noisebench.science.point import PointFlag


def _run(plan, session, tmp_path, name="run", **kwargs):
    seq = Sequencer(plan, session, **kwargs)
    return seq, seq.run(tmp_path / name)


def _z_scores(record, sim):
    truth = sim.truth([p.freq_hz for p in record.points])
    return np.array(
        [(p.nf_db - nf) / p.u_nf_db for p, nf in zip(record.points, truth["nf_db"], strict=True)]
    )


# --------------------------------------------------------------------------- accuracy


def test_y_factor_recovers_truth_within_stated_uncertainty(tmp_path):
    plan = make_plan("y_factor", freqs_hz=[1e9, 2e9, 3e9, 4e9, 5e9])
    # seed 5: seed 3's calibration at 5 GHz reads the gain 4.2 u low with the drift monitor's
    # split readings (a tail draw shared by every measurement after it). Over seeds 10-29
    # (100 points, monitors split from 2 averages) the gain z-scores have sd 1.02, largest
    # |z| 2.7; the NF z-scores sd 0.96, largest |z| 2.6.
    session = ideal_session(plan, seed=5)
    _, record = _run(plan, session, tmp_path)
    assert record.info.status == "complete"
    z = _z_scores(record, session.sim)
    # u is a standard uncertainty: |z| < 4 for each point (false alarm ~6e-5 per point)
    assert np.all(np.abs(z) < 4.0), z
    truth = session.sim.truth([p.freq_hz for p in record.points])
    for point, gain in zip(record.points, truth["gain_db"], strict=True):
        assert point.gain_db == pytest.approx(gain, abs=4 * point.u_gain_db)
        assert point.u_nf_db <= 0.1
        assert point.averages > 0 and point.instrument_time_s > 0


def test_gain_method_recovers_truth_within_stated_uncertainty(tmp_path):
    plan = make_plan("gain", freqs_hz=[1e9, 2e9, 3e9, 4e9, 5e9])
    session = ideal_session(plan, seed=4)
    _, record = _run(plan, session, tmp_path)
    z = _z_scores(record, session.sim)
    assert np.all(np.abs(z) < 4.0), z
    assert all(p.gain_db == pytest.approx(25.0, abs=1e-9) for p in record.points)
    # the input loss is de-embedded: without it the NF would read ~0.3 dB high
    truth = session.sim.truth([p.freq_hz for p in record.points])
    assert np.mean([p.nf_db for p in record.points]) == pytest.approx(
        np.mean(truth["nf_db"]), abs=IDEAL_INPUT_LOSS_DB / 3
    )


def test_both_methods_agree_on_the_same_bench(tmp_path):
    freqs = [1.5e9, 2.5e9, 3.5e9]
    results = {}
    for method, seed in (("y_factor", 11), ("gain", 12)):
        plan = make_plan(method, freqs_hz=freqs)
        _, results[method] = _run(plan, ideal_session(plan, seed=seed), tmp_path, method)
    for y, g in zip(results["y_factor"].points, results["gain"].points, strict=True):
        assert abs(y.nf_db - g.nf_db) < 4 * math.hypot(y.u_nf_db, g.u_nf_db)


# --------------------------------------------------------------------------- calibration


def test_calibration_reused_while_settings_match_then_measured_again(tmp_path):
    store = CalibrationStore()
    plan = make_plan("y_factor", freqs_hz=[2e9, 3e9])
    session = ideal_session(plan)
    first, _ = _run(plan, session, tmp_path, "a", calibrations=store)
    assert first.calibrations_measured == 2
    assert Connection.THROUGH in session.moves
    moves_before = len(session.moves)

    second, record = _run(plan, session, tmp_path, "b", calibrations=store)
    assert second.calibrations_measured == 0
    assert Connection.THROUGH not in session.moves[moves_before:]
    assert record.info.status == "complete"

    wider = make_plan("y_factor", freqs_hz=[2e9, 3e9], acquisition={"rbw_hz": 2e6, "span_hz": 20e6})
    third, _ = _run(wider, session, tmp_path, "c", calibrations=store)
    assert third.calibrations_measured == 2  # RBW changed: the stored calibration is invalid
    assert session.moves[-2:] == [Connection.THROUGH, Connection.DUT]


def test_calibration_expires_after_max_age(tmp_path):
    store = CalibrationStore()
    plan = make_plan("gain", freqs_hz=[2e9], calibration={"max_age_s": 3600})
    session = ideal_session(plan)
    _run(plan, session, tmp_path, "a", calibrations=store)
    entry = store.entries[0]
    # on the same simulated bench the age is counted on its clock: an hour and a second of
    # simulated time since the calibration
    assert entry.measured_at_clock is not None
    clock_id, at_s = entry.measured_at_clock
    store.entries[0] = entry.model_copy(update={"measured_at_clock": (clock_id, at_s - 3601)})
    again, _ = _run(plan, session, tmp_path, "b", calibrations=store)
    assert again.calibrations_measured == 1
    # on another bench session (another clock) the wall time counts: a year ago
    store = CalibrationStore([entry])
    store.entries[0] = entry.model_copy(
        update={"measured_at": entry.measured_at.replace(year=entry.measured_at.year - 1)}
    )
    again, _ = _run(plan, ideal_session(plan), tmp_path, "c", calibrations=store)
    assert again.calibrations_measured == 1


def test_calibration_is_stored_with_settings_and_time(tmp_path):
    plan = make_plan("gain", freqs_hz=[2e9, 3e9])
    _, record = _run(plan, ideal_session(plan), tmp_path)
    stored = CalibrationStore.from_dict(record.info.calibration)
    assert len(stored.entries) == 2
    entry = stored.entries[0]
    assert entry.kind.value == "floor"
    assert entry.settings.rbw_hz == 1e6 and entry.settings.attenuation_db == 0
    assert entry.measured_at.tzinfo is not None
    assert entry.densities["floor"][0].freq_hz == 2e9


# --------------------------------------------------------------------------- averaging


def test_adaptive_averaging_stops_at_the_target_and_scales_as_radiometer(tmp_path):
    averages = {}
    for target in (0.1, 0.05):
        plan = make_plan("gain", freqs_hz=[2e9, 3e9], target=target)
        _, record = _run(plan, ideal_session(plan, seed=5), tmp_path, f"t{target}")
        for p in record.points:
            assert p.u_nf_db <= target
            assert p.u_nf_db > 0.7 * target  # stopped near the target, not far beyond
            assert p.notes["stopped_by"] == "target"
            assert PointFlag.TIME_LIMIT not in p.flags
        averages[target] = np.array([p.averages for p in record.points])
    # radiometer equation: u ~ 1/sqrt(averages) -> halving u takes 4x the averages; the
    # ratio's spread comes from the 0.7..1.0 band of the stopping point (0.49..2.0 per side)
    ratio = averages[0.05] / averages[0.1]
    assert np.all((ratio > 4 * 0.49) & (ratio < 4 / 0.49)), ratio


def test_time_limit_flags_points_and_respects_the_budget(tmp_path):
    plan = make_plan(
        "y_factor", freqs_hz=[2e9, 4e9], target=0.005, acquisition={"time_limit_s": 0.5}
    )
    _, record = _run(plan, ideal_session(plan), tmp_path)
    for p in record.points:
        assert PointFlag.TIME_LIMIT in p.flags
        assert p.notes["stopped_by"] in ("time_limit", "calibration")
        assert p.u_nf_db > 0.005
        assert p.instrument_time_s <= 0.5 + 1e-9
        assert p.notes["calibration_time_s"] <= 0.5 + 1e-9


def test_max_averages_stops_without_time_flag(tmp_path):
    plan = make_plan(
        "gain", freqs_hz=[2e9], target=0.005, acquisition={"max_averages": 40, "min_averages": 4}
    )
    _, record = _run(plan, ideal_session(plan), tmp_path)
    (p,) = record.points
    assert p.notes["stopped_by"] == "max_averages"
    assert p.averages <= 40
    assert PointFlag.TIME_LIMIT not in p.flags


def test_hot_cold_rounds_are_symmetric_and_recorded(tmp_path):
    plan = make_plan("y_factor", freqs_hz=[2e9])
    _, record = _run(plan, ideal_session(plan), tmp_path)
    (p,) = record.points
    readings = p.notes["readings"]
    # hot-cold-cold-hot rounds: two hot and two cold traces per round (plus one cold look
    # before the very first hot switch, for the safety check)
    assert readings["hot"] % 2 == 0
    assert readings["cold"] == readings["hot"] + 1
    assert p.averages == sum(p.notes["averages_per_reading"].values())


def test_points_sharing_a_trace_are_grouped():
    plan = make_plan(
        "gain",
        freqs_hz=[2.000e9, 2.010e9, 2.020e9, 3e9],
        acquisition={"max_trace_span_hz": 50e6, "span_hz": 10e6},
    )
    groups = plan_groups(plan.points())
    assert [g.freqs_hz for g in groups] == [(2.000e9, 2.010e9, 2.020e9), (3e9,)]
    assert groups[0].span_hz == pytest.approx(20e6 + 10e6 * 1.02)
    assert groups[0].center_hz == pytest.approx(2.010e9)


def test_grouped_points_measure_from_shared_traces(tmp_path):
    plan = make_plan(
        "gain", freqs_hz=[2.000e9, 2.010e9, 2.020e9], acquisition={"max_trace_span_hz": 50e6}
    )
    session = ideal_session(plan)
    _, record = _run(plan, session, tmp_path)
    assert {p.notes["group"] for p in record.points} == {0}
    assert sum(p.instrument_time_s for p in record.points) == pytest.approx(
        record.points[0].instrument_time_s * 3
    )
    assert np.all(np.abs(_z_scores(record, session.sim)) < 4.0)


# --------------------------------------------------------------------------- safety


def test_hot_switch_refused_when_the_analyzer_would_compress(tmp_path):
    plan = make_plan(
        "y_factor", freqs_hz=[2e9], safety={"dut_max_gain_db": 60.0, "dut_bandwidth_hz": 20e9}
    )
    session = ideal_session(plan)
    seq = Sequencer(plan, session)
    with pytest.raises(SafetyError, match="below its compression"):
        seq.run(tmp_path / "run")
    assert not session.sim.noise_source.is_hot
    assert load_run(tmp_path / "run").info.status == "failed"


def test_generator_refused_above_the_dut_input_limit(tmp_path):
    data = plan_dict("gain", freqs_hz=[2e9], safety={"dut_max_input_dbm": -80.0})
    data["bench"]["generator"] = {"resource": "sim", "max_level_dbm": 0.0}
    data["gain"] = {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 14.0}
    plan = parse_plan(data)
    session = ideal_session(plan)
    with pytest.raises(SafetyError):
        Sequencer(plan, session).run(tmp_path / "run")
    assert not session.sim.generator.output_on


def test_pre_switch_power_estimate_matches_reference_example():
    # docs/references.md §11: ENR 15 dB source, G = 30 dB over 10 GHz -> about -28.76 dBm
    # (a DUT with NF 2 dB, Te = 290 (10^0.2 - 1) K, recomputed here)
    th = hot_source_temperature_k(15.0, 290.0)
    te = 290.0 * (10**0.2 - 1)
    assert total_noise_power_dbm(th, 30.0, 10e9, dut_te_k=te) == pytest.approx(-28.77, abs=0.01)
    limits = InputLimits(max_input_dbm=20.0, compression_dbm=-10.0)
    check = check_input_power(-28.8, limits, what="test", attenuation_db=0)
    assert check.backoff_db == pytest.approx(18.8) and check.caution
    with pytest.raises(SafetyError):
        check_input_power(-15.0, limits, what="test")  # only 5 dB below compression
    assert not check_input_power(-15.0, limits, what="test", attenuation_db=20).caution


# --------------------------------------------------------------------------- interruption


def test_ctrl_c_keeps_finished_points_and_leaves_the_bench_safe(tmp_path):
    plan = make_plan("y_factor", freqs_hz=[1e9, 2e9, 3e9, 4e9])
    session = ideal_session(plan)
    seen = []

    def stop_after_two(point):
        seen.append(point.freq_hz)
        if len(seen) == 2:
            raise KeyboardInterrupt

    seq = Sequencer(plan, session, on_point=stop_after_two)
    record = seq.run(tmp_path / "run")
    assert record.info.status == "interrupted"
    assert [p.freq_hz for p in record.points] == [1e9, 2e9]
    assert not session.sim.noise_source.is_hot
    assert not session.sim.generator.output_on
    stored = load_run(tmp_path / "run")
    assert stored.info.status == "interrupted" and len(stored.points) == 2


def test_interrupt_during_acquisition_leaves_source_off(tmp_path, monkeypatch):
    plan = make_plan("y_factor", freqs_hz=[1e9, 2e9])
    session = ideal_session(plan)
    analyzer = session.bench.analyzer
    real = analyzer.acquire_trace
    calls = {"n": 0}

    def acquire():
        calls["n"] += 1
        if calls.get("stopped"):
            raise AssertionError("acquired after the interrupt")
        if (
            calls["n"] > 5
            and session.connection is Connection.DUT
            and session.sim.noise_source.is_hot
        ):
            calls["stopped"] = True
            raise KeyboardInterrupt
        return real()

    monkeypatch.setattr(analyzer, "acquire_trace", acquire)
    record = Sequencer(plan, session).run(tmp_path / "run")
    assert record.info.status == "interrupted"
    assert not session.sim.noise_source.is_hot


def test_instrument_fault_reported_with_its_frequency(tmp_path, monkeypatch):
    plan = make_plan("gain", freqs_hz=[1e9, 2e9, 3e9])
    session = ideal_session(plan)
    analyzer = session.bench.analyzer
    real = analyzer.acquire_trace

    def acquire():
        if analyzer.settings.center_hz > 2.5e9 and session.connection is Connection.DUT:
            raise CommunicationError("connection lost", visa_code=-1073807339)
        return real()

    monkeypatch.setattr(analyzer, "acquire_trace", acquire)
    with pytest.raises(CommunicationError) as info:
        Sequencer(plan, session).run(tmp_path / "run")
    assert info.value.context["freq_hz"] == 3e9
    assert "freq_hz=3000000000.0" in str(info.value)
    stored = load_run(tmp_path / "run")
    assert stored.info.status == "failed"
    assert [p.freq_hz for p in stored.points] == [1e9, 2e9]


# --------------------------------------------------------------------------- pieces


def test_combined_density_is_the_sample_weighted_mean():
    parts = [
        NoiseDensity(freq_hz=1e9, density_w_per_hz=d, u_density_w_per_hz=u)
        for d, u in ((1.0e-20, 0.1e-20), (1.2e-20, 0.06e-20))
    ]
    c = combine_densities(parts)
    w = np.array([1 / 0.1**2, 1.2**2 / 0.06**2])  # (N/u)^2: independent samples
    expected = (w[0] * 1.0 + w[1] * 1.2) / w.sum() * 1e-20
    assert c.density.density_w_per_hz == pytest.approx(expected, rel=1e-12)
    u = math.sqrt((w[0] * 0.1) ** 2 + (w[1] * 0.06) ** 2) / w.sum() * 1e-20
    # chi2 = 2.2 with 1 dof: below the 1e-3 alarm (10.8), so no widening
    assert not c.excess_scatter
    assert c.density.u_density_w_per_hz == pytest.approx(u, rel=1e-12)


def test_between_reading_scatter_widens_and_flags():
    parts = [
        NoiseDensity(freq_hz=1e9, density_w_per_hz=d, u_density_w_per_hz=0.01e-20)
        for d in (1.0e-20, 1.1e-20, 0.9e-20)
    ]
    c = combine_densities(parts)
    d = np.array([1.0, 1.1, 0.9]) * 1e-20
    w = (d / 0.01e-20) ** 2
    mean = np.sum(w * d) / w.sum()
    chi2 = np.sum(((d - mean) / 0.01e-20) ** 2)  # ~205 with 2 dof: far above the alarm
    assert c.excess_scatter and c.birge_ratio == pytest.approx(math.sqrt(chi2 / 2), rel=1e-12)
    u = math.sqrt(np.sum((w * 0.01e-20) ** 2)) / w.sum()
    assert c.density.u_density_w_per_hz == pytest.approx(u * c.birge_ratio, rel=1e-12)
    assert c.density.scatter_ratio == pytest.approx(c.birge_ratio)


def test_averages_for_target_follows_the_radiometer_scaling():
    # u = 0.2 dB at 10 averages -> 0.1 dB needs 40 (x1.1 planning margin = 44)
    assert averages_for_target(10, 0.2, 0.0, 0.1) == 44
    # a fixed 0.06 dB part leaves sqrt(0.1^2 - 0.06^2) = 0.08 dB for the reducible part
    assert averages_for_target(10, 0.2, 0.06, 0.1) == math.ceil(10 * 0.04 / 0.0064 * 1.1)
    assert averages_for_target(10, 0.2, 0.1, 0.1) is None


def test_session_connect_is_idempotent_and_safe():
    sim = ideal_sim()
    plan = make_plan("y_factor")
    session = simulated_session(sim, plan.bench)
    sim.noise_source.set_hot(True)
    session.connect("through")
    assert not sim.noise_source.is_hot  # never move cables with the source hot
    assert sim.path.value == "through"
    session.connect(Connection.THROUGH)
    assert session.moves == [Connection.THROUGH]


# --------------------------------------------------------------------------- refusals, forecast


def test_point_the_physics_refuses_is_skipped_and_reported(tmp_path):
    # the source's calibration sheet is 10 dB low at 5 GHz (its only entry there): the hot
    # temperature taken from it is about 1 200 K instead of about 9 100 K, so the DUT's noise
    # temperature comes out about -250 K, hundreds of standard uncertainties below zero at any
    # noise draw and in any reading order - a refusal of the physics, certain by construction
    # (an analyzer too noisy for the source, the earlier scenario, left hot - cold to a coin
    # flip); 1 GHz reads its own, correct entry and is measured normally
    # a limit every measured point meets by far: the unit still must not pass, since a
    # planned point is missing
    plan = make_plan(
        "y_factor",
        freqs_hz=[1e9, 5e9],
        acquisition={"time_limit_s": 2},
        limits={
            "bands": [{"start_hz": 0.5e9, "stop_hz": 6e9, "nf_max_db": 10.0}],
            "require_coverage": False,
        },
    )
    sheet_error_db = [0.0] * 16
    sheet_error_db[7] = -10.0  # demo-lna's source table: index 7 is 5 GHz
    session = ideal_session(plan, noise_source__calibration_error_db=sheet_error_db)
    assert session.sim.scenario.noise_source.freq_hz[7] == 5e9
    seq = Sequencer(plan, session)
    record = seq.run(tmp_path / "run")
    assert record.info.status == "complete"
    assert [p.freq_hz for p in record.points] == [1e9]
    (skipped,) = record.info.notes["skipped_points"]
    assert skipped["freq_hz"] == 5e9 and skipped["stage"] == "measurement"
    assert "standard uncertainties below zero" in skipped["reason"]
    assert not session.sim.noise_source.is_hot
    assert record.verdict["unit"] == "indeterminate"
    assert any("1 of 2 planned points were not measured" in n for n in record.verdict["notes"])
    assert [p["verdict"] for p in record.verdict["points"]] == ["pass"]


def test_forecast_matches_the_measured_averaging(tmp_path):
    from noisebench.running.forecast import forecast_plan
    from noisebench.sims.forecast_model import SimulatedBenchModel

    for method in ("y_factor", "gain"):
        plan = make_plan(method, freqs_hz=[1.5e9, 2e9, 2.5e9, 3e9], target=0.05)
        forecast = forecast_plan(plan, model=SimulatedBenchModel(ideal_sim(seed=21)))
        _, record = _run(plan, ideal_session(plan, seed=21), tmp_path, method)
        for f, p in zip(forecast.points, record.points, strict=True):
            assert 0.045 < f.u_nf_db <= 0.05 and f.limited_by is None  # averages are whole
            # measured = forecast x planning margin 1.1, pilot rounds and the scatter of the
            # uncertainty estimate: within a factor 0.8..2
            assert 0.8 < p.averages / f.averages < 2.0, (method, p.averages, f.averages)


def test_real_bench_connections_prompt_the_operator():
    from noisebench.bench.registry import OPERATOR_INSTRUCTIONS, BenchSession, _operator_mover

    prompts: list[str] = []
    bench = ideal_sim().as_bench()
    session = BenchSession(
        bench=bench, kind="scpi", resources={}, _move=_operator_mover(prompts.append)
    )
    session.connect("termination")
    session.connect("termination")  # already there: no second prompt
    session.connect("dut")
    assert prompts == [
        OPERATOR_INSTRUCTIONS[Connection.TERMINATION] + " Press Enter when done. ",
        OPERATOR_INSTRUCTIONS[Connection.DUT] + " Press Enter when done. ",
    ]
    assert session.real_hardware


def test_live_progress_only_on_an_interactive_terminal(monkeypatch):
    import io

    from noisebench.running.progress import LogProgress, RichProgress, make_progress

    class Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    monkeypatch.delenv("CI", raising=False)
    monkeypatch.delenv("GITHUB_ACTIONS", raising=False)
    monkeypatch.delenv("NOISEBENCH_NO_LIVE", raising=False)
    assert isinstance(make_progress(Terminal()), RichProgress)
    assert isinstance(make_progress(io.StringIO()), LogProgress)  # a pipe or a file
    monkeypatch.setenv("CI", "true")
    assert isinstance(make_progress(Terminal()), LogProgress)  # clean CI logs


def test_declared_gain_alone_is_no_upper_bound_of_the_hot_power():
    # A DUT adds k*Te*G*B of its own: with NF 10 dB behind an ENR 6 dB source the hot power is
    # 10*log10(1 + Te/Th) = 4.48 dB above the gain-only figure (docs/references.md §1-§2 formulas).
    import math

    from noisebench.running.safety import InputLimits, PowerGuard, total_noise_power_dbm

    limits = InputLimits(
        max_input_dbm=20.0,
        compression_dbm=-10.0,
        compression_backoff_db=10.0,
        caution_backoff_db=20.0,
    )
    kw = dict(bandwidth_hz=10e9, declared_gain_db=30.0, enr_db=6.0, cold_temperature_k=290.0)
    gain_only = PowerGuard(limits, **kw)
    assert gain_only.needs_cold_look  # no NF declared: read the DUT cold before going hot
    with_nf = PowerGuard(limits, declared_nf_db=10.0, **kw)
    assert not with_nf.needs_cold_look
    th = 290.0 * 10**0.6 + 290.0
    te = 290.0 * (10**1.0 - 1)
    assert with_nf.expected_hot_power_dbm(through=False) == pytest.approx(
        total_noise_power_dbm(th, 30.0, 10e9) + 10 * math.log10(1 + te / th)
    )
    assert with_nf.expected_hot_power_dbm(through=False) - gain_only.expected_hot_power_dbm(
        through=False
    ) == pytest.approx(4.482, abs=0.001)

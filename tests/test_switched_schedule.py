"""The Y-factor sweep-level hot/cold schedule (``running/sequencer_switched.py``) and the drift
check (``science/drift.py``): fewer noise-source switches than per-group hot-cold-cold-hot,
a linear drift of the receiver gain or of the source output cancelled in every point, and the
drift check's chi-square behaviour (nominal false alarms, curvature flagged). Statistical
checks use fixed seeds; tolerances come from each point's stated uncertainty.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from _sequencer_helpers import ideal_sim, make_plan
from scipy import stats

from noisebench.bench.registry import simulated_session
from noisebench.running.sequencer import Sequencer
from noisebench.science.drift import drift_check
from noisebench.science.point import PointFlag

FREQS = (1.0e9, 1.5e9, 2.0e9, 2.5e9, 3.0e9, 3.5e9)


def _run(tmp_path, mode: str, seed: int = 3, **drift: float):
    plan = make_plan("y_factor", freqs_hz=FREQS, target=0.08, switching={"mode": mode})
    sim = ideal_sim(seed, **drift)
    switches = [0]
    original = sim.noise_source.set_hot

    def counting(hot: bool) -> None:
        switches[0] += sim.noise_source.is_hot != hot
        original(hot)

    sim.noise_source.set_hot = counting
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / mode)
    truth = sim.truth([p.freq_hz for p in record.points])["nf_db"]
    errors = np.array([p.nf_db - float(t) for p, t in zip(record.points, truth, strict=True)])
    return record, errors, switches[0]


def test_sweep_level_schedule_switches_a_handful_of_times_and_stays_unbiased(tmp_path):
    record, errors, switches = _run(tmp_path, "per_sweep")
    _, _, per_group = _run(tmp_path, "per_group")
    assert len(record.points) == len(FREQS)
    assert all(p.notes["schedule"] == "per_sweep" for p in record.points)
    # both phases in a few sweep-level rounds (one block each here), every block
    # cold-hot-hot-cold: two switches, ending cold, so no switch between blocks and none at
    # the end (here 10: the calibration and the measurement in two or three rounds each);
    # per group it is three or four per round and group in both phases
    assert switches % 2 == 0 and switches <= 2 * 3 * 2
    assert per_group >= 2 * 3 * len(FREQS)
    assert switches < per_group / 2
    u = np.array([p.u_nf_db for p in record.points])
    # each error within 4.5 u (Bonferroni over 6 points at a family-wise 4e-5)
    assert np.all(np.abs(errors) <= 4.5 * u)


@pytest.mark.parametrize(
    "drift",
    [{"analyzer__gain_drift_db_per_s": -0.05}, {"noise_source__output_drift_db_per_s": 0.05}],
    ids=["receiver-gain", "source-output"],
)
def test_a_linear_drift_cancels_in_every_point(tmp_path, drift):
    # 0.05 dB/s over a run of several seconds: tenths of a dB between the first and last
    # readings, far above the 0.08 dB target if it did not cancel
    record, errors, _ = _run(tmp_path, "per_sweep", **drift)
    u = np.array([p.u_nf_db for p in record.points])
    assert np.all(np.abs(errors) <= 4.5 * u)
    flagged = sum(PointFlag.DRIFT in p.flags for p in record.points)
    assert flagged <= 1  # the check allows for a linear drift (1e-3 false alarms per point)


def test_drift_check_fits_lines_and_follows_chi_square_without_drift():
    # WLS residuals about the true model are chi-square with n - 3 dof (NIST/SEMATECH e-Handbook
    # 4.4.3): the false-alarm rate over many seeds stays at the nominal level
    rng = np.random.default_rng(11)
    t = np.array([0.5, 1.5, 4.5, 5.5, 8.5, 9.5, 12.5, 13.5])
    states = ["hot", "hot", "cold", "cold", "cold", "cold", "hot", "hot"]
    level = np.where(np.array(states) == "hot", 1e-18, 2e-19)
    rel = 0.01
    p_values = []
    for _ in range(2000):
        gain = 10 ** ((0.01 * t) / 10)  # a linear drift in dB: the model, not an error
        d = level * gain * (1 + rel * rng.standard_normal(t.size))
        check = drift_check(t, states, d, rel * d)
        p_values.append(check.p_value)
    p_values = np.array(p_values)
    assert check.dof == 5  # 8 readings, two levels and one common slope
    # reference: scipy.stats.chi2.sf, the tail probability of the chi-square distribution
    assert check.p_value == pytest.approx(stats.chi2.sf(check.chi2, check.dof), rel=1e-12)
    # uniform p-values: the share below 0.1 is binomial(2000, 0.1)
    share = np.mean(p_values < 0.1)
    assert share == pytest.approx(0.1, abs=5 * math.sqrt(0.1 * 0.9 / 2000))
    assert stats.kstest(p_values, "uniform").pvalue > 1e-4
    # a curvature far above the noise is flagged; slopes are returned per state (ln units)
    d = level * 10 ** ((0.02 * (t - 7) ** 2) / 10)  # 0.6 dB at the ends
    curved = drift_check(t, states, d, rel * d)
    assert curved.flagged
    assert drift_check(t[:3], states[:3], d[:3], rel * d[:3]) is None


def test_groups_the_physics_refuses_are_skipped_and_the_run_goes_on(tmp_path):
    plan = make_plan("y_factor", freqs_hz=FREQS[:4], target=0.08, switching={"mode": "per_sweep"})
    sim = ideal_sim(5)
    sim.noise_source.stuck = True  # a dead source: every system calibration is refused
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / "dead")
    assert record.info.status == "complete"
    skipped = record.info.notes["skipped_points"]
    # noise alone can put a dead source's hot reading a hair above its cold one; that is no
    # usable Y-factor either (hot - cold within 4 u), so no point gets a number
    assert len(skipped) == 4 and record.points == []
    assert all("no usable Y-factor" in s["reason"] for s in skipped)
    assert {s["stage"] for s in skipped} <= {"calibration", "measurement"}


def _tight_run(tmp_path, **drift: float):
    """Averages of 32 and more per pass (target 0.03 dB), so the blocks' monitors split."""
    plan = make_plan("y_factor", freqs_hz=FREQS, target=0.03, switching={"mode": "per_sweep"})
    sim = ideal_sim(3, **drift)
    reads: dict[float, list[int]] = {}
    original = sim.analyzer.acquire_trace

    def counting():
        s = sim.analyzer.settings
        reads.setdefault(s.center_hz, []).append(s.averages)
        return original()

    sim.analyzer.acquire_trace = counting
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / "tight")
    return record, reads


def test_one_monitor_per_block_splits_its_readings_and_every_point_carries_its_check(tmp_path):
    record, reads = _tight_run(tmp_path)
    monitors = {f for p in record.points for f in p.notes["drift_check"]["monitor_hz"]}
    assert monitors and len(monitors) < len(FREQS)
    for p in record.points:
        check = p.notes["drift_check"]
        assert check["dof"] >= 4 and not check["flagged"]
        assert PointFlag.DRIFT not in p.flags
    # a group that never watched a block reads each pass in one acquisition (four per block),
    # so on average it takes fewer acquisitions than the monitors (groups differ in blocks)
    watched = [len(reads[f]) for f in FREQS if f in monitors]
    plain = [len(reads[f]) for f in FREQS if f not in monitors]
    assert plain and np.mean(plain) < np.mean(watched)


def _flagged_or_refused_for_scatter(record) -> int:
    """Every planned point is either stored, flagged DRIFT exactly when its check says so, or
    refused because its readings scatter far beyond their averaging (a drift so strong that
    hot - cold is lost in it: no usable Y-factor); returns how many the drift caught."""
    skipped = record.info.notes.get("skipped_points", [])
    assert len(record.points) + len(skipped) == len(FREQS)
    for s in skipped:
        assert "no usable Y-factor" in s["reason"] and "scatter" in s["reason"], s["reason"]
    for p in record.points:
        assert (PointFlag.DRIFT in p.flags) == (p.notes["drift_check"]["p_value"] < 1e-3)
    return len(skipped) + sum(PointFlag.DRIFT in p.flags for p in record.points)


def test_a_curvature_the_schedule_cannot_cancel_is_flagged_at_every_point(tmp_path):
    # -0.01 dB/s^2 over a run of tens of seconds: dB of curvature, far beyond the target; the
    # readings then scatter so much that no Y-factor is usable (before: flagged numbers with
    # u_nf of 1e10 dB)
    record, _ = _tight_run(tmp_path, analyzer__gain_drift_db_per_s2=-0.01)
    assert _flagged_or_refused_for_scatter(record) == len(FREQS)


# ------------------------------------------------------------ drift the schedule cannot cancel


def _p_values_without_drift(tmp_path, seeds) -> np.ndarray:
    """One p-value per independent drift check (per block's monitor) over seeded runs."""
    p_values = []
    for seed in seeds:
        plan = make_plan("y_factor", freqs_hz=FREQS, target=0.03, switching={"mode": "per_sweep"})
        record = Sequencer(plan, simulated_session(ideal_sim(seed), plan.bench)).run(
            tmp_path / f"s{seed}"
        )
        seen = {}
        for p in record.points:
            check = p.notes["drift_check"]
            seen[(check["chi2"], check["dof"])] = check["p_value"]
        p_values += list(seen.values())
    return np.array(p_values)


def test_without_drift_the_sequencers_checks_are_uniform_and_flag_nothing(tmp_path):
    # the false-flag rate is the design rate only if the chi-square statistic is calibrated:
    # stated u right, reading times right, residual dof right. Then p-values of a stable bench
    # are uniform (a property of a correct test statistic); their share below 0.1 is binomial.
    p_values = _p_values_without_drift(tmp_path, range(100, 124))
    n = p_values.size
    assert n >= 24
    assert np.mean(p_values < 0.1) <= 0.1 + 4 * math.sqrt(0.09 / n)
    assert np.mean(p_values < 0.5) == pytest.approx(0.5, abs=4 * math.sqrt(0.25 / n))
    assert stats.kstest(p_values, "uniform").pvalue > 1e-4
    assert np.all(p_values >= 1e-3)  # P(any of n below 1e-3) = 1 - (1 - 1e-3)^n: a few %


def test_drift_check_false_alarm_rate_is_the_design_rate_for_averaged_power_readings():
    # readings of averaged noise power are gamma distributed (K independent samples: averages
    # x independent bins), not normal; the test runs on ln(density) with u = d / sqrt(K).
    # At the smallest split the sequencer allows (16 averages, a few bins: K = 48) the tail
    # rate must stay at DRIFT_ALPHA. 40 000 draws: expected 40, Poisson limits 4 sigma.
    from noisebench.science.drift import DRIFT_ALPHA, combined_check

    rng = np.random.default_rng(5)
    t = np.array([0.5, 1.5, 4.5, 5.5, 8.5, 9.5, 12.5, 13.5])
    states = ["hot", "hot", "cold", "cold", "cold", "cold", "hot", "hot"]
    level = np.where(np.array(states) == "hot", 1e-18, 2e-19)
    k = 48
    draws = 40_000
    flagged_single = flagged_combined = flagged_worst = 0
    for _ in range(draws // 2):
        checks = []
        for _freq in range(2):  # two frequencies of one trace: independent bins
            d = level * rng.gamma(k, 1.0 / k, size=t.size)
            checks.append(drift_check(t, states, d, d / math.sqrt(k)))
        flagged_single += sum(c.flagged for c in checks)
        flagged_combined += combined_check(checks).flagged
        flagged_worst += min(c.p_value for c in checks) < DRIFT_ALPHA
    expected = DRIFT_ALPHA * draws
    # reference: Poisson approximation of the binomial count, sd sqrt(expected)
    assert abs(flagged_single - expected) <= 4 * math.sqrt(expected) + 1
    half = expected / 2  # the combined and worst-of-two checks: one per pair of readings
    assert abs(flagged_combined - half) <= 4 * math.sqrt(half) + 1
    # the worst of two checks (the rule before) alarms about twice as often as designed
    assert flagged_worst > half + 2 * math.sqrt(half)


def _last_cold_switch_of_the_measurement(folder, seed: int) -> float:
    """Simulated time at which the last measurement block switches the source cold (the
    monitored block of this short sweep: its passes are long enough to be split). A block
    starts cold (cold-hot-hot-cold), so its one switch to cold lies between its hot passes
    and its last cold pass; the run ends cold and needs no further switch."""
    plan = make_plan("y_factor", freqs_hz=FREQS, target=0.03, switching={"mode": "per_sweep"})
    sim = ideal_sim(seed)
    on_dut = []
    colds = []
    set_path, set_hot = sim.set_path, sim.noise_source.set_hot

    def path(p):
        on_dut.append(p.value == "dut")
        set_path(p)

    def hot(state: bool) -> None:
        if on_dut and on_dut[-1] and not state and sim.noise_source.is_hot:
            colds.append(sim.clock.now_s)
        set_hot(state)

    sim.set_path, sim.noise_source.set_hot = path, hot
    Sequencer(plan, simulated_session(sim, plan.bench)).run(folder)
    return colds[-1]


@pytest.mark.parametrize(
    "drift",
    [
        {"analyzer__gain_step_db": 0.3},
        {"noise_source__output_drift_db_per_s2": -0.01},
    ],
    ids=["gain-step", "source-curvature"],
)
def test_drift_the_schedule_cannot_cancel_is_flagged(tmp_path, drift):
    if "analyzer__gain_step_db" in drift:
        # the step as the monitored measurement block goes cold: its first cold pass and both
        # hot passes before the step, its last cold pass after it, so Y is off by half the
        # step (the run repeats exactly up to the step: the same seed, the same readings)
        at = _last_cold_switch_of_the_measurement(tmp_path / "base", 3)
        drift = {**drift, "analyzer__gain_step_at_s": at}
    record, _ = _tight_run(tmp_path, **drift)
    assert _flagged_or_refused_for_scatter(record) >= 1


def test_the_simulated_source_waits_only_when_its_state_changes():
    # a safe state commands a cold source cold: no transition starts, so nothing to wait for
    # (before, every connection change cost the run one settling time)
    sim = ideal_sim(3)
    source, clock = sim.noise_source, sim.clock
    settle = source.settle_time_s
    t0 = clock.now_s
    source.set_hot(False)
    assert clock.now_s == t0 and not source.is_hot
    source.set_hot(True)
    assert clock.now_s == pytest.approx(t0 + settle) and source.is_hot
    source.set_hot(True)
    assert clock.now_s == pytest.approx(t0 + settle)
    sim.as_bench().safe_state()
    assert clock.now_s == pytest.approx(t0 + 2 * settle) and not source.is_hot
    sim.as_bench().safe_state()
    assert clock.now_s == pytest.approx(t0 + 2 * settle)


def test_a_sweep_at_an_ordinary_target_carries_a_drift_check_on_every_point(tmp_path):
    # at 0.08 dB the monitors' passes hold a few tens of averages: split from 2 averages per
    # half (MIN_CHECK_AVERAGES), every point carries the block's check; at 16, the rule before,
    # such sweeps carried none
    record, _, _ = _run(tmp_path, "per_sweep")
    assert len(record.points) == len(FREQS)
    for p in record.points:
        check = p.notes["drift_check"]
        assert check["dof"] > 0 and 0.0 <= check["p_value"] <= 1.0
    assert min(p.averages for p in record.points) < 2 * 2 * 16  # passes below the old rule

"""The simulated bench's deterministic behaviour: settings, timing, chain physics, instruments.

Statistical properties of the synthesised noise are in ``test_sim_statistics.py``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.constants import k as K_BOLTZMANN
from scipy.signal import get_window

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AveragingScale,
    Detector,
    MarkerKind,
    SweepMode,
)
from noisebench.bench.instruments import Analyzer, Bench, Generator, NoiseSource
from noisebench.errors import InputError
from noisebench.science.filters import FilterKind, RbwFilter
from noisebench.sims.analyzer import round_125, round_step
from noisebench.sims.bench import Path, SimulatedBench
from noisebench.sims.clock import SimClock
from noisebench.sims.models import compression_gain_factor, dbm_to_w, mismatch_factor
from noisebench.sims.scenario import available_scenarios, load_scenario

T0 = 290.0

NO_CABLES = {"input_cable": {"loss_db": [0.0]}, "output_cable": {"loss_db": [0.0]}}


def clean_bench(seed: int = 0, **overrides) -> SimulatedBench:
    """demo-lna without systematic errors, cables or gain ripple (for hand-computed checks)."""
    kw = {**NO_CABLES, "dut__gain_ripple_db": 0.0, **overrides}
    return SimulatedBench.from_scenario("demo-lna", seed=seed, ideal=True, **kw)


def request(**kw) -> AcquisitionRequest:
    base = dict(center_hz=2e9, span_hz=10e6, rbw_hz=1e6, points=101, averages=1)
    base.update(kw)
    return AcquisitionRequest(**base)


def mean_power_w(trace) -> float:
    return float(np.mean(10 ** (trace.values / 10) * 1e-3))


# ---------------------------------------------------------------- scenarios ------------------


def test_packaged_scenarios_load_and_cover_their_cases():
    names = available_scenarios()
    assert {"demo-lna", "high-nf", "attenuator-6db"} <= set(names)
    demo = load_scenario("demo-lna")
    assert 0.6 <= min(demo.dut.nf_db[1:-1]) and max(demo.dut.nf_db[1:-1]) <= 1.5
    assert 20 <= min(demo.dut.gain_db[1:-1]) and max(demo.dut.gain_db[1:-1]) <= 28
    assert demo.dut.gain_ripple_db > 0
    assert demo.noise_source.physical_temperature_k != T0
    high = load_scenario("high-nf")
    assert min(high.dut.nf_db) >= 10 and max(high.dut.gain_db) <= 10


def test_unknown_scenario_and_bad_override_name_the_field():
    with pytest.raises(InputError) as err:
        load_scenario("no-such-bench")
    assert err.value.field == "scenario" and "demo-lna" in str(err.value)
    with pytest.raises(InputError) as err:
        load_scenario("demo-lna", analyzer__no_such_setting=1.0)
    assert "analyzer.no_such_setting" in str(err.value)
    with pytest.raises(InputError) as err:
        load_scenario("demo-lna", dut__gain_db=[1.0, 2.0])
    assert "dut.gain_db" in str(err.value)


def test_scenario_loads_from_a_path(tmp_path):
    from noisebench.sims.scenario import scenario_dir

    text = (scenario_dir() / "attenuator-6db.toml").read_text(encoding="utf-8")
    path = tmp_path / "my-bench.toml"
    path.write_text(text.replace('name = "attenuator-6db"', 'name = "my-bench"'), encoding="utf-8")
    bench = SimulatedBench.from_scenario(str(path), seed=2)
    assert bench.scenario.name == "my-bench" and bench.seed == 2
    path.write_text("name = [", encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_scenario(path)
    assert "my-bench.toml" in str(err.value)


def test_overrides_accept_nested_and_double_underscore_forms():
    a = load_scenario("demo-lna", analyzer={"amplitude_error_db": 0.4})
    b = load_scenario("demo-lna", analyzer__amplitude_error_db=0.4)
    assert a == b and a.analyzer.amplitude_error_db == 0.4
    assert a.analyzer.nf_db == load_scenario("demo-lna").analyzer.nf_db  # merged, not replaced


# ---------------------------------------------------------------- clock ---------------------


def test_clock_advances_and_refuses_going_back():
    clock = SimClock()
    assert clock.now_s == 0.0
    assert clock.advance(0.25) == pytest.approx(0.25)
    with pytest.raises(InputError):
        clock.advance(-1e-3)
    with pytest.raises(InputError):
        clock.advance(float("nan"))


# ---------------------------------------------------------------- settings ------------------


@pytest.mark.parametrize(
    ("asked", "applied"),
    [
        (1.1e6, 1e6),
        (2.6e6, 3e6),
        (4.2e3, 5e3),
        (3.8e3, 3e3),
        (6.9e5, 5e5),
        (7.2e5, 1e6),
        (1e9, 10e6),
        (0.1, 1.0),
    ],
)
def test_rbw_rounds_to_the_1_2_3_5_sequence_within_limits(asked, applied):
    assert round_125(asked, 1.0, 10e6) == pytest.approx(applied)


def test_attenuation_rounds_to_2_db_steps_halves_up():
    assert [round_step(v, 2.0, 0.0, 70.0) for v in (5.0, 6.9, 7.0, 71.0, -1.0)] == [
        6.0,
        6.0,
        8.0,
        70.0,
        0.0,
    ]


def test_configure_reports_applied_values_and_clips():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    s = bench.analyzer.configure(
        request(rbw_hz=2.6e6, attenuation_db=7.0, points=500_000, averages=10**6 // 2, vbw_hz=330e3)
    )
    assert s.rbw_hz == 3e6 and s.vbw_hz == 300e3
    assert s.attenuation_db == 8.0
    assert s.points == 100_001 and s.averages == 100_000
    assert s.rbw_filter.kind is FilterKind.GAUSSIAN
    assert bench.analyzer.settings == s
    # None keeps the instrument's current attenuation and preamp
    s2 = bench.analyzer.configure(request(preamp=True))
    assert s2.attenuation_db == 8.0 and s2.preamp is True
    s3 = bench.analyzer.configure(request())
    assert s3.preamp is True


def test_span_is_clipped_to_the_frequency_range_and_bad_centre_refused():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    s = bench.analyzer.configure(request(center_hz=7.4e9, span_hz=1e9))
    assert s.stop_hz == pytest.approx(7.5e9) and s.span_hz == pytest.approx(0.2e9)
    with pytest.raises(InputError) as err:
        bench.analyzer.configure(request(center_hz=9e9))
    assert err.value.field == "center_hz"


def test_filter_shape_and_fft_window_are_reported():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    bench.analyzer.set_filter_shape("synchronous", poles=4)
    s = bench.analyzer.configure(request())
    assert s.rbw_filter == RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=4)
    # docs/references.md §6a: 4 synchronously tuned poles have ENBW = 1.128499 x B3
    assert s.enbw_hz == pytest.approx(1.128499e6, rel=1e-6)
    s = bench.analyzer.configure(request(mode=SweepMode.FFT, rbw_hz=1e3))
    assert s.rbw_filter.kind is FilterKind.FFT and s.rbw_filter.window == "hann"
    s = bench.analyzer.configure(request(mode=SweepMode.FFT, span_hz=0.0))
    assert s.mode is SweepMode.SWEPT  # zero span has no FFT mode
    with pytest.raises(InputError):
        bench.analyzer.set_fft_window("no-such-window")


# ---------------------------------------------------------------- timing --------------------


@pytest.mark.parametrize(
    ("span", "rbw", "sweep"), [(1e9, 1e6, 2.5e-3), (100e6, 100e3, 25e-3), (10e6, 1e3, 25.0)]
)
def test_swept_sweep_time_follows_k_span_over_rbw_squared(span, rbw, sweep):
    # common practice, docs/references.md §8: ST = 2.5 * span / RBW^2
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    s = bench.analyzer.configure(request(span_hz=span, rbw_hz=rbw))
    assert s.sweep_time_s == pytest.approx(sweep)


def test_sweep_time_vbw_minimum_and_requested():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    s = bench.analyzer.configure(request(span_hz=100e6, rbw_hz=100e3, vbw_hz=10e3))
    assert s.sweep_time_s == pytest.approx(2.5 * 100e6 / (100e3 * 10e3))  # docs/references.md §8
    s = bench.analyzer.configure(request(span_hz=1e6, rbw_hz=1e6))
    assert s.sweep_time_s == pytest.approx(1e-3)  # the analyzer's shortest sweep
    s = bench.analyzer.configure(request(span_hz=1e6, rbw_hz=1e6, sweep_time_s=0.2))
    assert s.sweep_time_s == pytest.approx(0.2)
    s = bench.analyzer.configure(request(span_hz=0.0, sweep_time_s=0.05))
    assert s.sweep_time_s == pytest.approx(0.05)


def test_fft_sweep_time_is_one_frame_per_segment():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    s = bench.analyzer.configure(request(mode=SweepMode.FFT, rbw_hz=1e3, span_hz=25e6))
    # frame length = 1 / bin width, and RBW = B3 in bins x bin width; B3 of the Hann window
    # from its zero-padded spectrum (scipy.signal.get_window), three 10 MHz segments
    w = get_window("hann", 4096, fftbins=True)
    spec = np.abs(np.fft.rfft(w, 4096 * 64)) ** 2
    spec /= spec[0]
    b3_bins = 2 * np.interp(0.5, spec[:400][::-1], np.arange(400)[::-1] / 64)
    assert s.sweep_time_s == pytest.approx(3 * b3_bins / 1e3, rel=1e-3)


def test_acquisition_advances_the_clock_by_the_expected_time():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    bench.analyzer.configure(request(averages=20, span_hz=100e6, rbw_hz=100e3))
    expected = bench.analyzer.expected_acquisition_time_s()
    # 20 sweeps of 25 ms plus 1 ms retrace each, plus a 5/RBW retune settle
    assert expected == pytest.approx(20 * (25e-3 + 1e-3) + 5 / 100e3)
    t0 = bench.clock.now_s
    trace = bench.analyzer.acquire_trace()
    assert trace.acquisition_time_s == pytest.approx(expected)
    assert bench.clock.now_s - t0 == pytest.approx(expected)
    assert trace.instrument == bench.analyzer.identity
    assert trace.values.size == 101 and trace.settings == bench.analyzer.settings


def test_detector_samples_from_sweep_time_and_statistical_bandwidth():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    s = bench.analyzer.configure(request(span_hz=0.0, sweep_time_s=10e-3, detector=Detector.RMS))
    bstat = RbwFilter().stat_bw_hz(1e6)  # docs/references.md §6a: 1.505384 x B3
    assert s.detector_samples == round(bstat * 10e-3 / 101)
    s = bench.analyzer.configure(request(span_hz=0.0, sweep_time_s=10e-3, detector=Detector.SAMPLE))
    assert s.detector_samples == 1
    s = bench.analyzer.configure(
        request(mode=SweepMode.FFT, rbw_hz=1e3, span_hz=1e6, detector=Detector.RMS)
    )
    assert s.detector_samples == round(1e4 / s.rbw_filter.stat_bw_hz(1e3))


# ---------------------------------------------------------------- chain physics -------------


def test_truth_of_the_dut_follows_its_tables():
    bench = clean_bench()
    spec = bench.scenario.dut
    f = np.array([1e9, 1.25e9])
    t = bench.truth(f)
    assert t["nf_db"][0] == pytest.approx(spec.nf_db[2])
    assert t["nf_db"][1] == pytest.approx((spec.nf_db[2] + spec.nf_db[3]) / 2)  # linear in dB
    assert t["te_k"] == pytest.approx(T0 * (10 ** (t["nf_db"] / 10) - 1))  # docs/references.md §2
    assert t["gain_db"][0] == pytest.approx(spec.gain_db[2])
    with pytest.raises(InputError) as err:
        bench.truth(10e9)
    assert err.value.field == "freq_hz"


def test_passive_dut_noise_figure_follows_its_loss_and_temperature():
    bench = SimulatedBench.from_scenario("attenuator-6db", seed=0)
    t = bench.truth(np.array([1e9, 3e9]))
    loss = 10 ** (-t["gain_db"] / 10)
    # docs/references.md §3: F = 1 + (L - 1) Tp / T0
    assert t["nf_db"] == pytest.approx(10 * np.log10(1 + (loss - 1) * 296.0 / T0))


def test_hot_temperature_uses_enr_over_t0_plus_physical_temperature():
    bench = clean_bench()
    t = bench.truth(2e9)
    # docs/references.md §5 (common assumption): Th = T0 * ENR + Tc, with Tc the physical
    # temperature
    assert t["cold_k"][0] == 296.5
    assert t["hot_k"][0] == pytest.approx(T0 * 10 ** (t["enr_db"][0] / 10) + 296.5)
    assert t["enr_db"][0] == pytest.approx(15.06)


def test_operator_enr_table_differs_within_twice_its_uncertainty():
    bench = SimulatedBench.from_scenario("demo-lna", seed=3)
    sheet = bench.enr_calibration
    true = np.asarray(bench.scenario.noise_source.enr_db)
    err = np.asarray(sheet.enr_db) - true
    u = np.asarray(sheet.u_enr_db)
    assert np.all(np.abs(err) <= 2 * u + 1e-4) and np.any(np.abs(err) > 0.01)
    assert sheet.serial == bench.scenario.noise_source.serial
    again = SimulatedBench.from_scenario("demo-lna", seed=3).enr_calibration
    assert again.enr_db == sheet.enr_db  # deterministic from the seed
    assert SimulatedBench.from_scenario(
        "demo-lna", seed=3, ideal=True
    ).enr_calibration.enr_db == pytest.approx(true.tolist(), abs=1e-4)


def test_the_composition_root_turns_the_calibration_sheet_into_the_cores_enr_table():
    """The simulator hands plain numbers; bench/registry.py builds the core's EnrTable from
    them, and the session of a simulated bench carries that table (nothing else reads it
    from the simulator)."""
    from noisebench.bench.registry import simulated_enr_table, simulated_session

    bench = SimulatedBench.from_scenario("demo-lna", seed=3)
    sheet, table = bench.enr_calibration, simulated_enr_table(bench)
    assert table.freq_hz == list(sheet.freq_hz) and table.enr_db == list(sheet.enr_db)
    assert table.u_enr_db == list(sheet.u_enr_db)
    assert table.metadata.serial == sheet.serial == bench.scenario.noise_source.serial
    assert table.metadata.enr_reference == "t0"
    assert "demo-lna" in (table.metadata.description or "")
    f = sheet.freq_hz[1]
    assert float(table.at(f).enr_db) == pytest.approx(sheet.enr_db[1], abs=1e-12)
    assert simulated_session(bench).enr_table == table


def test_displayed_densities_combine_by_friis():
    bench = clean_bench()
    bench.analyzer.configure(request(attenuation_db=0.0, preamp=False))
    f = np.array([2e9])
    t = bench.truth(f)
    an = bench.scenario.analyzer
    f_sa = 10 ** (np.interp(f, an.freq_hz, an.nf_db) / 10)
    te_sa = T0 * (f_sa - 1)  # docs/references.md §2
    g = 10 ** (t["gain_db"] / 10)
    tc, te, amb = 296.5, t["te_k"], bench.scenario.ambient_k
    # docs/references.md §3/§4: DUT output k (Tc + Te) G, plus the analyzer's own k Te_sa
    assert t["density_dut_cold_w_per_hz"] == pytest.approx(K_BOLTZMANN * (tc + te) * g)
    assert t["displayed_dut_cold_w_per_hz"] == pytest.approx(K_BOLTZMANN * ((tc + te) * g + te_sa))
    assert t["displayed_termination_cold_w_per_hz"] == pytest.approx(K_BOLTZMANN * (amb + te_sa))
    th = T0 * 10 ** (t["enr_db"] / 10) + tc
    assert t["displayed_through_hot_w_per_hz"] == pytest.approx(K_BOLTZMANN * (th + te_sa))
    assert t["analyzer_nf_db"] == pytest.approx(10 * np.log10(f_sa))


def test_attenuation_raises_the_floor_db_for_db_and_preamp_lowers_it():
    bench = clean_bench()
    an = bench.scenario.analyzer
    f = np.array([3e9])
    f_sa = 10 ** (np.interp(f, an.freq_hz, an.nf_db) / 10)
    nf = {}
    for att, pre in ((0.0, False), (10.0, False), (20.0, False), (0.0, True)):
        bench.analyzer.configure(request(center_hz=3e9, attenuation_db=att, preamp=pre))
        nf[(att, pre)] = bench.truth(f)["analyzer_nf_db"][0]
    # Friis (docs/references.md §3): attenuator L at ambient, then the mixer; preamp before the
    # mixer
    amb = bench.scenario.ambient_k
    for att in (10.0, 20.0):
        loss = 10 ** (att / 10)
        expected = 1 + (loss - 1) * amb / T0 + loss * (f_sa[0] - 1)
        assert nf[(att, False)] == pytest.approx(10 * np.log10(expected))
        assert nf[(att, False)] - nf[(0.0, False)] == pytest.approx(att, abs=0.05)
    f_pre, g_pre = 10 ** (an.preamp_nf_db / 10), 10 ** (an.preamp_gain_db / 10)
    assert nf[(0.0, True)] == pytest.approx(10 * np.log10(f_pre + (f_sa[0] - 1) / g_pre))
    assert nf[(0.0, True)] < nf[(0.0, False)] - 5


def test_cables_cascade_by_friis_in_the_system_figure():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0, ideal=True)
    bench.analyzer.configure(request(attenuation_db=0.0))
    f = np.array([4e9])
    t = bench.truth(f)
    l_in = 10 ** (0.20 * math.sqrt(4) / 10)  # 0.2 dB at 1 GHz scaling as sqrt(f)
    l_out = 10 ** (0.45 * math.sqrt(4) / 10)
    assert t["input_loss_db"][0] == pytest.approx(0.4) and t["output_loss_db"][0] == pytest.approx(
        0.9
    )
    amb = bench.scenario.ambient_k
    g = 10 ** (t["gain_db"] / 10)
    # docs/references.md §3: Te = Te1 + Te2/G1 + Te3/(G1 G2) + ..., a loss has Te = (L - 1) Tp
    te = (
        (l_in - 1) * amb
        + t["te_k"] * l_in
        + (l_out - 1) * amb * l_in / g
        + t["analyzer_te_k"] * l_in * l_out / g
    )
    assert t["system_nf_db"] == pytest.approx(10 * np.log10(1 + te / T0))


def test_mismatch_factor_limits():
    # docs/references.md §9: limits 20 log10(1 +/- |Gs||Gl|) on the transferred power
    ga, gb = 0.1 * np.exp(1j * np.linspace(0, 2 * np.pi, 721)), 0.2
    m_db = 10 * np.log10(mismatch_factor(ga, gb))
    assert m_db.max() == pytest.approx(-20 * np.log10(1 - 0.02), abs=1e-4)
    assert m_db.min() == pytest.approx(-20 * np.log10(1 + 0.02), abs=1e-4)


def test_source_reflection_scales_the_excess_noise_into_a_mismatched_analyzer():
    bench = clean_bench(
        noise_source__hot_reflection={"magnitude": 0.2, "angle_deg": 0.0},
        analyzer__input_reflection={"magnitude": 0.3, "angle_deg": 0.0},
    )
    bench.analyzer.configure(request(attenuation_db=0.0))
    t = bench.truth(2e9)
    amb = bench.scenario.ambient_k
    # delivered excess relative to a matched interface: 1 / |1 - Gs Gl|^2, here 1 / 0.94^2,
    # inside the limits 1 / (1 -/+ |Gs||Gl|)^2 (docs/references.md §9)
    expected = amb + (t["hot_k"][0] - amb) / (1 - 0.2 * 0.3) ** 2
    assert t["density_through_hot_w_per_hz"][0] == pytest.approx(K_BOLTZMANN * expected)
    cold = bench.truth(2e9)["density_through_cold_w_per_hz"][0]
    # the cold source is matched here and 0.5 K above ambient: almost no mismatch effect
    assert cold == pytest.approx(K_BOLTZMANN * 296.5, rel=1e-4)


def test_compression_gain_factor_is_1_db_at_p1db():
    p1db = 1e-2
    # the input that drives the output to P1dB gives an uncompressed output 1 dB higher
    lin = p1db * 10**0.1
    assert 10 * np.log10(compression_gain_factor(lin, p1db)) == pytest.approx(-1.0, abs=1e-9)
    assert compression_gain_factor(1e-9 * p1db, p1db) == pytest.approx(1.0, abs=1e-12)
    assert compression_gain_factor(lin, None) == 1.0


# ---------------------------------------------------------------- instruments ---------------


def test_instruments_implement_the_abstract_interfaces():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    assert isinstance(bench.analyzer, Analyzer)
    assert isinstance(bench.noise_source, NoiseSource)
    assert isinstance(bench.generator, Generator)
    b = bench.as_bench()
    assert isinstance(b, Bench) and b.ambient_k == 296.0 and b.extras["sim"] is bench
    assert bench.analyzer.max_input_power_dbm == 30.0
    assert bench.noise_source.cold_temperature_k == 296.5
    assert set(b.identities()) == {"analyzer", "noise_source", "generator"}
    bench.noise_source.set_hot(True)
    bench.generator.set_output(True)
    b.safe_state()
    assert not bench.noise_source.is_hot and not bench.generator.output_on


def test_set_hot_waits_the_settle_time_and_drives_the_analyzer_output():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    t0 = bench.clock.now_s
    bench.noise_source.set_hot(True)
    assert bench.clock.now_s - t0 == pytest.approx(0.05)
    assert bench.noise_source.is_hot and bench.analyzer.noise_drive_on
    bench.analyzer.set_noise_drive(False)
    assert not bench.noise_source.is_hot


def test_reading_during_the_transition_is_between_cold_and_hot():
    bench = clean_bench(noise_source__transition_time_s=0.02)
    bench.noise_source.settle_time_s = 0.0  # the operator does not wait
    s = bench.analyzer.configure(
        request(
            span_hz=0.0, points=201, sweep_time_s=0.02, detector=Detector.RMS, attenuation_db=0.0
        )
    )
    truth = bench.truth(2e9)
    cold = truth["displayed_dut_cold_w_per_hz"][0] * s.enbw_hz
    hot = truth["displayed_dut_hot_w_per_hz"][0] * s.enbw_hz
    bench.noise_source.set_hot(True)
    power = dbm_to_w(bench.analyzer.acquire_trace().values)
    # point i is read 5/RBW + ST (i + 1/2) / points after the switch; the source ramps linearly
    t_i = 5 / s.rbw_hz + s.sweep_time_s * (np.arange(201) + 0.5) / 201
    expected = cold + np.clip(t_i / 0.02, 0, 1) * (hot - cold)
    ratio = power / expected
    # each point is an RMS mean of k looks: relative std 1/sqrt(k); 5 sigma of the mean ratio
    tol = 5 / math.sqrt(s.detector_samples * 201)
    assert ratio.mean() == pytest.approx(1.0, abs=tol)
    assert (power / hot).mean() < 0.6  # a steady hot source would read 1
    settled = dbm_to_w(bench.analyzer.acquire_trace().values)
    assert (settled / hot).mean() == pytest.approx(1.0, abs=tol)


def test_supply_drives_the_source_within_its_window_only():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    sup, src = bench.supply, bench.noise_source
    sup.set_current_limit(0.1)
    sup.set_voltage(28.0)
    sup.set_output(True)
    assert src.is_hot and sup.measure_voltage() == 28.0
    assert sup.measure_current() == pytest.approx(28.0 / 2800.0)
    sup.set_current_limit(0.005)  # 5 mA: constant current, the voltage collapses to 14 V
    assert sup.measure_voltage() == pytest.approx(14.0) and not src.is_hot
    sup.set_current_limit(0.1)
    sup.set_voltage(24.0)
    assert not src.is_hot  # below the drive window
    sup.set_voltage(33.0)  # above the diode's maximum: damaged for good
    assert src.damaged and not src.is_hot
    sup.set_voltage(28.0)
    assert not src.is_hot
    with pytest.raises(InputError):
        sup.set_voltage(100.0)
    sup.close()
    assert not sup.output_on and sup.measure_voltage() == 0.0


def test_enr_follows_the_drive_voltage():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    bench.supply.set_voltage(29.0)
    bench.supply.set_output(True)
    enr = bench.truth(2e9)["enr_db"][0]
    assert enr == pytest.approx(15.06 + 0.01 * 1.0)  # scenario: +0.01 dB/V above 28 V


def test_stuck_source_never_switches():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    bench.noise_source.stuck = True
    bench.noise_source.set_hot(True)
    assert not bench.noise_source.is_hot


def _tone_tolerance_db(
    noise_w_per_hz: float, enbw_hz: float, tone_w: float, looks: int = 1
) -> float:
    """5 sigma of a band-power reading of a tone: the tone x noise cross term scatters the
    reading by sqrt(2 N / P) relative (N the noise power in one ENBW, random relative phase)."""
    c_db = 10 / math.log(10)
    return 5 * c_db * math.sqrt(2 * noise_w_per_hz * enbw_hz / tone_w / looks)


def test_generator_tone_appears_at_the_path_gain():
    bench = clean_bench()
    gen = bench.generator
    gen.set_cw(2e9, -50.0)  # far below the mixer's and the DUT's compression
    gen.set_output(True)
    s = bench.analyzer.configure(
        request(span_hz=200e3, rbw_hz=10e3, points=201, attenuation_db=10.0)
    )
    truth = bench.truth(2e9)
    gain_db = truth["gain_db"][0]
    reading = bench.analyzer.read_marker(2e9, MarkerKind.BAND_POWER, band_hz=100e3)
    # band power integrates the tone: sum P_i * spacing / ENBW = P_tone
    tol = _tone_tolerance_db(
        truth["displayed_dut_cold_w_per_hz"][0], s.enbw_hz, 1e-8 * 10 ** (gain_db / 10)
    )
    assert reading.value_db == pytest.approx(-50.0 + gain_db, abs=tol)
    bench.set_path(Path.THROUGH)
    reading = bench.analyzer.read_marker(2e9, MarkerKind.BAND_POWER, band_hz=100e3)
    tol = _tone_tolerance_db(truth["displayed_through_cold_w_per_hz"][0], s.enbw_hz, 1e-8)
    assert reading.value_db == pytest.approx(-50.0, abs=tol)
    with pytest.raises(InputError):
        gen.set_cw(20e9, 0.0)
    with pytest.raises(InputError):
        gen.set_cw(1e9, 40.0)


def test_dut_compression_reduces_the_gain_by_1_db_at_p1db():
    bench = clean_bench()
    gain_db = bench.truth(2e9)["gain_db"][0]
    p1db = bench.scenario.dut.output_p1db_dbm
    bench.generator.set_output(True)
    bench.analyzer.configure(
        request(span_hz=200e3, rbw_hz=10e3, points=201, attenuation_db=30.0, ref_level_dbm=20.0)
    )
    bench.generator.set_cw(2e9, p1db + 1.0 - gain_db)  # uncompressed output 1 dB above P1dB
    out = bench.analyzer.read_marker(2e9, MarkerKind.BAND_POWER, band_hz=100e3).value_db
    # the DUT's own noise adds to the compression drive: its total power is ~1e-4 of the tone
    assert out == pytest.approx(p1db, abs=0.01)


def test_mixer_compression_and_if_overload_read_low():
    bench = clean_bench()
    bench.generator.set_output(True)
    bench.set_path(Path.THROUGH)
    bench.generator.set_cw(2e9, 0.0)
    bench.analyzer.configure(
        request(span_hz=200e3, rbw_hz=10e3, attenuation_db=30.0, ref_level_dbm=10.0)
    )
    fine = bench.analyzer.read_marker(2e9, MarkerKind.BAND_POWER, band_hz=100e3).value_db
    assert fine == pytest.approx(0.0, abs=0.01)
    bench.analyzer.configure(
        request(span_hz=200e3, rbw_hz=10e3, attenuation_db=0.0, ref_level_dbm=10.0)
    )
    mixer = bench.analyzer.read_marker(2e9, MarkerKind.BAND_POWER, band_hz=100e3).value_db
    assert mixer < fine - 1.0  # 0 dBm at a -3 dBm P1dB mixer
    bench.analyzer.configure(
        request(span_hz=200e3, rbw_hz=10e3, attenuation_db=30.0, ref_level_dbm=-30.0)
    )
    clipped = bench.analyzer.read_marker(2e9, MarkerKind.BAND_POWER, band_hz=100e3).value_db
    assert clipped < fine - 10.0  # 30 dB above the reference level overloads the IF


def test_input_power_above_the_rating_is_recorded():
    bench = clean_bench()
    bench.set_path(Path.THROUGH)
    bench.generator.set_cw(2e9, 15.0)
    bench.generator.set_output(True)
    bench.analyzer.configure(request(attenuation_db=40.0))
    bench.analyzer.acquire_trace()
    assert bench.analyzer.overload_events == []
    sim = SimulatedBench.from_scenario("demo-lna", seed=0, analyzer__max_input_power_dbm=10.0)
    sim.set_path(Path.THROUGH)
    sim.generator.set_cw(2e9, 15.0)
    sim.generator.set_output(True)
    sim.analyzer.acquire_trace()
    assert len(sim.analyzer.overload_events) == 1
    # the tone after the output cable (reflections move it by < 0.02 dB)
    expected = 15.0 - sim.truth(2e9)["output_loss_db"][0]
    assert sim.analyzer.overload_events[0]["input_power_dbm"] == pytest.approx(expected, abs=0.02)


def test_interference_lines_are_present_in_every_path():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    f_line, band = 1.80025e9, 150e3
    s = bench.analyzer.configure(
        request(
            center_hz=f_line,
            span_hz=2e6,
            rbw_hz=30e3,
            points=401,
            averages=100,
            attenuation_db=10.0,
        )
    )
    sc = bench.scenario
    # the -80 dBm line, its mains sidebands (-30 dBc at +/-50 Hz, -36 dBc at +/-100 Hz), the
    # analyzer's level error
    line_w = 1e-11 * (1 + 2 * 1e-3 + 2 * 1e-3 / 4) * 10 ** (sc.analyzer.amplitude_error_db / 10)
    for path in Path:
        bench.set_path(path)
        trace = bench.analyzer.acquire_trace()
        assert abs(trace.freq_hz[np.argmax(trace.values)] - f_line) <= 2 * 2e6 / 400
        reading = bench.analyzer.read_marker(f_line, MarkerKind.BAND_POWER, band_hz=band)
        density = bench.truth(f_line)[f"displayed_{path.value}_cold_w_per_hz"][0]
        line_read = dbm_to_w(reading.value_db) - density * band  # remove the band's noise
        # scatter: the noise part over band / B_stat cells x 100 sweeps, and the cross term
        cells = band / s.rbw_filter.stat_bw_hz(s.rbw_hz) * s.averages
        sigma = math.hypot(
            density * band / math.sqrt(cells),
            math.sqrt(2 * density * s.enbw_hz * line_w / s.averages),
        )
        assert line_read == pytest.approx(line_w, abs=5 * sigma)


def test_noise_density_marker_reads_the_true_density_with_any_averaging():
    bench = clean_bench()
    bench.set_path(Path.TERMINATION)
    s = bench.analyzer.configure(
        request(
            span_hz=20e6,
            rbw_hz=100e3,
            points=1001,
            averages=400,
            attenuation_db=0.0,
            detector=Detector.RMS,
        )
    )
    r = bench.analyzer.read_marker(2e9, MarkerKind.NOISE_DENSITY, band_hz=10e6)
    expected = 10 * np.log10(bench.truth(2e9)["displayed_termination_cold_w_per_hz"][0] / 1e-3)
    assert r.instrument_corrected and r.kind is MarkerKind.NOISE_DENSITY
    # radiometer equation (docs/references.md §7): band / B_stat independent cells per sweep
    looks = 10e6 / s.rbw_filter.stat_bw_hz(s.rbw_hz) * s.averages
    c_db = 10 / np.log(10)
    assert r.value_db == pytest.approx(expected, abs=5 * c_db / np.sqrt(looks))
    bench.analyzer.configure(
        request(
            span_hz=20e6,
            rbw_hz=100e3,
            points=1001,
            averages=400,
            attenuation_db=0.0,
            detector=Detector.SAMPLE,
            averaging_scale=AveragingScale.LOG_POWER,
        )
    )
    r = bench.analyzer.read_marker(2e9, MarkerKind.NOISE_DENSITY, band_hz=10e6)
    # a noise marker removes the detector bias it knows (docs/references.md §6b: log averaging reads
    # 10 log10(e) gamma = 2.51 dB low) and says so; log samples scatter pi / sqrt(6)
    assert r.instrument_corrected
    tol = 5 * c_db * (np.pi / np.sqrt(6)) / np.sqrt(looks)
    assert r.value_db == pytest.approx(expected, abs=tol)
    with pytest.raises(InputError) as err:
        bench.analyzer.read_marker(3e9, MarkerKind.NOISE_DENSITY)
    assert err.value.field == "marker.freq_hz"


NOISE_MARKER_CASES = {
    "rms-power": dict(detector=Detector.RMS),
    "sample-log": dict(detector=Detector.SAMPLE, averaging_scale=AveragingScale.LOG_POWER),
    "sample-voltage": dict(detector=Detector.SAMPLE, averaging_scale=AveragingScale.VOLTAGE),
    "average-log": dict(detector=Detector.AVERAGE, averaging_scale=AveragingScale.LOG_POWER),
    "sample-log-narrow-vbw": dict(
        detector=Detector.SAMPLE, vbw_hz=10e3, averaging_scale=AveragingScale.LOG_POWER
    ),
}


@pytest.mark.parametrize("case", list(NOISE_MARKER_CASES))
def test_noise_density_marker_agrees_exactly_with_the_trace_estimate(case):
    from noisebench.science.estimator import density_from_marker, estimate_density
    from noisebench.sims.analyzer import marker_from_trace

    bench = clean_bench(seed=4)
    bench.set_path(Path.TERMINATION)
    s = bench.analyzer.configure(
        request(
            span_hz=10e6,
            rbw_hz=100e3,
            points=201,
            averages=10,
            attenuation_db=0.0,
            **NOISE_MARKER_CASES[case],
        )
    )
    if case in ("average-log", "sample-log-narrow-vbw"):
        assert s.detector_samples > 1  # the cases that need the sample count
    trace = bench.analyzer.acquire_trace()
    band = 21 * s.span_hz / (s.points - 1)  # band edges on cell edges: exactly 21 points
    reading = marker_from_trace(trace, 2e9, MarkerKind.NOISE_DENSITY, band)
    # the marker is bias-corrected and divided by the ENBW, and it says so; the estimator then
    # adds nothing, and both read the same number from the same points
    assert reading.instrument_corrected
    from_marker = density_from_marker(reading)
    from_trace = estimate_density(trace, freq_hz=2e9, band_hz=band, reject_spurs=False)
    assert from_trace.bins_used == 21
    ratio = from_marker.density_w_per_hz / from_trace.density_w_per_hz
    assert ratio == pytest.approx(1.0, rel=1e-9)  # (W/Hz values: compare the ratio)
    assert from_marker.bias_correction_db == 0.0


def test_noise_density_marker_of_a_peak_detector_is_raw_and_says_so():
    from noisebench.sims.analyzer import marker_from_trace

    bench = clean_bench()
    bench.set_path(Path.TERMINATION)
    s = bench.analyzer.configure(
        request(span_hz=10e6, rbw_hz=100e3, points=201, detector=Detector.PEAK, attenuation_db=0.0)
    )
    trace = bench.analyzer.acquire_trace()
    band = 21 * s.span_hz / (s.points - 1)
    reading = marker_from_trace(trace, 2e9, MarkerKind.NOISE_DENSITY, band)
    # no known noise statistics: the uncorrected form (mean point power / nominal RBW)
    assert not reading.instrument_corrected
    inside = np.abs(trace.freq_hz - 2e9) < band / 2
    raw = float(np.mean(dbm_to_w(trace.values[inside]))) / s.rbw_hz
    assert dbm_to_w(reading.value_db) / raw == pytest.approx(1.0, rel=1e-12)


def _flat_trace(level_dbm: float = -90.0, **kw):
    from noisebench.bench.acquisition import AcquisitionSettings, Trace

    fields = dict(
        center_hz=2e9,
        span_hz=1e6,
        rbw_hz=30e3,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=1,
        points=101,
        detector_samples=1.0,
    )
    fields.update(kw)
    s = AcquisitionSettings(**fields)
    return Trace(freq_hz=s.frequencies_hz(), values=np.full(s.points, level_dbm), settings=s)


@pytest.mark.parametrize(
    ("freq_hz", "band_hz"),
    [
        (2e9, 500e3),
        (2e9 + 3.3e3, 123.4e3),
        (2e9 - 0.2e6, 40e3),
        (2e9, 1e6 + 10e3),
        (2e9 + 1e3, 4e3),
    ],
)
def test_band_power_marker_integrates_exactly_the_band(freq_hz, band_hz):
    from noisebench.sims.analyzer import marker_from_trace

    trace = _flat_trace()
    s = trace.settings
    reading = marker_from_trace(trace, freq_hz, MarkerKind.BAND_POWER, band_hz)
    # flat noise: P per point is density x ENBW, so the band holds density x band exactly
    # (before: n points x spacing, one spacing too wide for a band of whole spacings)
    density = float(dbm_to_w(-90.0)) / s.enbw_hz
    assert reading.band_hz == band_hz
    assert dbm_to_w(reading.value_db) / (density * band_hz) == pytest.approx(1.0, rel=1e-12)


def test_band_power_and_noise_markers_share_one_band_definition():
    from noisebench.sims.analyzer import marker_from_trace

    bench = clean_bench(seed=2)
    bench.set_path(Path.TERMINATION)
    bench.analyzer.configure(
        request(span_hz=10e6, rbw_hz=100e3, points=201, averages=3, attenuation_db=0.0)
    )
    trace = bench.analyzer.acquire_trace()
    for freq, band in [(2e9, 1e6), (2e9 + 17e3, 333e3), (1.998e9, 60e3)]:
        power = marker_from_trace(trace, freq, MarkerKind.BAND_POWER, band)
        density = marker_from_trace(trace, freq, MarkerKind.NOISE_DENSITY, band)
        assert power.instrument_corrected and density.instrument_corrected
        # power averaging, no detector bias: the density marker is the band power / band
        ratio = dbm_to_w(density.value_db) * band / dbm_to_w(power.value_db)
        assert ratio == pytest.approx(1.0, rel=1e-12)


def test_marker_band_must_lie_inside_the_trace():
    from noisebench.sims.analyzer import marker_from_trace

    trace = _flat_trace()
    s = trace.settings
    spacing = s.span_hz / (s.points - 1)
    with pytest.raises(InputError) as err:  # the trace covers span + one spacing
        marker_from_trace(trace, 2e9, MarkerKind.BAND_POWER, s.span_hz + 2 * spacing)
    assert err.value.field == "marker.band_hz"
    # the automatic band shrinks near an edge and stays centred on the marker
    near = s.start_hz + 2 * spacing
    for kind in MarkerKind:
        reading = marker_from_trace(trace, near, kind)
        assert reading.band_hz == pytest.approx(5 * spacing)
        assert near - reading.band_hz / 2 >= s.start_hz - spacing / 2 - 1e-6


def test_band_weights_integrate_the_piecewise_constant_trace():
    from noisebench.science.estimator import band_weights_hz

    rng = np.random.default_rng(3)
    freq = 1e9 + np.arange(57) * 2.5e3  # cells [f - 1.25 kHz, f + 1.25 kHz]
    values = rng.exponential(size=freq.size)
    edges = np.append(freq - 1.25e3, freq[-1] + 1.25e3)
    cumulative = np.concatenate([[0.0], np.cumsum(values * 2.5e3)])

    def integral(lo, hi):  # the exact integral of the step function, from its antiderivative
        return float(np.interp(hi, edges, cumulative) - np.interp(lo, edges, cumulative))

    for centre, band in [
        (1.00007e9, 31e3),
        (1e9, 2.5e3),
        (1.0000713e9, 1.1e3),
        (freq.mean(), 57 * 2.5e3),
    ]:
        w = band_weights_hz(freq, centre, band)
        assert np.sum(w) == pytest.approx(band, rel=1e-12)
        assert np.all(w >= 0) and np.all(w <= 2.5e3 * (1 + 1e-12))
        assert float(w @ values) == pytest.approx(
            integral(centre - band / 2, centre + band / 2), rel=1e-12
        )
    with pytest.raises(InputError) as err:
        band_weights_hz(freq, 1e9, 0.0)
    assert err.value.field == "band_hz"


def test_acquisition_on_a_real_time_clock_never_moves_time_backwards():
    bench = clean_bench()
    bench.analyzer.configure(request(averages=4))
    expected = bench.analyzer.expected_acquisition_time_s()
    # a clock that counts wall time a billion-fold: computing the trace takes longer (on this
    # clock) than the acquisition itself, so the end time has passed when the trace is ready
    bench.clock.real_time_factor = 1e9
    before = bench.clock.now_s
    trace = bench.analyzer.acquire_trace()
    assert bench.clock.now_s >= before + expected
    assert trace.acquisition_time_s == pytest.approx(expected, rel=1e-12)  # instrument time


def test_replace_dut_swaps_only_the_dut():
    bench = SimulatedBench.from_scenario("demo-lna", seed=7)
    bench.analyzer.configure(request(averages=2))
    bench.set_path(Path.THROUGH)
    bench.analyzer.acquire_trace()
    clock, enr, settings = bench.clock.now_s, bench.enr_calibration, bench.analyzer.settings
    through = bench.truth(2e9)["displayed_through_cold_w_per_hz"][0]
    dut = bench.scenario.dut
    other = dut.model_copy(
        update={
            "name": "unit 2",
            "nf_db": [v + 1.0 for v in dut.nf_db],
            "gain_db": [v - 2.0 for v in dut.gain_db],
        }
    )
    bench.replace_dut(other)
    truth = bench.truth(2e9)
    nf = np.interp(2e9, dut.freq_hz, dut.nf_db) + 1.0
    assert truth["nf_db"][0] == pytest.approx(nf, abs=1e-9)
    assert (
        bench.scenario.dut == other
        and bench.scenario.analyzer == load_scenario("demo-lna").analyzer
    )
    # nothing else moved: time, the operator's ENR table, settings, path, the other paths
    assert bench.clock.now_s == clock and bench.enr_calibration == enr
    assert bench.analyzer.settings == settings and bench.path is Path.THROUGH
    assert truth["displayed_through_cold_w_per_hz"][0] == through
    with pytest.raises(InputError) as err:
        bench.replace_dut({"name": "not a spec"})
    assert err.value.field == "dut"


def test_station_installs_a_unit_through_replace_dut():
    from noisebench.frontends.station import install_scenario_dut

    bench = SimulatedBench.from_scenario("demo-lna", seed=7)
    calls = []
    original = bench.replace_dut
    bench.replace_dut = lambda spec: (calls.append(spec), original(spec))[1]
    unit = load_scenario("demo-lna", dut__nf_db=[2.0] * 14, dut__name="unit 3")
    install_scenario_dut(bench, unit)
    assert calls == [unit.dut] and bench.scenario.dut == unit.dut
    assert bench.truth(2e9)["nf_db"][0] == pytest.approx(2.0, abs=1e-9)


def test_reset_restores_power_on_settings():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    bench.analyzer.set_filter_shape("synchronous", poles=5)
    bench.analyzer.configure(request(attenuation_db=30.0, preamp=True))
    bench.analyzer.set_noise_drive(True)
    bench.reset()
    s = bench.analyzer.settings
    assert s.attenuation_db == 10.0 and s.preamp is False and s.center_hz == 1e9
    assert s.rbw_filter.kind is FilterKind.GAUSSIAN
    assert not bench.analyzer.noise_drive_on and not bench.noise_source.is_hot


def test_paths_and_bad_path():
    bench = SimulatedBench.from_scenario("demo-lna", seed=0)
    bench.set_path("THROUGH")
    assert bench.path is Path.THROUGH
    bench.set_path(Path.TERMINATION)
    assert bench.path is Path.TERMINATION
    with pytest.raises(InputError) as err:
        bench.set_path("open")
    assert err.value.field == "path"


def test_same_seed_same_trace_other_seed_other_trace():
    def trace(seed):
        b = SimulatedBench.from_scenario("demo-lna", seed=seed)
        b.analyzer.configure(request(averages=3))
        return b.analyzer.acquire_trace().values

    assert np.array_equal(trace(5), trace(5))
    assert not np.array_equal(trace(5), trace(6))


def test_dbm_conversion_helper():
    assert dbm_to_w(0.0) == pytest.approx(1e-3)
    assert dbm_to_w(-30.0) == pytest.approx(1e-6)

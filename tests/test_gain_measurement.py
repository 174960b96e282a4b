"""Gain and loss tables (our CSV, Touchstone) and the generator + analyzer gain measurement."""

from __future__ import annotations

import math

import numpy as np
import pytest
import skrf
from pydantic import ValidationError

from noisebench.errors import InputError, MeasurementError, SafetyError
from noisebench.running.gain_measurement import (
    GainMeasurementPlan,
    GainStage,
    _reduce_pass,
    choose_level_dbm,
    measure_gain,
    snr_db,
)
from noisebench.science.gain_files import GainTable, load_gain_table
from noisebench.sims.bench import Path, SimulatedBench

CABLE_CSV = """# description: input cable, 1.5 m
# serial: CBL-0107
# temperature_k: 296.5
freq_mhz,loss_db,u_loss_db
100,0.20,0.02
3000,1.10,0.03
6000,1.60,0.05
"""


# ----------------------------------------------------------------------------- CSV tables


def test_csv_loss_table_with_metadata_and_unit_conversion():
    table = GainTable.from_csv(CABLE_CSV)
    assert table.range_hz == (100e6, 6e9)
    assert table.metadata["serial"] == "CBL-0107" and table.temperature_k == 296.5
    value = table.at(3e9)
    assert value.gain_db == pytest.approx(-1.10) and value.loss_db == pytest.approx(1.10)
    assert value.u_gain_db == pytest.approx(0.03) and value.extrapolated is False


def test_interpolation_is_linear_in_db_not_in_power():
    table = GainTable.from_csv("freq_hz,gain_db\n1e9,10\n2e9,20\n")
    mid = table.at(1.5e9).gain_db
    assert mid == pytest.approx(15.0)  # linear in dB (common practice)
    linear_power_mid = 10 * math.log10((10**1.0 + 10**2.0) / 2)
    assert abs(mid - linear_power_mid) > 1.0  # 17.4 dB: clearly a different rule
    values = table.at(np.array([1e9, 1.25e9, 2e9]))
    assert np.allclose(values.gain_db, [10.0, 12.5, 20.0])
    assert values.u_gain_db is None and values.extrapolated.dtype == bool


def test_outside_the_range_is_refused_unless_clamping_is_asked():
    table = GainTable.from_csv(CABLE_CSV)
    with pytest.raises(InputError, match="7 GHz is outside the range") as info:
        table.at(7e9)
    assert info.value.field == "freq_hz"
    clamped = table.at(np.array([50e6, 7e9]), extrapolate="clamp")
    assert np.allclose(clamped.gain_db, [-0.20, -1.60])
    assert clamped.extrapolated.tolist() == [True, True]


def test_flat_tables_and_constants():
    flat = GainTable.from_csv("# note: attenuator\nloss_db,u_loss_db\n10.0,0.1\n")
    assert flat.is_flat and flat.at(5e9).gain_db == -10.0 and flat.at(5e9).u_gain_db == 0.1
    assert GainTable.constant(20.0).at(1e9).gain_db == 20.0
    assert GainTable.constant_loss(0.5).at([1e9, 2e9]).gain_db.tolist() == [-0.5, -0.5]
    with pytest.raises(InputError, match="holds one row"):
        GainTable.from_csv("gain_db\n1\n2\n")


def test_csv_round_trip_keeps_values_and_metadata():
    table = GainTable.from_csv(CABLE_CSV)
    again = GainTable.from_csv(table.to_csv())
    assert np.array_equal(again.freq_hz, table.freq_hz)
    assert np.allclose(again.gain_db, table.gain_db)
    assert np.allclose(again.u_gain_db, table.u_gain_db)
    assert again.metadata == table.metadata


@pytest.mark.parametrize(
    "text, where, message",
    [
        ("freq_hz,gain_db\n1e9,20\n0.9e9,21\n", "line 3, freq_hz", "not strictly ascending"),
        ("freq_hz,gain_db\n1e9,abc\n", "line 2, gain_db", "not a number"),
        ("freq_hz,gain_db\n1e9,150\n", "line 2, gain_db", "not a plausible gain"),
        ("freq_hz,loss_db\n1e9,250\n", "line 2, loss_db", "not a plausible loss"),
        ("freq_hz,gain_db,u_gain_db\n1e9,20,-0.1\n", "line 2, u_gain_db", ">= 0"),
        ("freq_hz,gain\n1e9,20\n", "line 1, header", "unknown column"),
        ("freq_hz,gain_db,loss_db\n1e9,20,1\n", "line 1, header", "exactly one"),
        ("freq_hz,loss_db,u_gain_db\n1e9,1,0.1\n", "line 1, header", "u_loss_db"),
        ("freq_hz,gain_db\n1e9,20,3\n", "line 2", "3 fields"),
        ("# only a comment\n", "gain text", "no header"),
        ("freq_hz,gain_db\n", "gain text", "no data rows"),
        ("# temperature_k: hot\nfreq_hz,gain_db\n1e9,1\n", "temperature_k", "temperature in K"),
        ("freq_hz,gain_db\nnan,1\n", "line 2, freq_hz", "finite"),
    ],
)
def test_csv_problems_name_the_line_and_the_field(text, where, message):
    with pytest.raises(InputError) as info:
        GainTable.from_csv(text)
    assert where in info.value.field
    assert message in str(info.value)


def test_missing_file_is_a_clear_input_error(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_gain_table(tmp_path / "missing.csv")
    path = tmp_path / "dut.csv"
    path.write_text("freq_ghz,gain_db\n1,20\n2,21\n")
    assert load_gain_table(path).at(1.5e9).gain_db == pytest.approx(20.5)
    with pytest.raises(InputError, match="Touchstone files only"):
        load_gain_table(path, u_gain_db=0.1)


# ----------------------------------------------------------------------------- Touchstone


def _amplifier_s2p(tmp_path) -> tuple[object, skrf.Network]:
    """A two-port with a smooth |S21| and a fast phase slope (an electrically long part)."""
    freq = skrf.Frequency(1.0, 3.0, 5, unit="GHz")
    mag_db = np.array([20.0, 20.5, 21.0, 20.0, 19.0])
    phase = -2 * np.pi * freq.f * 0.5e-9  # 0.5 ns of delay: a quarter turn between points
    s = np.zeros((5, 2, 2), dtype=complex)
    s[:, 1, 0] = 10 ** (mag_db / 20) * np.exp(1j * phase)
    s[:, 0, 0] = s[:, 1, 1] = 0.05
    s[:, 0, 1] = 0.001  # reverse isolation 60 dB
    network = skrf.Network(frequency=freq, s=s, name="lna")
    network.write_touchstone(str(tmp_path / "lna"))
    return tmp_path / "lna.s2p", network


def test_touchstone_gain_is_s21_in_db_and_interpolated_in_db(tmp_path):
    path, network = _amplifier_s2p(tmp_path)
    table = load_gain_table(path, u_gain_db=0.05)
    # reference: scikit-rf - Network.s_db[:, 1, 0] is |S21| in dB versus Network.f
    reread = skrf.Network(str(path))
    assert np.allclose(table.freq_hz, reread.f)
    assert np.allclose(table.gain_db, reread.s_db[:, 1, 0], atol=1e-9)
    mid = table.at(1.25e9)
    assert mid.gain_db == pytest.approx((20.0 + 20.5) / 2)
    assert mid.u_gain_db == 0.05
    # scikit-rf's default (complex) interpolation between the same points dips: the reason
    # for interpolating dB (scikit-rf 2.2 Network.interpolate, measured here)
    complex_mid = reread.interpolate(skrf.Frequency(1.25, 1.25, 1, unit="GHz"))
    assert complex_mid.s_db[0, 1, 0] < mid.gain_db - 1.0  # about 3 dB low here


def test_touchstone_with_other_port_counts_is_refused(tmp_path):
    one_port = skrf.Network(
        frequency=skrf.Frequency(1, 2, 3, unit="GHz"), s=np.full((3, 1, 1), 0.1 + 0j)
    )
    one_port.write_touchstone(str(tmp_path / "load"))
    with pytest.raises(InputError, match="two-port"):
        load_gain_table(tmp_path / "load.s1p")
    with pytest.raises(InputError, match="not found"):
        load_gain_table(tmp_path / "missing.s2p")


# ----------------------------------------------------------------------------- level and SNR


def _plan(**kw) -> GainMeasurementPlan:
    base = dict(freqs_hz=[1e9, 3e9], expected_gain_db=30.0, dut_p1db_out_dbm=14.0)
    base.update(kw)
    return GainMeasurementPlan(**base)


def test_level_stays_20_db_below_compression_and_below_the_analyzer_limit():
    level, reason = choose_level_dbm(_plan())
    assert (level, reason) == (-40.0, "analyzer input (DUT pass)")  # -10 dBm - 30 dB
    level, reason = choose_level_dbm(_plan(dut_p1db_out_dbm=0.0))
    assert (level, reason) == (-50.0, "DUT compression")  # 0 - 20 - 30 dB
    assert level + 30.0 <= 0.0 - 20.0
    level, reason = choose_level_dbm(_plan(generator_max_dbm=-60.0))
    assert (level, reason) == (-60.0, "generator maximum")
    level, _ = choose_level_dbm(_plan(expected_gain_db=-6.0, dut_p1db_out_dbm=30.0))
    assert level == -10.0  # an attenuator: the through pass sets the limit
    with pytest.raises(MeasurementError, match="below the generator's minimum"):
        choose_level_dbm(_plan(generator_min_dbm=-30.0))


def test_plan_validation():
    with pytest.raises(ValidationError):
        _plan(freqs_hz=[2e9, 1e9])
    with pytest.raises(ValidationError):
        _plan(compression_backoff_db=5.0)  # less than 10 dB of back-off is refused
    with pytest.raises(ValidationError):
        _plan(readings=1)  # repeatability needs two readings
    with pytest.raises(ValidationError):
        _plan(rbw=1e3)


def test_snr_of_a_reading_that_holds_tone_and_noise():
    assert float(snr_db(1e-6, 1e-9)) == pytest.approx(10 * math.log10(999))
    with pytest.raises(MeasurementError):
        snr_db(1e-9, 1e-9)


def test_pass_reduction_removes_the_noise_and_gives_type_a_and_b_terms():
    readings = [-30.0, -30.1, -29.9]
    result = _reduce_pass(readings, -70.0, freq_hz=1e9, stage="through", min_snr=30.0)
    mean_w = np.mean(10 ** (np.array(readings) / 10)) * 1e-3
    tone_w = mean_w - 1e-10
    assert result.tone_dbm == pytest.approx(10 * math.log10(tone_w / 1e-3))
    # reference: JCGM 100:2008 4.2.3 - standard deviation of the mean
    assert result.u_repeat_db == pytest.approx(np.std(readings, ddof=1) / math.sqrt(3))
    # rectangular bound of the removed noise, c_dB * (N/S) / sqrt(3) (JCGM 100:2008 4.3.7)
    assert result.u_snr_db == pytest.approx(10 / math.log(10) * 1e-10 / tone_w / math.sqrt(3))
    with pytest.raises(MeasurementError, match="only 20.0 dB above the noise") as info:
        _reduce_pass(readings, -50.0, freq_hz=2e9, stage="dut", min_snr=30.0)
    assert "narrow the RBW" in str(info.value) and info.value.context["freq_hz"] == 2e9


# ----------------------------------------------------------------------------- procedure


def _connect(bench, calls):
    def connect(stage: GainStage) -> None:
        calls.append(stage)
        bench.set_path(Path(stage.value))

    return connect


def test_measured_gain_matches_the_simulated_path_gain_within_its_uncertainty():
    bench = SimulatedBench.from_scenario("demo-lna", seed=3, ideal=True)
    freqs = [0.5e9, 2e9, 5e9]
    calls: list[GainStage] = []
    result = measure_gain(
        bench.analyzer,
        bench.generator,
        _plan(freqs_hz=freqs),
        _connect(bench, calls),
        noise_source=bench.noise_source,
    )
    assert calls == [GainStage.THROUGH, GainStage.DUT]
    assert not bench.generator.output_on and not bench.noise_source.is_hot
    truth = bench.truth(np.array(freqs))
    # the THROUGH pass omits the DUT's input cable (noisebench/sims/bench.py), so the path gain is
    # the
    # DUT gain minus that cable's loss
    expected = truth["gain_db"] - truth["input_loss_db"]
    for point, want in zip(result.points, expected, strict=True):
        assert abs(point.gain_db - want) < 4 * point.u_gain_db
        assert point.snr_through_db >= 30 and point.snr_dut_db >= 30
        assert set(point.uncertainty_db) == {"repeatability", "snr", "linearity", "mismatch"}
        assert point.u_gain_db >= point.uncertainty_db["linearity"]
        assert point.flags == []
    assert result.generator_level_dbm == -40.0
    table = result.to_table()
    assert table.at(2e9).gain_db == pytest.approx(result.points[1].gain_db)
    assert result.identities["analyzer"] == bench.analyzer.identity


def test_gain_above_the_expected_value_is_flagged_near_compression():
    bench = SimulatedBench.from_scenario("demo-lna", seed=3, ideal=True)
    result = measure_gain(
        bench.analyzer,
        bench.generator,
        _plan(freqs_hz=[1e9], expected_gain_db=20.0),
        _connect(bench, []),
    )
    assert result.points[0].flags == ["output_near_compression"]  # ~27.6 dB, not 20 dB


def test_too_little_snr_stops_with_the_frequency_and_leaves_the_generator_off():
    bench = SimulatedBench.from_scenario("demo-lna", seed=3, ideal=True)
    plan = _plan(freqs_hz=[1e9], rbw_hz=1e6, generator_max_dbm=-95.0)
    with pytest.raises(MeasurementError, match="through pass at 1 GHz"):
        measure_gain(bench.analyzer, bench.generator, plan, _connect(bench, []))
    assert not bench.generator.output_on


def test_level_above_the_analyzer_rating_is_refused_before_any_output():
    bench = SimulatedBench.from_scenario("demo-lna", seed=3, analyzer__max_input_power_dbm=0.0)
    plan = _plan(expected_gain_db=0.0, dut_p1db_out_dbm=40.0, analyzer_max_input_dbm=10.0)
    calls: list[GainStage] = []
    with pytest.raises(SafetyError, match="rated"):
        measure_gain(bench.analyzer, bench.generator, plan, _connect(bench, calls))
    assert calls == [] and not bench.generator.output_on

"""The SCPI drivers through real pyvisa + pyvisa-py sockets against the simulator's server."""

from __future__ import annotations

import numpy as np
import pytest

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AveragingScale,
    Detector,
    MarkerKind,
    SweepMode,
    Trace,
)
from noisebench.bench.registry import simulated_enr_table
from noisebench.drivers import (
    AnalyzerDriveNoiseSource,
    VisaSession,
    check_source_switching,
    open_analyzer,
    open_generator,
    open_supply_noise_source,
)
from noisebench.drivers.profile import load_profile, parse_profile
from noisebench.drivers.transport import BlockError
from noisebench.errors import (
    CommunicationError,
    InstrumentError,
    InstrumentTimeout,
    MeasurementError,
    SafetyError,
)
from noisebench.running.gain_measurement import GainMeasurementPlan, measure_gain
from noisebench.science.filters import RbwFilter
from noisebench.sims.analyzer import marker_from_trace

RbwFilter(kind="fft", window="hann")  # warm scipy.signal up: its first import takes ~1.5 s

# normal exchanges: generous; a fault that must run into a timeout: short but >> any reply
TIMEOUT_S = 30.0
FAULT_TIMEOUT_S = 3.0

REQUEST = AcquisitionRequest(center_hz=1e9, span_hz=10e6, rbw_hz=110e3, averages=4, points=401)


@pytest.fixture
def analyzer(sim_server):
    sa = open_analyzer(sim_server.resource("analyzer"), timeout_s=TIMEOUT_S)
    yield sa
    sa.close()


def _server_settings(sim_server):
    return sim_server.bench.analyzer.settings


def _commands(sim_server, instrument="analyzer"):
    return [line for who, line in sim_server.command_log if who == instrument]


# ----------------------------------------------------------------------------- settings


@pytest.mark.parametrize(
    "request_",
    [
        REQUEST,
        AcquisitionRequest(
            center_hz=1.234567891e9,
            span_hz=7e6,
            rbw_hz=110e3,
            vbw_hz=33e3,
            averages=7,
            points=333,
            attenuation_db=11.0,
            ref_level_dbm=-17.3,
            preamp=True,
            detector=Detector.SAMPLE,
            averaging_scale=AveragingScale.LOG_POWER,
        ),
        AcquisitionRequest(
            center_hz=2e9,
            span_hz=20e6,
            rbw_hz=30e3,
            mode=SweepMode.FFT,
            detector=Detector.AVERAGE,
            averaging_scale=AveragingScale.VOLTAGE,
        ),
        AcquisitionRequest(
            center_hz=3e9,
            span_hz=0.0,
            rbw_hz=1e6,
            points=101,
            sweep_time_s=0.01,
            detector=Detector.PEAK,
        ),
    ],
    ids=["swept", "every-option", "fft", "zero-span"],
)
def test_every_setting_round_trips_exactly_as_the_instrument_applied_it(
    analyzer, sim_server, request_
):
    applied = analyzer.configure(request_)
    assert applied == _server_settings(sim_server)  # read back, not assumed
    assert applied.detector is request_.detector
    assert applied.averaging_scale is request_.averaging_scale


def test_rbw_and_attenuation_rounding_is_read_back(analyzer):
    # reference: noisebench/sims/SCPI.md - RBW on a 1-2-3-5 sequence, attenuation in 2 dB steps
    applied = analyzer.configure(REQUEST.model_copy(update={"attenuation_db": 11.0}))
    assert applied.rbw_hz == 100e3
    assert applied.attenuation_db in (10.0, 12.0)
    assert analyzer.verify_settings() == {}


# ----------------------------------------------------------------------------- traces


def test_binary_and_ascii_transfer_are_bit_identical(analyzer, sim_server):
    analyzer.configure(REQUEST)
    trace = analyzer.acquire_trace()
    assert isinstance(trace, Trace) and trace.values.size == 401
    assert trace.instrument == analyzer.identity
    assert trace.acquisition_time_s >= analyzer.expected_acquisition_time_s() > 0
    # the same trace memory again, as ASCII and through pyvisa's own block codec
    ascii_text = analyzer.transport.query("FORM ASC;:TRAC? TRACE1")
    ascii_values = np.array([float(v) for v in ascii_text.split(",")])
    codec = VisaSession(
        sim_server.resource("analyzer"), timeout_s=TIMEOUT_S, binary_reader="pyvisa"
    )
    try:
        codec.write("FORM REAL,32")
        codec_values = codec.query_binary("TRAC? TRACE1")
    finally:
        codec.close()
    assert np.array_equal(ascii_values, trace.values)
    assert np.array_equal(codec_values, trace.values)


def test_ascii_transfer_through_the_driver(analyzer):
    analyzer.configure(REQUEST)
    analyzer.set_trace_transfer("ascii")
    trace = analyzer.acquire_trace()
    assert trace.values.size == 401 and np.all(np.isfinite(trace.values))


@pytest.mark.parametrize("kind", [MarkerKind.BAND_POWER, MarkerKind.NOISE_DENSITY])
def test_markers_match_the_trace_they_were_read_from(analyzer, kind):
    settings = analyzer.configure(REQUEST)
    band = 300e3 if kind is MarkerKind.BAND_POWER else None
    reading = analyzer.read_marker(1.001e9, kind, band)
    analyzer.transport.write("FORM REAL,32")
    values = analyzer.transport.query_binary("TRAC? TRACE1")  # the marker's acquisition
    trace = Trace(freq_hz=settings.frequencies_hz(), values=values, settings=settings)
    local = marker_from_trace(trace, 1.001e9, kind, band)
    assert reading.kind is kind and reading.freq_hz == 1.001e9
    assert reading.instrument_corrected is True  # RMS detector, power averaging
    # float32 trace memory vs the value computed before rounding: well below 1e-3 dB
    assert reading.value_db == pytest.approx(local.value_db, abs=1e-3)


# ----------------------------------------------------------------------------- faults


def test_timeout_raises_instrument_timeout_and_the_session_stays_usable(sim_server):
    # a retry window of 0: one recovery attempt, no backoff (tests/test_recovery.py has those)
    text = open(load_profile("generic").source, encoding="utf-8").read()
    once = parse_profile(text.replace("max_error_entries = 32", "retry_window_s = 0"))
    sa = open_analyzer(sim_server.resource("analyzer"), once, timeout_s=1.0, retries=1)
    try:
        sim_server.faults.hold_replies = True  # no reply can beat the timeout, however busy
        with pytest.raises(InstrumentTimeout) as info:
            sa.read_settings()
        assert info.value.visa_code is not None
        sim_server.faults.clear()
        assert sa.read_settings().points > 0
    finally:
        sim_server.faults.clear()
        sa.close()


def test_drop_mid_block_reconnects_reapplies_the_settings_and_retries(sim_server):
    # pyvisa-py does not see the peer close mid-read: the rest of the block costs one timeout,
    # so it is short, yet far longer than any loopback exchange on a loaded machine
    analyzer = open_analyzer(sim_server.resource("analyzer"), timeout_s=FAULT_TIMEOUT_S)
    applied = analyzer.configure(REQUEST)
    sim_server.faults.drop_mid_block = True
    try:
        trace = analyzer.acquire_trace()
    finally:
        analyzer.close()
    assert trace.settings == applied and trace.values.size == 401
    assert "reconnected" in analyzer.recovery_log[-1]
    log = _commands(sim_server)
    after_drop = log[max(i for i, c in enumerate(log) if c == "*IDN?") :]
    assert "BAND 110000" in after_drop and "SWE:POIN 401" in after_drop  # re-applied
    assert after_drop.count("READ?") == 1  # then acquired again (generic: one READ?)


@pytest.mark.parametrize("fault", ["truncate_block", "corrupt_block"])
def test_broken_blocks_are_retried_or_reported_clearly(sim_server, fault):
    sa = open_analyzer(sim_server.resource("analyzer"), timeout_s=FAULT_TIMEOUT_S, retries=1)
    try:
        sa.configure(REQUEST)
        setattr(sim_server.faults, fault, True)
        assert sa.acquire_trace().values.size == 401  # one-shot fault: the retry succeeds
        strict = open_analyzer(
            sim_server.resource("analyzer"), timeout_s=FAULT_TIMEOUT_S, retries=0
        )
        try:
            strict.configure(REQUEST)
            setattr(sim_server.faults, fault, True)
            with pytest.raises(BlockError) as info:
                strict.acquire_trace()
            assert isinstance(info.value, CommunicationError)
            assert info.value.context["command"] == "READ?"  # the generic profile's fetch
        finally:
            strict.close()
    finally:
        sa.close()


def test_drop_after_commands_is_recovered(analyzer, sim_server):
    analyzer.configure(REQUEST)
    sim_server.faults.drop_after_commands = 2
    assert analyzer.acquire_trace().values.size == 401
    assert analyzer.recovery_log


def test_pushed_error_queue_entry_names_the_command(analyzer, sim_server):
    analyzer.configure(REQUEST)
    sim_server.faults.push_error(-222, "Data out of range")
    wider = REQUEST.model_copy(update={"rbw_hz": 220e3})
    with pytest.raises(InstrumentError) as info:
        analyzer.configure(wider)
    assert info.value.code == -222 and "Data out of range" in info.value.text
    # the generic profile reads the error queue once per step: the step is named, with the
    # commands sent since the last read - only the changed setting (settings cache)
    assert info.value.command == "configure"
    assert "BAND 220000" in str(info.value)
    # after the failure the cache is dropped: everything is sent again
    before = len(sim_server.command_log)
    assert analyzer.configure(REQUEST).rbw_hz == 100e3
    sent = [line for _, line in sim_server.command_log[before:]]
    assert "INIT:CONT OFF" in sent and "BAND 110000" in sent


def _settings_sent(log) -> list[str]:
    """The non-query program message units of the logged lines (a compound line
    ``FREQ:CENT 1.2E9;:FREQ:CENT?;:SYST:ERR?`` holds one setting and two queries)."""
    units = (unit.strip().lstrip(":") for _, line in log for unit in line.split(";"))
    return [unit for unit in units if unit and not unit.endswith("?")]


def test_settings_cache_sends_only_what_changed_and_everything_after_a_reconnect(
    analyzer, sim_server
):
    applied = analyzer.configure(REQUEST)
    start = len(sim_server.command_log)
    assert analyzer.configure(REQUEST) == applied  # the same request: no I/O at all
    assert len(sim_server.command_log) == start
    moved = REQUEST.model_copy(update={"center_hz": 1.2e9})
    settings = analyzer.configure(moved)
    assert settings.center_hz == pytest.approx(1.2e9)
    sent = _settings_sent(sim_server.command_log[start:])
    assert len(sent) == 1 and sent[0].startswith("FREQ:CENT")  # one setting written
    sim_server.faults.drop_after_commands = 1  # the connection drops: a reconnect follows
    assert analyzer.acquire_trace().values.size == 401
    after = len(sim_server.command_log)
    analyzer.configure(REQUEST)
    resent = _settings_sent(sim_server.command_log[after:])
    assert "BAND 110000" in resent and "INIT:CONT OFF" in resent  # the cache was dropped


def test_reboot_is_detected_by_read_back_and_the_settings_reapplied(analyzer, sim_server):
    applied = analyzer.configure(REQUEST)
    analyzer.set_sim_path("through")
    sim_server.faults.reboot()
    trace = analyzer.acquire_trace()
    assert analyzer.settings_changes, "the lost settings were not noticed"
    lost = analyzer.settings_changes[-1]
    assert lost["averages"] == (4, 1) and lost["points"][0] == 401
    assert trace.settings == applied == _server_settings(sim_server)
    assert sim_server.bench.path.value == "through"  # the path was restored too


def test_stuck_noise_source_is_detected_as_hot_equal_to_cold(analyzer, sim_server):
    analyzer.configure(REQUEST)
    source = AnalyzerDriveNoiseSource(analyzer, settle_time_s=0.1)
    try:
        assert check_source_switching(analyzer, source) > 3.0  # a switching source: Y >> 0
        sim_server.faults.stuck_noise_source = True
        with pytest.raises(MeasurementError, match="does not switch"):
            check_source_switching(analyzer, source)
    finally:
        source.close()


def test_supply_driven_source_switches_and_a_stuck_one_is_caught(analyzer, sim_server):
    analyzer.configure(REQUEST)
    source = open_supply_noise_source(
        sim_server.resource("supply"),
        current_limit_a=0.05,
        max_drive_v=32.0,
        settle_time_s=0.1,
        enr_table=simulated_enr_table(sim_server.bench),
        min_current_a=0.001,
        timeout_s=TIMEOUT_S,
    )
    try:
        assert source.drive_v == 28.0  # the scenario's nominal drive, from the ENR table
        source.set_hot(True)
        assert sim_server.bench.supply.measure_voltage() == pytest.approx(28.0)
        source.set_hot(False)
        assert check_source_switching(analyzer, source) > 3.0
        sim_server.faults.stuck_noise_source = True
        with pytest.raises(MeasurementError, match="does not switch"):
            check_source_switching(analyzer, source)
    finally:
        source.close()
    assert not sim_server.bench.supply.output_on


def test_overvoltage_is_refused_before_connecting(sim_server):
    with pytest.raises(SafetyError):
        open_supply_noise_source(
            sim_server.resource("supply"),
            drive_v=40.0,
            current_limit_a=0.05,
            max_drive_v=32.0,
            settle_time_s=0.0,
        )
    assert not any(who == "supply" for who, _ in sim_server.command_log)


# ----------------------------------------------------------------------------- generator, gain


def test_generator_round_trip_and_output_off_on_close(sim_server):
    gen = open_generator(sim_server.resource("generator"), timeout_s=TIMEOUT_S)
    gen.set_cw(2.5e9, -35.0)
    gen.set_output(True)
    assert sim_server.bench.generator.output_on
    assert gen.frequency_hz == 2.5e9 and gen.level_dbm == -35.0
    gen.close()
    assert not sim_server.bench.generator.output_on


def test_gain_measurement_over_scpi_recovers_the_path_gain(analyzer, sim_server):
    generator = open_generator(sim_server.resource("generator"), timeout_s=TIMEOUT_S)
    freqs = [1e9, 3e9]
    plan = GainMeasurementPlan(
        freqs_hz=freqs,
        expected_gain_db=30.0,
        dut_p1db_out_dbm=14.0,
        readings=2,
        averages=2,
        points=51,
    )
    try:
        result = measure_gain(
            analyzer, generator, plan, lambda stage: analyzer.set_sim_path(stage.value)
        )
    finally:
        generator.close()
    truth = sim_server.bench.truth(np.array(freqs))
    # the THROUGH pass omits the DUT's input cable (noisebench/sims/bench.py), so the measured path
    # gain is the DUT gain minus that cable's loss
    expected = truth["gain_db"] - truth["input_loss_db"]
    for point, want in zip(result.points, expected, strict=True):
        assert abs(point.gain_db - want) < 4 * point.u_gain_db
        assert point.snr_through_db >= 30 and point.snr_dut_db >= 30
    assert not sim_server.bench.generator.output_on

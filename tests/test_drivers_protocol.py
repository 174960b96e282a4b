"""Driver dialogues checked exchange by exchange with the scripted transport."""

from __future__ import annotations

import numpy as np
import pytest

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    MarkerKind,
    SweepMode,
    Trace,
)
from noisebench.bench.capabilities import NoiseDriveOutput
from noisebench.drivers import (
    AnalyzerDriveNoiseSource,
    CallableNoiseSource,
    OperatorNoiseSource,
    ScpiAnalyzer,
    ScpiGenerator,
    ScpiSupply,
    SupplyNoiseSource,
    check_source_switching,
    load_profile,
)
from noisebench.drivers.profile import parse_profile
from noisebench.drivers.protocol import (
    RECOVER,
    FakeTransport,
    ProtocolError,
    ieee_block,
    replay_dialogue,
)
from noisebench.drivers.transport import BlockError
from noisebench.errors import (
    InputError,
    InstrumentError,
    InstrumentTimeout,
    MeasurementError,
    SafetyError,
)
from noisebench.science.enr import EnrTable
from noisebench.science.filters import FilterKind

IDN = "noisebench,test analyzer,0,1"
OK = '0,"No error"'
# these dialogues read the error queue after every command (the generic profile reads it once
# per step; test_error_check_per_step below has that dialogue) and start, wait for and fetch
# each trace apart (read = false; tests/test_drivers_read_query.py has the READ? dialogues)
GENERIC = parse_profile(
    open(load_profile("generic").source, encoding="utf-8")
    .read()
    .replace('error_check = "step"', 'error_check = "each"')
    .replace('\nread = "READ?"\n', "\nread = false\n"),
    load_profile("generic").source,
)


def connect(identity: str = IDN) -> list:
    return [("*IDN?", identity), ("*CLS", None)]


def sets(*commands: str) -> list:
    """Each command followed by the error-queue read of error_check = "each"."""
    out = []
    for command in commands:
        out += [(command, None), ("SYST:ERR?", OK)]
    return out


REQUEST = AcquisitionRequest(center_hz=1e9, span_hz=10e6, rbw_hz=110e3, averages=10, points=401)
REQUEST_COMMANDS = (
    "INIT:CONT OFF",
    "SWE:MODE SWEPt",
    "FREQ:CENT 1000000000",
    "FREQ:SPAN 10000000",
    "BAND 110000",
    "BAND:VID:AUTO ON",
    "SWE:POIN 401",
    "DET RMS",
    "AVER:TYPE POWer",
    "AVER:COUN 10",
    "SWE:TIME:AUTO ON",
)


def readback(**replies: str) -> list:
    """The read-back queries of the generic profile (swept, Gaussian) and their replies."""
    r = {
        "center": "1.0E+09",
        "span": "1.0E+07",
        "mode": "SWEP",
        "rbw": "1.0E+05",
        "shape": "GAUS",
        "vbw": "1.0E+05",
        "det": "RMS",
        "avg_type": "POW",
        "avg": "10",
        "points": "401",
        "ref": "0",
        "att": "10",
        "preamp": "0",
        "sweep": "0.01",
        "samples": "2.5",
    }
    r.update(replies)
    out = [
        ("FREQ:CENT?", r["center"]),
        ("FREQ:SPAN?", r["span"]),
        ("SWE:MODE?", r["mode"]),
        ("BAND?", r["rbw"]),
    ]
    if r["mode"] == "FFT":
        out.append(("SWE:WIND?", '"hann"'))
    else:
        out.append(("BAND:SHAP?", r["shape"]))
        if r["shape"] == "SYNC":
            out.append(("BAND:POL?", "4"))
    out += [
        ("BAND:VID?", r["vbw"]),
        ("DET?", r["det"]),
        ("AVER:TYPE?", r["avg_type"]),
        ("AVER:COUN?", r["avg"]),
        ("SWE:POIN?", r["points"]),
        ("DISP:TRAC:Y:RLEV?", r["ref"]),
        ("INP:ATT?", r["att"]),
        ("INP:GAIN:STAT?", r["preamp"]),
        ("SWE:TIME?", r["sweep"]),
        ("DET:SAMP?", r["samples"]),
    ]
    return out


def configured(**replies: str) -> list:
    return connect() + sets(*REQUEST_COMMANDS) + readback(**replies) + [("SYST:ERR?", OK)]


def acquisition() -> list:
    return [("INIT:IMM", None), ("*OPC?", "1"), ("SYST:ERR?", OK)]


def analyzer(transport, **kwargs):
    return ScpiAnalyzer(transport, GENERIC, **kwargs)


# ----------------------------------------------------------------------------- the helper


def test_helper_fails_on_an_unexpected_command():
    with pytest.raises(ProtocolError, match="expected '\\*IDN', the driver sent '\\*IDN\\?'"):
        with replay_dialogue([("*IDN", IDN)], analyzer):
            pass


def test_helper_fails_on_a_missing_exchange():
    with pytest.raises(ProtocolError, match="never happened.*SYST:ERR"):
        with replay_dialogue(connect() + [("SYST:ERR?", OK)], analyzer):
            pass


def test_helper_fails_when_a_scripted_reply_is_not_read():
    with pytest.raises(ProtocolError, match="expects it to read the reply"):
        with replay_dialogue([("*IDN?", IDN), ("*CLS", "1")], analyzer):
            pass


def test_helper_fails_when_a_reply_is_read_that_was_not_scripted():
    transport = FakeTransport([("*IDN?", None)])
    with pytest.raises(ProtocolError, match="no text reply"):
        transport.query("*IDN?")


# ----------------------------------------------------------------------------- analyzer


def test_connect_identifies_and_clears_status_and_repr_does_no_io():
    with replay_dialogue(connect(), analyzer) as sa:
        assert sa.identity == IDN
        assert "profile='generic'" in repr(sa)
        assert sa.settings is None


def test_configure_sets_everything_then_reports_the_read_back_values():
    with replay_dialogue(configured(), analyzer) as sa:
        applied = sa.configure(REQUEST)
    assert applied.rbw_hz == 100e3  # the instrument rounded 110 kHz; the driver reports it
    assert applied.rbw_filter.kind is FilterKind.GAUSSIAN
    assert applied.sweep_time_s == 0.01 and applied.detector_samples == 2.5
    assert applied.attenuation_db == 10.0 and applied.preamp is False
    assert applied.vbw_hz == 100e3 and applied.points == 401
    assert sa.settings == applied


def test_synchronous_filter_reports_its_poles_and_fft_mode_its_window():
    with replay_dialogue(configured(shape="SYNC"), analyzer) as sa:
        assert sa.configure(REQUEST).rbw_filter.poles == 4
    request = REQUEST.model_copy(update={"mode": SweepMode.FFT})
    dialogue = (
        connect()
        + sets(*[c if c != "SWE:MODE SWEPt" else "SWE:MODE FFT" for c in REQUEST_COMMANDS])
        + readback(mode="FFT")
        + [("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        applied = sa.configure(request)
    assert applied.mode is SweepMode.FFT
    assert applied.rbw_filter.kind is FilterKind.FFT and applied.rbw_filter.window == "hann"


def test_optional_settings_are_sent_only_when_requested():
    request = REQUEST.model_copy(
        update={"ref_level_dbm": -20.0, "attenuation_db": 0.0, "preamp": True, "vbw_hz": 1e4}
    )
    commands = [c for c in REQUEST_COMMANDS if c != "BAND:VID:AUTO ON"]
    commands.insert(5, "BAND:VID 10000")
    commands[-1:-1] = ["DISP:TRAC:Y:RLEV -20", "INP:ATT 0", "INP:GAIN:STAT ON"]
    dialogue = (
        connect()
        + sets(*commands)
        + readback(ref="-20", att="0", preamp="1", vbw="1.0E+04")
        + [("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        applied = sa.configure(request)
    assert applied.preamp is True and applied.vbw_hz == 1e4 and applied.ref_level_dbm == -20


def test_profile_with_start_and_stop_only_sets_the_edges():
    text = open(GENERIC.source).read().replace('error_check = "step"', 'error_check = "each"')
    for name in ("center_hz", "span_hz"):
        block = text[text.index(f"[analyzer.settings.{name}]") :]
        block = block[: block.index("\n\n") + 2]
        text = text.replace(block, "")
    text = text.replace('"center_hz", "span_hz",', '"start_hz", "stop_hz",')
    edges = parse_profile(text, "edges.toml")
    commands = [c for c in REQUEST_COMMANDS if not c.startswith("FREQ:")]
    commands[2:2] = ["FREQ:STAR 995000000", "FREQ:STOP 1005000000"]
    replies = readback()[2:]  # no centre/span queries: start and stop instead
    dialogue = (
        connect()
        + sets(*commands)
        + [("FREQ:STAR?", "9.95E+08"), ("FREQ:STOP?", "1.005E+09")]
        + replies
        + [("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, edges)) as sa:
        applied = sa.configure(REQUEST)
    assert applied.center_hz == 1e9 and applied.span_hz == 10e6


def test_request_the_profile_cannot_apply_is_refused_before_any_io():
    text = GENERIC.source and open(GENERIC.source).read()
    text = text.replace(
        '[analyzer.settings.mode]\nset = "SWE:MODE {value}"\n'
        'get = "SWE:MODE?"\nchoices = { swept = "SWEPt", fft = "FFT" }\n',
        "",
    )
    no_fft = parse_profile(text, "no_fft.toml")
    with replay_dialogue(connect(), lambda t: ScpiAnalyzer(t, no_fft)) as sa:
        with pytest.raises(InputError, match="cannot set mode"):
            sa.configure(REQUEST.model_copy(update={"mode": SweepMode.FFT}))
        with pytest.raises(InputError) as info:
            sa.configure(REQUEST.model_copy(update={"attenuation_db": 71.0}))
        assert info.value.field == "attenuation_db"


def test_error_queue_entry_is_raised_naming_the_command():
    commands = REQUEST_COMMANDS[:4]
    dialogue = (
        connect()
        + sets(*commands[:3])
        + [
            (commands[3], None),
            ("SYST:ERR?", '-222,"Data out of range"'),
            ("SYST:ERR?", '-350,"Queue overflow"'),
            ("SYST:ERR?", OK),
        ]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        with pytest.raises(InstrumentError) as info:
            sa.configure(REQUEST)
        assert sa.settings is None
    error = info.value
    assert error.code == -222 and error.text == "Data out of range"
    assert error.command == "FREQ:SPAN 10000000"
    assert "-350" in error.context["more_errors"]


def test_step_mode_reads_the_queue_once_per_step_and_lists_the_commands():
    text = open(GENERIC.source).read().replace('error_check = "each"', 'error_check = "step"')
    step = parse_profile(text, "step.toml")
    dialogue = (
        connect()
        + [(c, None) for c in REQUEST_COMMANDS]
        + readback()
        + [("SYST:ERR?", '-221,"Settings conflict"'), ("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, step)) as sa:
        with pytest.raises(InstrumentError) as info:
            sa.configure(REQUEST)
    assert info.value.command == "configure"
    assert "AVER:COUN 10" in info.value.context["commands_since_last_check"]


def test_acquire_trace_binary_with_a_timeout_sized_from_the_acquisition_time():
    values = np.linspace(-90.0, -80.0, 401, dtype=np.float32)
    dialogue = (
        configured()
        + acquisition()
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("TRAC? TRACE1", ieee_block(values)), ("SYST:ERR?", OK)]
        + acquisition()
        + [("TRAC? TRACE1", ieee_block(values)), ("SYST:ERR?", OK)]
    )  # format not sent again
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        trace = sa.acquire_trace()
        assert sa.acquire_trace().values.size == 401
        transport = sa.transport
    assert isinstance(trace, Trace)
    assert np.array_equal(trace.values, values.astype(float))
    assert trace.freq_hz[0] == 995e6 and trace.freq_hz[-1] == 1005e6
    assert trace.instrument == IDN and trace.settings.rbw_hz == 100e3
    expected_s = 10 * 0.01  # averages x reported sweep time
    assert sa.expected_acquisition_time_s() == pytest.approx(expected_s)
    assert trace.acquisition_time_s >= expected_s
    # the *OPC? wait: max(base 5 s, 1.5 x expected + 2 s) = 5 s here; the trace transfer:
    # base + 1604 bytes at the profile's 1 MB/s
    assert transport.timeouts_s[0] == pytest.approx(5.0)
    assert transport.timeouts_s[2] == pytest.approx(5.0 + 1604 / 1e6)


def test_long_acquisition_is_awaited_by_status_polling():
    slept = []
    dialogue = (
        configured(sweep="20", avg="10")
        + [
            ("*ESR?", "0"),
            ("INIT:IMM;*OPC", None),
            ("*ESR?", "0"),
            ("*ESR?", "0"),
            ("*ESR?", "1"),
            ("SYST:ERR?", OK),
        ]
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("TRAC? TRACE1", ieee_block(np.zeros(401))), ("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer, sleep=slept.append) as sa:
        sa.configure(REQUEST)
        assert sa.expected_acquisition_time_s() == pytest.approx(200.0)
        assert sa.acquisition_timeout_s() == pytest.approx(302.0)
        sa.acquire_trace()
    assert slept == [0.2, 0.2]


def test_ascii_transfer_and_a_wrong_point_count_is_refused():
    dialogue = (
        configured()
        + acquisition()
        + sets("FORM ASC")
        + [("TRAC? TRACE1", ",".join(["-85.5"] * 401)), ("SYST:ERR?", OK)]
        + acquisition()
        + [("TRAC? TRACE1", "-85.5,-85.5")]
    )
    with replay_dialogue(dialogue, analyzer, retries=0) as sa:
        sa.configure(REQUEST)
        sa.set_trace_transfer("ascii")
        assert np.all(sa.acquire_trace().values == -85.5)
        with pytest.raises(BlockError, match="2 values.*401 points"):
            sa.acquire_trace()


def test_acquire_before_configure_is_an_input_error():
    with replay_dialogue(connect(), analyzer) as sa:
        with pytest.raises(InputError, match="configure"):
            sa.acquire_trace()
        with pytest.raises(InputError):
            sa.expected_acquisition_time_s()


def test_broken_block_recovers_detects_lost_settings_and_reapplies_them():
    values = np.full(401, -88.0)
    dialogue = (
        configured()
        + acquisition()
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("TRAC? TRACE1", BlockError("block incomplete"))]
        + [(RECOVER, "reconnect"), ("*IDN?", IDN), ("SYST:ERR?", OK)]
        + readback(rbw="1.0E+06", avg="1")  # the instrument lost our settings
        + sets(*REQUEST_COMMANDS)
        + readback()
        + [("SYST:ERR?", OK)]
        + acquisition()
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("TRAC? TRACE1", ieee_block(values)), ("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        trace = sa.acquire_trace()
    assert np.all(trace.values == -88.0)
    assert sa.settings_changes == [{"rbw_hz": (100e3, 1e6), "averages": (10, 1)}]
    assert "reconnected" in sa.recovery_log[0]


def test_timeout_explained_by_the_error_queue_becomes_an_instrument_error():
    dialogue = (
        connect()
        + [("FREQ:CENT?", InstrumentTimeout("no reply", command="FREQ:CENT?"))]
        + [
            (RECOVER, "reconnect"),
            ("*IDN?", IDN),
            ("SYST:ERR?", '-113,"Undefined header"'),
            ("SYST:ERR?", OK),
        ]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        with pytest.raises(InstrumentError) as info:
            sa.read_settings()
    assert info.value.code == -113 and info.value.command == "FREQ:CENT?"
    assert isinstance(info.value.__cause__, InstrumentTimeout)


def test_when_retries_run_out_the_error_is_raised_and_recovery_waits_for_the_next_call():
    dialogue = (
        connect()
        + [("FREQ:CENT?", InstrumentTimeout("no reply"))]
        + [(RECOVER, "reconnect"), ("*IDN?", IDN), ("SYST:ERR?", OK)]
        + readback()
    )
    with replay_dialogue(dialogue, analyzer, retries=0) as sa:
        with pytest.raises(InstrumentTimeout):
            sa.read_settings()
        assert sa.read_settings().rbw_hz == 100e3


def test_recovery_refuses_a_different_instrument_on_the_same_address():
    dialogue = (
        connect()
        + [("FREQ:CENT?", InstrumentTimeout("no reply"))]
        + [(RECOVER, "reconnect"), ("*IDN?", "other,maker,1,1")]
    )
    with replay_dialogue(dialogue, analyzer, retries=1) as sa:
        with pytest.raises(InstrumentTimeout) as info:
            sa.read_settings()
    assert "expected" in info.value.context["recovery_failed"]


def test_band_power_marker_reads_value_position_and_correction_state():
    dialogue = (
        configured()
        + sets("CALC:MARK:QUAN INTegral", "CALC:MARK:X 1001000000", "CALC:MARK:QUAN:WIDT 500000")
        + acquisition()
        + [
            ("CALC:MARK:Y?", "-50.25"),
            ("CALC:MARK:X?", "1.001E+09"),
            ("CALC:MARK:QUAN:CORR?", "1"),
            ("SYST:ERR?", OK),
        ]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        reading = sa.read_marker(1.001e9, MarkerKind.BAND_POWER)
        with pytest.raises(InputError, match="outside the trace"):
            sa.read_marker(2e9, MarkerKind.NOISE_DENSITY)
    assert reading.value_db == -50.25 and reading.band_hz == 500e3  # default 5 RBW
    assert reading.freq_hz == 1.001e9 and reading.instrument_corrected is True
    assert reading.kind is MarkerKind.BAND_POWER


def test_noise_drive_is_verified_and_switched_off_on_close():
    dialogue = (
        connect()
        + sets("OUTP:NOIS ON")
        + [("OUTP:NOIS?", "1")]
        + sets("OUTP:NOIS OFF")
        + [("OUTP:NOIS?", "1")]
        + [("OUTP:NOIS OFF", None), ("OUTP:NOIS?", "0")]
    )  # close: off, confirmed
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.set_noise_drive(True)
        with pytest.raises(MeasurementError, match="reports True"):
            sa.set_noise_drive(False)
        sa.close()
        sa.close()


def test_sim_path_only_when_the_profile_defines_it():
    with replay_dialogue(
        connect() + sets("SIM:PATH THRough") + [("SIM:PATH?", "THR")], analyzer
    ) as sa:
        sa.set_sim_path("through")
    text = open(GENERIC.source).read()
    cut = text[text.index("# simulator only") : text.index("# ---", text.index("# simulator"))]
    real = parse_profile(text.replace(cut, ""), "real.toml")
    with replay_dialogue(connect(), lambda t: ScpiAnalyzer(t, real)) as sa:
        with pytest.raises(InputError, match="no simulator path"):
            sa.set_sim_path("dut")


# ----------------------------------------------------------------------------- generator


def generator(transport, **kwargs):
    return ScpiGenerator(transport, GENERIC, **kwargs)


def test_generator_sets_and_reads_back_and_switches_off_on_close():
    dialogue = (
        connect("gen,x,1,1")
        + [("OUTP?", "0")]
        + sets("FREQ 2000000000", "POW -30.0000")
        + [("FREQ?", "2.0E+09"), ("POW?", "-30.00"), ("SYST:ERR?", OK)]
        + sets("OUTP ON")
        + [("OUTP?", "1"), ("OUTP OFF", None), ("OUTP?", "0")]
    )
    with replay_dialogue(dialogue, generator, max_level_dbm=0.0) as gen:
        with pytest.raises(SafetyError, match="no level"):
            gen.set_output(True)
        with pytest.raises(SafetyError, match="above the limit"):
            gen.set_cw(2e9, 5.0)
        gen.set_cw(2e9, -30.0)
        gen.set_output(True)
        assert gen.output_on and gen.level_dbm == -30.0 and gen.frequency_hz == 2e9
        gen.close()
        assert not gen.output_on


# ----------------------------------------------------------------------------- supply source


def supply_programmed(volts="28", amps="0.05") -> list:
    return sets("CURR 0.0500", "VOLT 28.0000") + [
        ("VOLT?", volts),
        ("CURR?", amps),
        ("SYST:ERR?", OK),
    ]


def supply_start() -> list:
    return (
        connect("psu,x,1,1")
        + [("OUTP?", "0")]
        + sets("OUTP OFF")
        + [("OUTP?", "0")]
        + supply_programmed()
    )


def test_supply_source_sets_limit_and_voltage_before_the_output_and_verifies_the_drive():
    slept = []
    dialogue = (
        supply_start()
        + supply_programmed()
        + sets("OUTP ON")
        + [("OUTP?", "1"), ("MEAS:VOLT?", "27.9"), ("MEAS:CURR?", "0.0100")]
        + sets("OUTP OFF")
        + [("OUTP?", "0")]
        + sets("OUTP OFF")
        + [("OUTP?", "0"), ("OUTP OFF", None), ("OUTP?", "0")]
    )
    with replay_dialogue(dialogue, ScpiSupply, profile=GENERIC) as supply:
        source = SupplyNoiseSource(
            supply,
            current_limit_a=0.05,
            max_drive_v=32.0,
            settle_time_s=0.25,
            min_current_a=0.001,
            enr_table=EnrTable.constant(15.0, nominal_drive_v=28.0),
            sleep=slept.append,
        )
        assert source.drive_v == 28.0  # from the ENR table's nominal_drive_v
        source.set_hot(True)
        assert source.is_hot
        source.set_hot(False)
        source.close()
    assert slept == [0.25, 0.25]


def test_supply_source_open_drive_lead_is_detected_and_the_output_switched_off():
    dialogue = (
        supply_start()
        + supply_programmed()
        + sets("OUTP ON")
        + [("OUTP?", "1"), ("MEAS:VOLT?", "28.0"), ("MEAS:CURR?", "0")]
        + sets("OUTP OFF")
        + [("OUTP?", "0")]
    )
    with replay_dialogue(dialogue, ScpiSupply, profile=GENERIC) as supply:
        source = SupplyNoiseSource(
            supply,
            drive_v=28.0,
            current_limit_a=0.05,
            max_drive_v=32.0,
            settle_time_s=0.0,
            min_current_a=0.001,
        )
        with pytest.raises(MeasurementError, match="drive lead is open"):
            source.set_hot(True)
        assert not supply.output_on


def test_supply_source_refuses_an_overvoltage_before_touching_the_supply():
    with replay_dialogue(
        connect("psu,x,1,1") + [("OUTP?", "0")], ScpiSupply, profile=GENERIC
    ) as supply:
        with pytest.raises(SafetyError, match="above the configured maximum"):
            SupplyNoiseSource(
                supply, drive_v=35.0, current_limit_a=0.05, max_drive_v=32.0, settle_time_s=0.0
            )
        with pytest.raises(InputError, match="nominal_drive_v"):
            SupplyNoiseSource(
                supply,
                current_limit_a=0.05,
                max_drive_v=32.0,
                settle_time_s=0.0,
                enr_table=EnrTable.constant(15.0),
            )


def test_supply_reporting_a_higher_voltage_than_programmed_keeps_the_output_off():
    dialogue = (
        connect("psu,x,1,1")
        + [("OUTP?", "0")]
        + sets("OUTP OFF")
        + [("OUTP?", "0")]
        + supply_programmed(volts="40")
        + sets("OUTP OFF")
        + [("OUTP?", "0")]
    )
    with replay_dialogue(dialogue, ScpiSupply, profile=GENERIC) as supply:
        with pytest.raises(SafetyError, match="reports 40 V"):
            SupplyNoiseSource(
                supply, drive_v=28.0, current_limit_a=0.05, max_drive_v=32.0, settle_time_s=0.0
            )


# ----------------------------------------------------------------------------- other sources


class _DriveRecorder(NoiseDriveOutput):
    identity = "recording analyzer"

    def __init__(self):
        self.calls = []

    def set_noise_drive(self, on):
        self.calls.append(on)


def test_analyzer_drive_source_settles_after_every_change_and_is_off_after_close():
    slept, sa = [], _DriveRecorder()
    source = AnalyzerDriveNoiseSource(sa, settle_time_s=0.5, sleep=slept.append)
    source.set_hot(True)  # the state was unknown: settles
    source.set_hot(True)  # commanded again, nothing changed: no wait (a safe state's case)
    assert sa.calls == [True, True] and slept == [0.5]
    source.set_hot(False)  # a change: settles
    source.set_hot(False)
    source.close()
    assert sa.calls == [True, True, False, False, False] and slept == [0.5, 0.5]
    assert not source.is_hot and "recording analyzer" in source.identity
    with pytest.raises(InputError):
        AnalyzerDriveNoiseSource(object(), settle_time_s=0.1)  # declares no drive output
    with pytest.raises(InputError, match="closed"):
        source.set_hot(True)


def test_analyzer_drive_source_refuses_a_declared_but_missing_drive_output():
    # e.g. an SCPI analyzer whose profile names no noise-drive commands: refused when the
    # source is made, not at the first switch in the middle of a calibration
    class NoDrive(_DriveRecorder):
        @property
        def has_noise_drive(self) -> bool:
            return False

    with pytest.raises(InputError, match="no noise-source drive output"):
        AnalyzerDriveNoiseSource(NoDrive(), settle_time_s=0.1)


def test_callable_source_wraps_callback_failures():
    states = []
    source = CallableNoiseSource(states.append, settle_time_s=0.0)
    source.set_hot(True)
    assert states == [True]

    def broken(hot):
        raise OSError("relay board unplugged")

    with pytest.raises(Exception, match="relay board unplugged") as info:
        CallableNoiseSource(broken, settle_time_s=0.0).set_hot(True)
    assert type(info.value).__name__ == "CommunicationError"
    with pytest.raises(InputError):
        CallableNoiseSource(states.append, settle_time_s=-1.0)


def test_a_failed_switch_leaves_the_state_unknown_so_the_next_command_settles():
    # the drive may or may not have changed when a command failed: the next command, even to
    # the state believed current, waits the settling time
    slept, calls = [], []

    def flaky(hot):
        calls.append(hot)
        if len(calls) == 3:
            raise OSError("relay board hiccup")

    source = CallableNoiseSource(flaky, settle_time_s=0.2, sleep=slept.append)
    source.set_hot(False)
    assert slept == [0.2]  # unknown at first
    source.set_hot(False)
    assert slept == [0.2]  # known and unchanged: no wait
    with pytest.raises(Exception, match="hiccup"):
        source.set_hot(False)
    source.set_hot(False)
    assert calls == [False, False, False, False] and slept == [0.2, 0.2]


def test_operator_source_prompts_and_can_be_stopped():
    prompts = []
    source = OperatorNoiseSource(prompt=lambda text: prompts.append(text) or "", settle_time_s=0.0)
    source.set_hot(True)
    assert "ON (hot)" in prompts[0]
    stop = OperatorNoiseSource(prompt=lambda text: "q", settle_time_s=0.0)
    with pytest.raises(MeasurementError, match="stopped"):
        stop.set_hot(True)

    def no_terminal(text):
        raise EOFError

    with pytest.raises(MeasurementError, match="no operator input"):
        OperatorNoiseSource(prompt=no_terminal, settle_time_s=0.0).set_hot(False)


class _StubAnalyzer:
    """Returns a hot or cold trace depending on the source state."""

    def __init__(self, source_ref, hot_dbm, cold_dbm):
        self.source_ref, self.hot_dbm, self.cold_dbm = source_ref, hot_dbm, cold_dbm

    def acquire_trace(self):
        """Noise with the scatter of 100 averages (points 5 RBW apart, so independent); the
        same draw for hot and cold, so Y is exactly the level difference."""
        level = self.hot_dbm if self.source_ref[0].is_hot else self.cold_dbm
        scatter_db = 10 * np.log10(np.random.default_rng(5).gamma(100.0, 1 / 100.0, 201))
        settings = AcquisitionSettings(
            center_hz=1e9,
            span_hz=1e6,
            rbw_hz=1e3,
            detector=Detector.RMS,
            detector_samples=1.0,
            averaging_scale=AveragingScale.POWER,
            averages=100,
            points=201,
        )
        return Trace(
            freq_hz=settings.frequencies_hz(), values=level + scatter_db, settings=settings
        )


def test_source_switching_check_measures_y_and_catches_a_stuck_source():
    ref = []
    source = CallableNoiseSource(lambda hot: None, settle_time_s=0.0)
    ref.append(source)
    y = check_source_switching(_StubAnalyzer(ref, -80.0, -90.0), source)
    assert y == pytest.approx(10.0) and not source.is_hot
    with pytest.raises(MeasurementError, match="does not switch"):
        check_source_switching(_StubAnalyzer(ref, -90.0, -90.0), source)
    assert not source.is_hot
    # 1 dB is 5 sigma for these traces (about 1e4 independent samples each) but not for a
    # threshold raised to 2 dB
    assert check_source_switching(_StubAnalyzer(ref, -89.0, -90.0), source) == pytest.approx(1.0)
    with pytest.raises(MeasurementError):
        check_source_switching(_StubAnalyzer(ref, -89.0, -90.0), source, min_y_db=2.0)


def test_wrong_byte_order_names_the_profile_setting():
    """The instrument sends little-endian numbers while the profile decodes big-endian: the
    error names the byte-order command and big_endian, not an overflow or a level problem."""
    rng = np.random.default_rng(3)
    values = (-90.0 + rng.normal(0.0, 0.2, 401)).astype(np.float32)
    # keep the values whose swapped bytes still decode to finite numbers (a NaN pattern is a
    # transfer error, retried, which this one-exchange dialogue does not script)
    values[~np.isfinite(values.astype(">f4").view("<f4"))] = np.float32(-90.0)
    dialogue = (
        configured()
        + acquisition()
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("TRAC? TRACE1", ieee_block(values, big_endian=False)), ("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        with np.errstate(all="raise"), pytest.raises(InputError) as info:
            sa.acquire_trace()
    text = str(info.value)
    assert info.value.field == "trace.values"
    assert "'FORM:BORD NORM'" in text and "big-endian" in text and "mis-decoded" in text


def test_scpi_not_a_number_in_a_trace_names_the_point():
    """SCPI-1999 sends NaN as 9.91E+37: the driver says the instrument had no data there."""
    values = np.full(401, -90.0)
    values[123] = 9.91e37
    dialogue = (
        configured()
        + acquisition()
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("TRAC? TRACE1", ieee_block(values)), ("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        with pytest.raises(InputError, match="no data at point 123 .*not-a-number"):
            sa.acquire_trace()

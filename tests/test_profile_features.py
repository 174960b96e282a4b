"""Profile format for real instruments: 'not available' commands, values that depend on another
setting, quantisation, units, switch markers, init sequences - and the second simulated
dialect (sims/scpi_compact.py) driven by nothing but its profile."""

from __future__ import annotations

import numpy as np
import pytest

from noisebench.bench.acquisition import AcquisitionRequest, AveragingScale, Detector, MarkerKind
from noisebench.drivers import ScpiAnalyzer, load_profile, open_analyzer
from noisebench.drivers.profile import ProfileError, parse_profile
from noisebench.drivers.protocol import RECOVER, replay_dialogue
from noisebench.drivers.quantize import decade_sequence, parse_sequence, quantized
from noisebench.errors import InputError
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_compact import round_1_3_10
from noisebench.sims.scpi_server import SimServer

GENERIC_TEXT = open(load_profile("generic").source, encoding="utf-8").read()
OK = '0,"No error"'


def generic_with(*pairs: tuple[str, str]):
    text = GENERIC_TEXT
    for old, new in pairs:
        assert old in text, old
        text = text.replace(old, new)
    return parse_profile(text, "edited.toml")


# ----------------------------------------------------------------------------- format


def test_false_means_not_available_for_every_optional_command():
    p = generic_with(
        ('clear_status = "*CLS"', "clear_status = false"),
        ('abort = "ABOR"', "abort = false"),
        ('poll_start = "INIT:IMM;*OPC"', "poll_start = false"),
        ('byte_order = "FORM:BORD NORM"', "byte_order = false"),
        ('ascii_format = "FORM ASC"', "ascii_format = false"),
    )
    assert p.common.clear_status is None
    assert p.analyzer.acquisition.abort is None
    assert p.analyzer.acquisition.poll_start is None
    assert p.analyzer.trace.byte_order is None and p.analyzer.trace.ascii_format is None
    # the driver works without them: no *CLS at connect, no byte-order command
    script = [("*IDN?", "x,y,1,1")]
    with replay_dialogue(script, lambda t: ScpiAnalyzer(t, p)) as sa:
        with pytest.raises(InputError, match="no abort command"):
            sa.abort()


def test_true_is_refused_with_the_key_named():
    with pytest.raises(ProfileError, match="abort"):
        generic_with(('abort = "ABOR"', "abort = true"))


def test_settings_and_sections_can_be_declared_unavailable():
    p = generic_with(
        ('[analyzer.noise_drive]\nset = "OUTP:NOIS {value}"\nget = "OUTP:NOIS?"\n', ""),
        ("[analyzer]\n", "[analyzer]\nnoise_drive = false\n"),
        ('[analyzer.settings.preamp]\nset = "INP:GAIN:STAT {value}"\nget = "INP:GAIN:STAT?"\n', ""),
        (
            "[analyzer.settings.continuous]",
            "[analyzer.settings]\npreamp = false\n\n[analyzer.settings.continuous]",
        ),
    )
    assert p.analyzer.noise_drive is None and p.analyzer.settings.preamp is None


def test_value_per_choice_of_another_setting():
    p = generic_with(
        (
            '[analyzer.settings.detector_samples]\nget = "DET:SAMP?"',
            "[analyzer.settings.detector_samples]\n"
            "fixed = { by = \"detector\", values = { sample = 1, rms = 32, '*' = 4 } }",
        )
    )
    setting = p.analyzer.settings.detector_samples
    assert setting.parse("", {"detector": "sample"}) == 1.0
    assert setting.parse("", {"detector": Detector.RMS}) == 32.0
    assert setting.parse("", {"detector": "average"}) == 4.0
    with pytest.raises(InputError, match="depends on detector"):
        setting.parse("")


def test_value_per_choice_names_an_unknown_choice():
    with pytest.raises(ProfileError, match="not choices of detector"):
        generic_with(
            (
                '[analyzer.settings.detector_samples]\nget = "DET:SAMP?"',
                "[analyzer.settings.detector_samples]\n"
                'fixed = { by = "detector", values = { smple = 1 } }',
            )
        )


def test_quantisation_rules_predict_the_applied_value():
    assert parse_sequence("1-3-10") == (1.0, 3.0)
    assert decade_sequence((1.0, 3.0), 10.0, 3e6)[:4] == [10.0, 30.0, 100.0, 300.0]
    p = generic_with(
        (
            'min = 0.1\nmax = 1.0e8\nunit = "Hz"\n\n[analyzer.settings.vbw_hz]',
            'min = 10.0\nmax = 3.0e6\nunit = "Hz"\nsequence = "1-3-10"\n\n'
            "[analyzer.settings.vbw_hz]",
        )
    )
    rbw = p.analyzer.settings.rbw_hz
    # nearest on a log scale: 200 kHz -> 300 kHz (ln 1.5 < ln 2), 150 kHz -> 100 kHz
    assert rbw.applied(200e3) == 300e3
    assert rbw.applied(150e3) == 100e3
    assert rbw.command(1.2e6) == "BAND 1000000"
    # the simulator's own rounding (written separately) agrees over 6 decades
    for value in np.geomspace(10.0, 3e6, 400):
        assert rbw.applied(value) == pytest.approx(round_1_3_10(value), rel=1e-12)
    assert quantized(37.0, step=10.0) == 40.0
    assert quantized(37.0, step=10.0, rounding="down") == 30.0
    assert quantized(5e5, allowed=[1e5, 1e6], rounding="up") == 1e6


def test_clamped_points_and_refused_points():
    compact = load_profile("sim_compact").analyzer.settings.points
    assert compact.applied(50_000) == 20_001 and compact.applied(3) == 11
    generic = load_profile("generic").analyzer.settings.points
    with pytest.raises(InputError, match="outside the range"):
        generic.applied(2_000_000)


def test_units_are_real_scaling_on_the_wire():
    center = load_profile("sim_compact").analyzer.settings.center_hz
    assert center.command(1.5e9) == "TUN:CENT 1500"
    assert center.parse("1500.000001") == pytest.approx(1500000001.0)
    assert center.parse("1.5 GHZ") == 1.5e9  # a reply with its own unit suffix
    with pytest.raises(Exception, match="does not fit"):
        center.parse("3 MS")
    with pytest.raises(ProfileError, match="unit"):
        generic_with(
            ('min = 1.0\nmax = 1.0e11\nunit = "Hz"', 'min = 1.0\nmax = 1.0e11\nunit = "Mhz"')
        )


def test_init_sequence_after_connect_and_after_a_reconnect():
    p = generic_with(
        ("[analyzer]\n", '[analyzer]\ninit = ["SYST:PRES", "DISP:ENAB OFF"]\n'),
        ('error_check = "step"', 'error_check = "each"'),
    )
    script = [
        ("*IDN?", "x,y,1,1"),
        ("*CLS", None),
        ("SYST:PRES", None),
        ("SYST:ERR?", OK),
        ("DISP:ENAB OFF", None),
        ("SYST:ERR?", OK),
        ("SIM:PATH DUT", ConnectionError_()),
        (RECOVER, "reconnect"),
        ("*IDN?", "x,y,1,1"),
        ("SYST:ERR?", OK),
        ("SYST:PRES", None),
        ("SYST:ERR?", OK),
        ("DISP:ENAB OFF", None),
        ("SYST:ERR?", OK),
        ("SIM:PATH DUT", None),
        ("SYST:ERR?", OK),
        ("SIM:PATH?", "DUT"),
    ]
    with replay_dialogue(script, lambda t: ScpiAnalyzer(t, p, sleep=lambda s: None)) as sa:
        sa.set_sim_path("dut")


def ConnectionError_():  # reads like the exception it makes
    from noisebench.drivers.transport import ConnectionLost

    return ConnectionLost("peer closed", command="SIM:PATH DUT")


# ----------------------------------------------------------------------------- dialect


@pytest.fixture(scope="module")
def compact_server():
    bench = SimulatedBench.from_scenario("demo-lna", seed=3)
    with SimServer(bench, dialect="compact") as server:
        yield server


def test_compact_dialect_runs_from_its_profile_alone(compact_server):
    sa = open_analyzer(compact_server.resource("analyzer"), "sim_compact")
    try:
        # the dialect powers on with averaging OFF: the driver switches it on
        assert compact_server.instruments["analyzer"].averaging_on is False
        request = AcquisitionRequest(
            center_hz=1.5e9,
            span_hz=4e6,
            rbw_hz=200e3,
            averages=40,
            points=30_001,
            detector=Detector.SAMPLE,
            averaging_scale=AveragingScale.LOG_POWER,
        )
        assert sa.predict(request).rbw_hz == 300e3 and sa.predict(request).points == 20_001
        settings = sa.configure(request.model_copy(update={"points": 401}))
        assert compact_server.instruments["analyzer"].averaging_on is True
        assert settings.rbw_hz == 300e3  # 1-3-10 rounding, read back
        assert settings.averages == 40 and settings.center_hz == 1.5e9
        assert sa.max_averages_per_trace == 10_000
        trace = sa.acquire_trace()  # binary, big-endian, no byte-order command
        assert trace.values.size == 401
        assert -130 < float(np.mean(trace.values)) < -60  # noise floor in 300 kHz
        reading = sa.read_marker(1.5e9, MarkerKind.NOISE_DENSITY)
        assert reading.instrument_corrected is True  # fixed by the marker function
        assert -180 < reading.value_db < -120
        # no band-power marker: integrated from a trace, by the markers' own definition; on
        # noise it equals the density times the band (RMS detector: no detector bias)
        sa.configure(
            request.model_copy(
                update={
                    "points": 401,
                    "detector": Detector.RMS,
                    "averaging_scale": AveragingScale.POWER,
                }
            )
        )
        density = sa.read_marker(1.5e9, MarkerKind.NOISE_DENSITY)
        band = sa.read_marker(1.5e9, MarkerKind.BAND_POWER, 1.5e6)
        assert band.kind is MarkerKind.BAND_POWER and band.band_hz == 1.5e6
        assert band.instrument_corrected is True  # RMS detector, power scale: no bias
        expected = density.value_db + 10 * np.log10(1.5e6)
        assert band.value_db == pytest.approx(expected, abs=0.5)
    finally:
        sa.close()
    sent = [line for who, line in compact_server.command_log if who == "analyzer"]
    assert "TUN:CENT 1500" in sent and "FILT:RES 300000" in sent
    assert not any(line.startswith(("ABOR", "FORM")) for line in sent)


def test_averaging_switched_off_behind_our_back_reads_as_one_average(compact_server):
    """Someone switches averaging off at the front panel: the count stays 16 on the screen,
    but each trace is one sweep; the driver must report 1 (the physics would otherwise be
    wrong by the averaging's whole variance) and verify_settings must show it."""
    sa = open_analyzer(compact_server.resource("analyzer"), "sim_compact")
    try:
        settings = sa.configure(
            AcquisitionRequest(center_hz=1e9, span_hz=4e6, rbw_hz=1e6, averages=16, points=101)
        )
        assert settings.averages == 16
        sa.transport.write("TRAC:MEAN OFF")
        assert sa.read_settings().averages == 1
        assert sa.verify_settings() == {"averages": (16, 1)}
    finally:
        sa.close()

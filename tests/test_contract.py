"""One set of behaviour checks for every analyzer back end: SCPI over pyvisa-py sockets against
the simulator's server, and the in-process simulated analyzer."""

from __future__ import annotations

import math

import numpy as np
import pytest

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    MarkerKind,
    MarkerReading,
    Trace,
    TraceUnit,
)
from noisebench.bench.instruments import Analyzer, NoiseSource
from noisebench.drivers import AnalyzerDriveNoiseSource, ScpiAnalyzer, open_analyzer
from noisebench.errors import InputError, InstrumentError
from noisebench.science.estimator import density_from_marker, estimate_density
from noisebench.sims.bench import SimulatedBench

REQUEST = AcquisitionRequest(center_hz=1.5e9, span_hz=20e6, rbw_hz=110e3, averages=8, points=401)


class Backend:
    def __init__(self, name, analyzer, noise_source, bench):
        self.name, self.analyzer, self.noise_source, self.bench = (
            name,
            analyzer,
            noise_source,
            bench,
        )


@pytest.fixture(params=["scpi", "in-process"])
def backend(request):
    if request.param == "scpi":
        server = request.getfixturevalue("sim_server")
        analyzer = open_analyzer(server.resource("analyzer"), timeout_s=30.0)
        source = AnalyzerDriveNoiseSource(analyzer, settle_time_s=0.1)  # real-time settling
        yield Backend("scpi", analyzer, source, server.bench)
        source.close()
        analyzer.close()
    else:
        bench = SimulatedBench.from_scenario("demo-lna", seed=1)
        yield Backend("in-process", bench.analyzer, bench.noise_source, bench)
        bench.close()


def test_back_end_implements_the_abstract_interfaces(backend):
    assert isinstance(backend.analyzer, Analyzer)
    assert isinstance(backend.noise_source, NoiseSource)
    assert backend.analyzer.identity
    assert backend.analyzer.max_input_power_dbm == 30.0  # the demo scenario's rating


def test_configure_reports_the_applied_rounded_settings(backend):
    sa = backend.analyzer
    applied = sa.configure(REQUEST.model_copy(update={"attenuation_db": 11.0}))
    assert isinstance(applied, AcquisitionSettings)
    assert applied.rbw_hz == 100e3  # 1-2-3-5 sequence (noisebench/sims/SCPI.md)
    assert applied.attenuation_db in (10.0, 12.0)  # 2 dB steps
    assert applied.points == 401 and applied.averages == 8
    assert applied.sweep_time_s > 0 and applied.detector_samples >= 1
    assert sa.settings == applied


def test_trace_carries_its_settings_identity_and_time(backend):
    sa = backend.analyzer
    applied = sa.configure(REQUEST)
    trace = sa.acquire_trace()
    assert isinstance(trace, Trace) and trace.unit is TraceUnit.DBM
    assert trace.settings == applied and trace.instrument == sa.identity
    assert np.array_equal(trace.freq_hz, applied.frequencies_hz())
    assert np.all(np.isfinite(trace.values))
    expected = sa.expected_acquisition_time_s()
    assert expected > 0
    assert trace.acquisition_time_s >= expected * (1 - 1e-9)


def test_expected_time_grows_with_the_averages(backend):
    sa = backend.analyzer
    sa.configure(REQUEST.model_copy(update={"averages": 4}))
    four = sa.expected_acquisition_time_s()
    sa.configure(REQUEST.model_copy(update={"averages": 16}))
    sixteen = sa.expected_acquisition_time_s()
    assert 3.0 < sixteen / four <= 4.0 + 1e-9  # a fixed settling part may not scale


def test_markers_of_both_kinds(backend):
    sa = backend.analyzer
    settings = sa.configure(REQUEST.model_copy(update={"averages": 64}))
    band = 5e6
    power = sa.read_marker(1.5e9, MarkerKind.BAND_POWER, band)
    density = sa.read_marker(1.5e9, MarkerKind.NOISE_DENSITY, band)
    for reading in (power, density):
        assert isinstance(reading, MarkerReading) and reading.settings == sa.settings
        assert reading.instrument_corrected is True  # RMS detector, power averaging
    assert power.kind is MarkerKind.BAND_POWER and power.band_hz == band
    assert density.kind is MarkerKind.NOISE_DENSITY
    # noise: the power in the band is the density times the band, both integrated over exactly
    # that band; allowed: 5 sigma of two independent readings, each of averages x band / B_stat
    # independent samples (reference: radiometer equation, docs/references.md section 7)
    n_independent = settings.averages * band / settings.rbw_filter.stat_bw_hz(settings.rbw_hz)
    sigma_db = 10 / math.log(10) * math.sqrt(2.0 / n_independent)
    assert abs(power.value_db - density.value_db - 10 * math.log10(band)) < 5 * sigma_db
    with pytest.raises(InputError):
        sa.read_marker(3e9, MarkerKind.NOISE_DENSITY)


def test_noise_marker_is_corrected_for_log_averaging_on_every_back_end(backend):
    sa = backend.analyzer
    sa.configure(
        REQUEST.model_copy(
            update={
                "averages": 2000,
                "detector": Detector.SAMPLE,
                "averaging_scale": AveragingScale.LOG_POWER,
            }
        )
    )
    reading = sa.read_marker(1.5e9, MarkerKind.NOISE_DENSITY, 5e6)
    # the instrument removed the log-average bias and divided by the ENBW, and says so
    # (CALC:MARK:QUAN:CORR? on the SCPI back end)
    assert reading.instrument_corrected is True
    density = density_from_marker(reading)
    assert density.bias_correction_db == 0.0
    truth = backend.bench.truth(1.5e9)["displayed_dut_cold_w_per_hz"][0]
    assert abs(density.density_w_per_hz - truth) < 5 * density.u_density_w_per_hz


def test_noise_source_switching_is_seen_in_the_trace(backend):
    sa = backend.analyzer
    sa.configure(REQUEST)
    backend.noise_source.set_hot(False)
    cold = estimate_density(sa.acquire_trace())
    backend.noise_source.set_hot(True)
    hot = estimate_density(sa.acquire_trace())
    backend.noise_source.set_hot(False)
    assert not backend.noise_source.is_hot
    y_db = 10 * math.log10(hot.density_w_per_hz / cold.density_w_per_hz)
    assert y_db > 5.0  # ENR ~15 dB into a ~1 dB NF, ~27 dB gain LNA: Y is about 12-14 dB


def test_both_back_ends_see_the_same_noise_level():
    """The SCPI path adds no bias: the same scenario reads the same density either way
    within five combined standard uncertainties of the two estimates."""
    from noisebench.sims.scpi_server import SimServer

    densities = []
    local = SimulatedBench.from_scenario("demo-lna", seed=1)
    local.analyzer.configure(REQUEST)
    densities.append(estimate_density(local.analyzer.acquire_trace()))
    with SimServer(SimulatedBench.from_scenario("demo-lna", seed=2)) as server:
        sa = open_analyzer(server.resource("analyzer"), timeout_s=30.0)
        try:
            sa.configure(REQUEST)
            densities.append(estimate_density(sa.acquire_trace()))
        finally:
            sa.close()
    a, b = densities
    u = math.hypot(a.u_density_w_per_hz, b.u_density_w_per_hz)
    assert abs(a.density_w_per_hz - b.density_w_per_hz) < 5 * u


def test_out_of_range_frequency_is_refused_with_a_clear_error(backend):
    with pytest.raises((InputError, InstrumentError)) as info:
        backend.analyzer.configure(REQUEST.model_copy(update={"center_hz": 60e9}))
    assert "center" in str(info.value).lower() or "FREQ:CENT" in str(info.value)


def test_close_is_idempotent_and_leaves_the_drive_off(backend):
    backend.analyzer.configure(REQUEST)
    backend.noise_source.set_hot(True)
    backend.noise_source.close()
    backend.noise_source.close()
    assert not backend.noise_source.is_hot
    if isinstance(backend.analyzer, ScpiAnalyzer):
        assert backend.analyzer.read_noise_drive() is False

"""The simulated frequency-converting DUT (scenario demo-downconverter) and its LO generator.

The simulator's IF noise is checked against a forward model written out here from the
two-response definition (IRE 1960 / IEEE Std 161, see docs/references.md): available IF noise
k [G_s T_s + G_i T_i] + N_a, with a matched attenuator delivering T/L + Tp (1 - 1/L).
"""

from __future__ import annotations

import math
import socket

import numpy as np
import pytest

from noisebench.bench.acquisition import AcquisitionRequest
from noisebench.bench.registry import simulated_enr_table
from noisebench.science.estimator import estimate_density
from noisebench.science.methods import calibrate_point
from noisebench.science.methods.converter import (
    converter_gain_method_point,
    converter_y_factor_point,
)
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer

T0 = 290.0
RF, LO = 2.4e9, 2.0e9
IF = RF - LO


def bench_with_lo(seed=1, lo_dbm=10.0, **overrides) -> SimulatedBench:
    bench = SimulatedBench.from_scenario("demo-downconverter", seed=seed, ideal=True, **overrides)
    bench.lo_generator.set_cw(LO, lo_dbm)
    bench.lo_generator.set_output(True)
    return bench


def through(t, loss_db, tp):
    loss = 10 ** (loss_db / 10)
    return t / loss + tp * (1 - 1 / loss)


def test_if_noise_follows_the_two_response_definition():
    bench = bench_with_lo()
    tr = bench.converter_truth(RF)
    gs, gi = 10 ** (tr["gain_signal_db"] / 10), 10 ** (tr["gain_image_db"] / 10)
    amb, tc = tr["ambient_k"], tr["cold_k"]

    def expected(ts, ti):
        out = gs * through(ts, tr["input_loss_rf_db"], amb)
        out += gi * through(ti, tr["input_loss_image_db"], amb) + gs * tr["te_ssb_k"]
        return through(out, tr["output_loss_if_db"], amb)

    sp = bench.spectrum_at_analyzer(np.array([IF]))
    hot = expected(
        T0 * 10 ** (tr["enr_rf_db"] / 10) + tc, T0 * 10 ** (tr["enr_image_db"] / 10) + tc
    )
    assert sp.base_k[0] == pytest.approx(expected(tc, tc), rel=1e-9)
    assert sp.base_k[0] + sp.excess_k[0] == pytest.approx(hot, rel=1e-9)
    # the image is 2 LO - RF and the preselector's skirt sets a finite image rejection
    assert tr["image_hz"] == 1.6e9
    assert 5.0 < tr["image_rejection_db"] < 30.0


def test_truth_relations_equal_responses_and_no_image():
    # flat conversion gain and noise across image and RF: equal responses -> SSB = DSB + 3.01 dB
    flat = bench_with_lo(
        dut__freq_hz=[1e9, 3.5e9],
        dut__gain_db=[20.0, 20.0],
        dut__nf_db=[5.0, 5.0],
        dut__gain_ripple_db=0.0,
    )
    tr = flat.converter_truth(RF)
    assert tr["image_rejection_db"] == pytest.approx(0.0, abs=1e-12)
    # reference: F_SSB = 2 F_DSB for equal responses (IEEE Std 161 definitions)
    assert tr["nf_ssb_db"] - tr["nf_dsb_db"] == pytest.approx(10 * math.log10(2), abs=1e-12)
    assert tr["nf_dsb_db"] == pytest.approx(5.0, abs=1e-12)  # each response adds NF 5 dB
    # no image response (the table ends above the image): SSB = DSB
    narrow = bench_with_lo(
        dut__freq_hz=[2.0e9, 3.0e9], dut__gain_db=[20.0, 20.0], dut__nf_db=[5.0, 5.0]
    )
    tr = narrow.converter_truth(RF)
    assert tr["image_rejection_db"] == math.inf
    assert tr["nf_ssb_db"] == tr["nf_dsb_db"]


def test_lo_off_gives_no_conversion_and_no_leakage():
    bench = bench_with_lo()
    bench.lo_generator.set_output(False)
    sp = bench.spectrum_at_analyzer(np.array([IF]))
    assert sp.excess_k[0] == 0.0  # the noise source no longer reaches the IF
    assert not [t for t in sp.tones if abs(t[0] - LO) < 1.0]


def test_lo_leakage_and_harmonics_reach_the_analyzer():
    bench = bench_with_lo()
    tones = dict(bench.spectrum_at_analyzer(np.array([IF])).tones)
    out_loss = bench.converter_truth(RF)["output_loss_if_db"]
    # scenario: LO line -35 dBm at the IF port at the nominal 10 dBm drive; harmonics -12, -20 dBc
    for n, dbc in ((1, 0.0), (2, -12.0), (3, -20.0)):
        loss = float(10 * np.log10(bench.output_cable.loss_lin(n * LO)))
        got = 10 * math.log10(tones[n * LO] / 1e-3)
        assert got == pytest.approx(-35.0 + dbc - loss, abs=1e-9)
    assert out_loss > 0
    # 3 dB less LO drive, 3 dB less leakage
    weak = bench_with_lo(lo_dbm=7.0)
    weak_tones = dict(weak.spectrum_at_analyzer(np.array([IF])).tones)
    assert 10 * math.log10(tones[LO] / weak_tones[LO]) == pytest.approx(3.0, abs=1e-9)


def test_starved_lo_lowers_the_conversion_gain_dB_for_dB():
    nominal = bench_with_lo().converter_truth(RF)["gain_signal_db"]
    starved = bench_with_lo(lo_dbm=4.0).converter_truth(RF)["gain_signal_db"]
    assert nominal - starved == pytest.approx(3.0, abs=1e-12)  # lo_min_dbm = 7 in the scenario


def test_converter_compresses_on_its_own_output_power():
    strong = bench_with_lo(dut__conversion__lo_leakage_dbm=12.0)  # a leakage line above P1dB
    weak = bench_with_lo()
    s = strong.spectrum_at_analyzer(np.array([IF])).base_k[0]
    w = weak.spectrum_at_analyzer(np.array([IF])).base_k[0]
    assert s < 0.8 * w


def _hot_cold(bench, freq_hz):
    an, ns = bench.analyzer, bench.noise_source
    ns.set_hot(True)
    hot = estimate_density(an.acquire_trace(), freq_hz=freq_hz)
    ns.set_hot(False)
    return hot, estimate_density(an.acquire_trace(), freq_hz=freq_hz)


def test_both_methods_measure_the_simulated_converter_within_their_uncertainty():
    bench = bench_with_lo(seed=11)
    bench.analyzer.configure(
        AcquisitionRequest(center_hz=IF, span_hz=20e6, rbw_hz=1e6, averages=400, attenuation_db=0)
    )
    tr = bench.converter_truth(RF)
    table = simulated_enr_table(bench)
    bench.set_path("through")
    cal = calibrate_point(
        *_hot_cold(bench, IF), float(table.at(IF).enr_db), cold_temperature_k=tr["cold_k"]
    )
    bench.set_path("dut")
    hot, cold = _hot_cold(bench, IF)
    losses = dict(
        input_loss_db=tr["input_loss_rf_db"],
        input_loss_image_db=tr["input_loss_image_db"],
        input_loss_temperature_k=tr["ambient_k"],
    )
    y = converter_y_factor_point(
        hot,
        cold,
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=float(table.at(RF).enr_db),
        enr_image_db=float(table.at(tr["image_hz"]).enr_db),
        cold_temperature_k=tr["cold_k"],
        image_rejection_db=tr["image_rejection_db"],
        calibration=cal,
        **losses,
    )
    bench.set_path("termination")
    floor = estimate_density(bench.analyzer.acquire_trace(), freq_hz=IF)
    g = converter_gain_method_point(
        cold,
        tr["gain_signal_db"] - tr["output_loss_if_db"],
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=tr["image_rejection_db"],
        floor=floor,
        source_temperature_k=tr["cold_k"],
        floor_temperature_k=tr["ambient_k"],
        **losses,
    )
    # 4 standard uncertainties: a false alarm below 1e-4 per assertion (normal quantile)
    assert abs(y.nf_db - tr["nf_ssb_db"]) < 4 * y.u_nf_db
    assert abs(y.conversion.nf_dsb_db - tr["nf_dsb_db"]) < 4 * y.u_nf_db
    assert abs(y.gain_db - tr["gain_signal_db"]) < 4 * y.u_gain_db
    assert abs(g.nf_db - tr["nf_ssb_db"]) < 4 * g.u_nf_db
    assert 0.05 < y.u_nf_db < 0.2 and 0.02 < g.u_nf_db < 0.2


def test_scpi_simulator_serves_the_lo_generator():
    bench = SimulatedBench.from_scenario("demo-downconverter", seed=1)
    with SimServer(bench) as server:
        sock = socket.create_connection(("127.0.0.1", server.ports["lo"]), timeout=30)
        try:
            sock.sendall(b"*IDN?\n")
            reply = sock.recv(4096).decode().strip()
            assert reply == bench.lo_generator.identity
            sock.sendall(b"FREQ 2.1 GHz;:POW 9.5;:OUTP ON;*OPC?\n")
            assert sock.recv(64).strip() == b"1"
        finally:
            sock.close()
    assert bench.lo_generator.freq_hz == 2.1e9
    assert bench.lo_generator.level_dbm == 9.5
    assert not bench.generator.output_on


def test_known_lo_lines_are_excluded_even_below_the_spur_threshold():
    # A line 5 dB below the noise in one RBW is too weak for the spur search (its peak is
    # ~30 % above the noise, under the 5-sigma threshold of 64 looks) but biases the band mean.
    from test_estimator import D_TRUE, F0, synthetic_traces

    from noisebench.bench.acquisition import Detector
    from noisebench.science.estimator import estimate_density as est

    m = 60
    line = (F0 + 0.2e6, 0.3 * D_TRUE * 1e5)
    kw = dict(detector=Detector.RMS, looks=4, averages=16, points=201, span_hz=2e6)
    traces = synthetic_traces(seed=21, n_traces=m, spurs=[line], **kw)
    plain = [est(t) for t in traces]
    known = [est(t, known_lines_hz=[line[0]]) for t in traces]
    assert all(d.excluded_freq_hz == [] for d in plain)  # the search alone misses it
    assert all(d.excluded_freq_hz == [line[0]] and d.bins_used < 201 for d in known)
    v = np.array([d.density_w_per_hz for d in known])
    u = math.sqrt(np.mean([d.u_density_w_per_hz**2 for d in known]) / m)
    assert abs(v.mean() - D_TRUE) < 4 * u  # unbiased with the line excluded
    diff = np.array([p.density_w_per_hz for p in plain]) - v
    # reference: the line adds its whole power to the band, 0.3 RBW-noise over 20 RBW = 1.5 %
    assert diff.mean() > 4 * diff.std(ddof=1) / math.sqrt(m)
    assert diff.mean() / D_TRUE == pytest.approx(0.015, abs=0.006)

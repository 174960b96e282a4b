"""Statistical validation of the simulated analyzer's noise (fixed seeds, tolerances from the
known sampling distributions, typically 5 sigma), and of both NF methods run on the simulated
bench: they must recover the simulator's truth within their stated uncertainty.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, special
from scipy.constants import k as K_BOLTZMANN

from noisebench.acquisition import AcquisitionRequest, AveragingScale, Detector, SweepMode
from noisebench.filters import FilterKind, RbwFilter
from noisebench.sims.bench import Path, SimulatedBench
from noisebench.sims.models import dbm_to_w
from noisebench.sims.noisegen import (
    EXACT_LOOKS,
    Axis,
    TraceRecipe,
    complex_looks,
    field_kernel,
    generate_trace,
)

C_DB = 10.0 / math.log(10.0)  # reference.md: c_dB = 10 / ln 10
GAUSS = RbwFilter(kind=FilterKind.GAUSSIAN)
SYNC4 = RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=4)
HANN = RbwFilter(kind=FilterKind.FFT, window="hann")


def draw(n_traces, n_points, looks=1, detector=Detector.SAMPLE, scale=AveragingScale.POWER,
         kernel=None, seed=0, exact=False):
    """Averaged trace (unit mean noise power per look) straight from the generator."""
    recipe = TraceRecipe(n_traces=n_traces, n_points=n_points, looks=looks, detector=detector,
                         averaging_scale=scale, kernel=kernel)
    return generate_trace(np.random.default_rng(seed), recipe, np.ones(n_points), exact=exact)


# ---------------------------------------------------------------- detector / averaging bias -


def test_log_averaged_noise_reads_euler_gamma_low():
    # reference.md §6b: E[10 log10 X] = 10 log10(mu) - 10 log10(e) * gamma for exponential X
    n, p = 64, 20_000
    values_db = 10 * np.log10(draw(n, p, scale=AveragingScale.LOG_POWER))
    expected = -10 * np.log10(np.e) * np.euler_gamma  # -2.5068 dB
    # one log sample scatters c_dB * pi / sqrt(6) (Gumbel); n * p independent samples
    tol = 5 * C_DB * math.pi / math.sqrt(6) / math.sqrt(n * p)
    assert values_db.mean() == pytest.approx(expected, abs=tol)
    assert values_db.std() == pytest.approx(C_DB * math.pi / math.sqrt(6) / math.sqrt(n),
                                            rel=5 * math.sqrt(1 / p))


@pytest.mark.parametrize(("looks", "exact"), [(10, True), (10, False), (100, False)])
def test_log_of_k_sample_power_means_follows_digamma(looks, exact):
    # reference.md §6b: bias c_dB (psi(k) - ln k): -0.2208 dB (k=10), -0.0218 dB (k=100)
    n, p = 16, 20_000
    values_db = 10 * np.log10(draw(n, p, looks=looks, detector=Detector.RMS,
                                   scale=AveragingScale.LOG_POWER, exact=exact))
    expected = C_DB * (special.digamma(looks) - math.log(looks))
    sigma_one = C_DB * math.sqrt(special.polygamma(1, looks))  # Var ln Gamma(k) = trigamma(k)
    assert values_db.mean() == pytest.approx(expected, abs=5 * sigma_one / math.sqrt(n * p))


def _squared_mean_moments(n: int) -> tuple[float, float]:
    """Mean and variance of (mean of n Rayleigh envelopes)^2 for unit mean power, exactly."""
    m = [1.0, math.sqrt(math.pi) / 2, 1.0, 3 * math.sqrt(math.pi) / 4, 2.0]  # E[V^j], Rayleigh
    k1, k2 = m[1], m[2] - m[1] ** 2
    k3 = m[3] - 3 * m[2] * m[1] + 2 * m[1] ** 3
    k4 = m[4] - 4 * m[3] * m[1] - 3 * m[2] ** 2 + 12 * m[2] * m[1] ** 2 - 6 * m[1] ** 4
    s1, s2, s3, s4 = n * k1, n * k2, n * k3, n * k4  # cumulants of the sum
    e2 = s2 + s1**2
    e4 = s4 + 4 * s3 * s1 + 3 * s2**2 + 6 * s2 * s1**2 + s1**4
    return e2 / n**2, (e4 - e2**2) / n**4


@pytest.mark.parametrize("n", [4, 64])
def test_voltage_averaging_reads_pi_over_4_plus_finite_n_term(n):
    # reference.md §6b: envelope averaging reads 10 log10(pi/4) = -1.0491 dB for many averages;
    # for n averages E[(mean V)^2] = P (pi/4 + (1 - pi/4)/n)
    p = 40_000
    values = draw(n, p, scale=AveragingScale.VOLTAGE)
    mean, var = _squared_mean_moments(n)
    assert mean == pytest.approx(math.pi / 4 + (1 - math.pi / 4) / n)
    assert values.mean() == pytest.approx(mean, abs=5 * math.sqrt(var / p))


@pytest.mark.parametrize(("n", "looks", "detector", "exact"), [
    (1, 1, Detector.SAMPLE, False), (10, 1, Detector.SAMPLE, False),
    (100, 1, Detector.SAMPLE, False), (100, 1, Detector.SAMPLE, True),
    (1000, 1, Detector.SAMPLE, False), (4, 8, Detector.RMS, False),
    (3, 40, Detector.RMS, False)])
def test_power_averaged_scatter_follows_one_over_sqrt_n(n, looks, detector, exact):
    # reference.md §6c: linear averaging of M independent power samples: relative std 1/sqrt(M)
    p = 20_000
    values = draw(n, p, looks=looks, detector=detector, exact=exact)
    m = n * looks
    # the values are Gamma(M)/M: variance 1/M, excess kurtosis 6/M; sample variance's spread
    var_of_var = (1 / m) ** 2 * (2 / (p - 1) + (6 / m) / p)
    assert values.mean() == pytest.approx(1.0, abs=5 * math.sqrt(1 / (m * p)))
    assert values.var(ddof=1) == pytest.approx(1 / m, abs=5 * math.sqrt(var_of_var))


@pytest.mark.parametrize("looks", [8, 64])
def test_peak_and_negative_peak_follow_order_statistics(looks):
    # maximum of k unit exponentials: mean H_k = sum 1/i, variance sum 1/i^2 (order statistics,
    # Renyi representation); minimum: exponential of mean 1/k
    p = 40_000
    peak = draw(1, p, looks=looks, detector=Detector.PEAK)
    mean_max = sum(1 / i for i in range(1, looks + 1))
    var_max = sum(1 / i**2 for i in range(1, looks + 1))
    assert peak.mean() == pytest.approx(mean_max, abs=5 * math.sqrt(var_max / p))
    neg = draw(1, p, looks=looks, detector=Detector.NEGATIVE_PEAK)
    assert neg.mean() == pytest.approx(1 / looks, abs=5 * (1 / looks) / math.sqrt(p))
    assert looks <= EXACT_LOOKS or looks > EXACT_LOOKS  # both the drawn and the large-k form


# ---------------------------------------------------------------- correlation -------------


def _amplitude_autocorrelation(filt: RbwFilter, lag_rbw: float) -> float:
    """int h(f) h(f + d) df / int h^2 df by scipy.integrate.quad, h = sqrt(power response)."""
    h = lambda x: math.sqrt(float(filt.power_response(np.array([x]), 1.0)[0]))  # noqa: E731
    num = integrate.quad(lambda x: h(x) * h(x + lag_rbw), -12, 12, limit=400)[0]
    den = integrate.quad(lambda x: h(x) ** 2, -12, 12, limit=400)[0]
    return num / den


def _time_autocorrelation(filt: RbwFilter, lag_periods: float) -> float:
    """Wiener-Khinchin: int |H|^2 cos(2 pi f tau) df / int |H|^2 df (scipy.integrate.quad)."""
    p = lambda x: float(filt.power_response(np.array([x]), 1.0)[0])  # noqa: E731
    num = integrate.quad(lambda x: p(x) * math.cos(2 * math.pi * x * lag_periods), -40, 40,
                         limit=800)[0]
    den = integrate.quad(p, -40, 40, limit=800)[0]
    return num / den


def _neighbour_correlations(power: np.ndarray, lag: int) -> tuple[float, float]:
    """Mean and standard error of the per-trace lag correlation over independent traces."""
    est = np.array([np.corrcoef(row[:-lag], row[lag:])[0, 1] for row in power])
    return float(est.mean()), float(est.std(ddof=1) / math.sqrt(est.size))


@pytest.mark.parametrize("filt", [GAUSS, SYNC4, HANN], ids=["gaussian", "4-pole", "fft-hann"])
@pytest.mark.parametrize("spacing_rbw", [0.2, 0.5])
def test_neighbouring_bin_correlation_matches_the_filter_autocorrelation(filt, spacing_rbw):
    # complex Gaussian noise filtered by H: the power correlation is |rho|^2 (Isserlis), rho the
    # filter's amplitude autocorrelation at the point spacing
    kernel = field_kernel(filt, spacing_rbw, Axis.FREQUENCY)
    power = np.abs(complex_looks(np.random.default_rng(1), 300, 400, kernel)) ** 2
    for lag in (1, 2):
        expected = _amplitude_autocorrelation(filt, lag * spacing_rbw) ** 2
        mean, se = _neighbour_correlations(power, lag)
        assert mean == pytest.approx(expected, abs=5 * se + 0.01 / 400)  # + estimator bias O(1/n)


@pytest.mark.parametrize("filt", [GAUSS, SYNC4], ids=["gaussian", "4-pole"])
def test_zero_span_time_correlation_matches_wiener_khinchin(filt):
    kernel = field_kernel(filt, 0.2, Axis.TIME)
    power = np.abs(complex_looks(np.random.default_rng(2), 300, 400, kernel)) ** 2
    expected = _time_autocorrelation(filt, 0.2) ** 2
    mean, se = _neighbour_correlations(power, 1)
    assert mean == pytest.approx(expected, abs=5 * se + 0.01 / 400)


def test_far_spaced_points_are_independent():
    assert field_kernel(GAUSS, 3.0, Axis.FREQUENCY) is None
    power = draw(1, 40_000)
    mean, _ = _neighbour_correlations(power.reshape(100, 400), 1)
    assert abs(mean) < 5 / math.sqrt(40_000)


# ---------------------------------------------------------------- bench level -------------


def flat_bench(seed=0, **kw) -> SimulatedBench:
    over = {"input_cable": {"loss_db": [0.0]}, "output_cable": {"loss_db": [0.0]},
            "dut__gain_ripple_db": 0.0, **kw}
    return SimulatedBench.from_scenario("demo-lna", seed=seed, ideal=True, **over)


def _quad_enbw(filt: RbwFilter) -> float:
    """ENBW / B3 = int |H|^2 df (Friis 1944 'effective bandwidth'), scipy.integrate.quad."""
    return integrate.quad(lambda x: float(filt.power_response(np.array([x]), 1.0)[0]), -40, 40,
                          limit=800, points=[0.0])[0]


@pytest.mark.parametrize(("shape", "mode"), [("gaussian", SweepMode.SWEPT),
                                             ("synchronous", SweepMode.SWEPT),
                                             ("gaussian", SweepMode.FFT)])
def test_simulated_noise_power_per_point_is_density_times_enbw(shape, mode):
    bench = flat_bench()
    bench.set_path(Path.TERMINATION)
    bench.analyzer.set_filter_shape(shape, poles=4)
    s = bench.analyzer.configure(AcquisitionRequest(
        center_hz=2e9, span_hz=20e6, rbw_hz=30e3, points=201, averages=200,
        attenuation_db=0.0, detector=Detector.SAMPLE, mode=mode))
    trace = bench.analyzer.acquire_trace()
    density = bench.truth(trace.freq_hz)["displayed_termination_cold_w_per_hz"]
    ratio = dbm_to_w(trace.values) / (density * s.rbw_hz)
    expected = _quad_enbw(s.rbw_filter)  # reference.md §6a: 1.064467 / 1.128499 / Hann
    # independent points (spacing 3.3 RBW): 201 * 200 exponential samples
    assert ratio.mean() == pytest.approx(expected, rel=5 / math.sqrt(201 * 200))
    assert s.enbw_hz / s.rbw_hz == pytest.approx(expected, rel=1e-4)


@pytest.mark.parametrize(("shape", "mode"), [("gaussian", SweepMode.SWEPT),
                                             ("synchronous", SweepMode.SWEPT),
                                             ("gaussian", SweepMode.FFT)])
def test_cw_tone_swept_across_the_filter_integrates_to_the_enbw(shape, mode):
    bench = flat_bench(interference={"tones": [{"freq_hz": 2.0000137e9, "level_dbm": -30.0}]})
    bench.set_path(Path.TERMINATION)
    bench.analyzer.set_filter_shape(shape, poles=4)
    s = bench.analyzer.configure(AcquisitionRequest(
        center_hz=2e9, span_hz=400e3, rbw_hz=10e3, points=4001, averages=1,
        attenuation_db=10.0, detector=Detector.SAMPLE, mode=mode))
    p = dbm_to_w(bench.analyzer.acquire_trace().values)
    spacing = s.span_hz / (s.points - 1)
    enbw_measured = float(np.sum(p)) * spacing / 1e-6  # tone: -30 dBm = 1e-6 W at the peak
    # the filter shape traced by the tone integrates to ENBW (reference.md §6a); the noise adds
    # density * ENBW per point, ~1e-11 of the tone here
    assert enbw_measured / s.rbw_hz == pytest.approx(_quad_enbw(s.rbw_filter), rel=2e-3)
    assert p.max() == pytest.approx(1e-6, rel=0.01)


def test_dut_noise_plus_analyzer_floor_combine_as_friis_says():
    bench = flat_bench(seed=3)
    an = bench.scenario.analyzer
    req = dict(center_hz=3e9, span_hz=20e6, rbw_hz=100e3, points=101, averages=2000,
               attenuation_db=0.0, detector=Detector.SAMPLE)
    s = bench.analyzer.configure(AcquisitionRequest(**req))
    n_meas = dbm_to_w(bench.analyzer.acquire_trace().values).mean() / s.enbw_hz
    bench.set_path(Path.TERMINATION)
    n_floor = dbm_to_w(bench.analyzer.acquire_trace().values).mean() / s.enbw_hz
    dut = bench.scenario.dut
    g = 10 ** (np.interp(3e9, dut.freq_hz, dut.gain_db) / 10)
    te = 290 * (10 ** (np.interp(3e9, dut.freq_hz, dut.nf_db) / 10) - 1)
    te_sa = 290 * (10 ** (np.interp(3e9, an.freq_hz, an.nf_db) / 10) - 1)
    tc, amb = 296.5, bench.scenario.ambient_k
    # reference.md §3/§4: N_m = k ((Tc + Te) G + Te_SA), N_f = k (T_amb + Te_SA)
    rel = 5 / math.sqrt(101 * 2000)
    assert n_meas == pytest.approx(K_BOLTZMANN * ((tc + te) * g + te_sa), rel=rel)
    assert n_floor == pytest.approx(K_BOLTZMANN * (amb + te_sa), rel=rel)
    # exact floor correction (reference.md §4): N_m - N_f + k T_amb = k (Tc + Te) G
    n_dut = n_meas - n_floor + K_BOLTZMANN * amb
    u = math.hypot(n_meas, n_floor) / math.sqrt(101 * 2000)
    assert n_dut == pytest.approx(K_BOLTZMANN * (tc + te) * g, abs=5 * u)


def test_reported_detector_samples_match_the_scatter():
    bench = flat_bench()
    bench.set_path(Path.TERMINATION)
    s = bench.analyzer.configure(AcquisitionRequest(
        center_hz=2e9, span_hz=0.0, rbw_hz=1e6, points=2001, sweep_time_s=20e-3,
        averages=1, detector=Detector.RMS, attenuation_db=0.0))
    k = s.detector_samples
    assert k == round(s.rbw_filter.stat_bw_hz(1e6) * 20e-3 / 2001)  # 15
    p = dbm_to_w(bench.analyzer.acquire_trace().values)
    rel_var = p.var(ddof=1) / p.mean() ** 2
    # radiometer equation: an RMS mean of k independent looks scatters 1/k (gamma shape k)
    n = p.size
    assert rel_var == pytest.approx(1 / k, abs=5 * (1 / k) * math.sqrt(2 / n + 6 / (k * n)))

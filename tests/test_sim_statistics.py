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

from noisebench.bench.acquisition import AcquisitionRequest, AveragingScale, Detector, SweepMode
from noisebench.science.filters import FilterKind, RbwFilter
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

C_DB = 10.0 / math.log(10.0)  # docs/references.md: c_dB = 10 / ln 10
GAUSS = RbwFilter(kind=FilterKind.GAUSSIAN)
SYNC4 = RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=4)
HANN = RbwFilter(kind=FilterKind.FFT, window="hann")


def draw(
    n_traces,
    n_points,
    looks=1,
    detector=Detector.SAMPLE,
    scale=AveragingScale.POWER,
    kernel=None,
    seed=0,
    exact=False,
):
    """Averaged trace (unit mean noise power per look) straight from the generator."""
    recipe = TraceRecipe(
        n_traces=n_traces,
        n_points=n_points,
        looks=looks,
        detector=detector,
        averaging_scale=scale,
        kernel=kernel,
    )
    return generate_trace(np.random.default_rng(seed), recipe, np.ones(n_points), exact=exact)


# ---------------------------------------------------------------- detector / averaging bias -


def test_log_averaged_noise_reads_euler_gamma_low():
    # docs/references.md §6b: E[10 log10 X] = 10 log10(mu) - 10 log10(e) * gamma for exponential X
    n, p = 64, 20_000
    values_db = 10 * np.log10(draw(n, p, scale=AveragingScale.LOG_POWER))
    expected = -10 * np.log10(np.e) * np.euler_gamma  # -2.5068 dB
    # one log sample scatters c_dB * pi / sqrt(6) (Gumbel); n * p independent samples
    tol = 5 * C_DB * math.pi / math.sqrt(6) / math.sqrt(n * p)
    assert values_db.mean() == pytest.approx(expected, abs=tol)
    assert values_db.std() == pytest.approx(
        C_DB * math.pi / math.sqrt(6) / math.sqrt(n), rel=5 * math.sqrt(1 / p)
    )


@pytest.mark.parametrize(("looks", "exact"), [(10, True), (10, False), (100, False)])
def test_log_of_k_sample_power_means_follows_digamma(looks, exact):
    # docs/references.md §6b: bias c_dB (psi(k) - ln k): -0.2208 dB (k=10), -0.0218 dB (k=100)
    n, p = 16, 20_000
    values_db = 10 * np.log10(
        draw(n, p, looks=looks, detector=Detector.RMS, scale=AveragingScale.LOG_POWER, exact=exact)
    )
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
    # docs/references.md §6b: envelope averaging reads 10 log10(pi/4) = -1.0491 dB for many
    # averages;
    # for n averages E[(mean V)^2] = P (pi/4 + (1 - pi/4)/n)
    p = 40_000
    values = draw(n, p, scale=AveragingScale.VOLTAGE)
    mean, var = _squared_mean_moments(n)
    assert mean == pytest.approx(math.pi / 4 + (1 - math.pi / 4) / n)
    assert values.mean() == pytest.approx(mean, abs=5 * math.sqrt(var / p))


@pytest.mark.parametrize(
    ("n", "looks", "detector", "exact"),
    [
        (1, 1, Detector.SAMPLE, False),
        (10, 1, Detector.SAMPLE, False),
        (100, 1, Detector.SAMPLE, False),
        (100, 1, Detector.SAMPLE, True),
        (1000, 1, Detector.SAMPLE, False),
        (4, 8, Detector.RMS, False),
        (3, 40, Detector.RMS, False),
    ],
)
def test_power_averaged_scatter_follows_one_over_sqrt_n(n, looks, detector, exact):
    # docs/references.md §6c: linear averaging of M independent power samples: relative std
    # 1/sqrt(M)
    p = 20_000
    values = draw(n, p, looks=looks, detector=detector, exact=exact)
    m = n * looks
    # the values are Gamma(M)/M: variance 1/M, excess kurtosis 6/M; sample variance's spread
    var_of_var = (1 / m) ** 2 * (2 / (p - 1) + (6 / m) / p)
    assert values.mean() == pytest.approx(1.0, abs=5 * math.sqrt(1 / (m * p)))
    assert values.var(ddof=1) == pytest.approx(1 / m, abs=5 * math.sqrt(var_of_var))


def test_parametrisations_cover_drawn_and_large_sample_looks():
    # the look counts used above (8, 10 and 40, 64, 100) fall on both sides of the switch
    assert 10 <= EXACT_LOOKS < 40


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


# ---------------------------------------------------------------- correlation -------------


_X = np.linspace(-40.0, 40.0, 400_001)  # offsets in RBWs; dense grid for the reference integrals


def _integrate(y: np.ndarray) -> float:
    return float(integrate.simpson(y, x=_X))


def _amplitude_autocorrelation(filt: RbwFilter, lag_rbw: float) -> float:
    """int h(f) h(f + d) df / int h^2 df (scipy.integrate.simpson), h = sqrt(power response)."""
    h = np.sqrt(filt.power_response(_X, 1.0))
    h_lag = np.sqrt(filt.power_response(_X + lag_rbw, 1.0))
    return _integrate(h * h_lag) / _integrate(h * h)


def _time_autocorrelation(filt: RbwFilter, lag_periods: float) -> float:
    """Wiener-Khinchin: int |H|^2 cos(2 pi f tau) df / int |H|^2 df (scipy.integrate.simpson)."""
    p = filt.power_response(_X, 1.0)
    return _integrate(p * np.cos(2 * math.pi * _X * lag_periods)) / _integrate(p)


def _neighbour_correlations(power: np.ndarray, lag: int) -> tuple[float, float]:
    """Mean and standard error over independent traces of the lag covariance of unit-mean,
    unit-variance exponential powers (known moments: an unbiased correlation estimate)."""
    est = ((power[:, :-lag] - 1.0) * (power[:, lag:] - 1.0)).mean(axis=1)
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
        assert mean == pytest.approx(expected, abs=5 * se)


@pytest.mark.parametrize("filt", [GAUSS, SYNC4], ids=["gaussian", "4-pole"])
def test_zero_span_time_correlation_matches_wiener_khinchin(filt):
    kernel = field_kernel(filt, 0.2, Axis.TIME)
    power = np.abs(complex_looks(np.random.default_rng(2), 300, 400, kernel)) ** 2
    expected = _time_autocorrelation(filt, 0.2) ** 2
    mean, se = _neighbour_correlations(power, 1)
    assert mean == pytest.approx(expected, abs=5 * se)


def test_far_spaced_points_are_independent():
    assert field_kernel(GAUSS, 3.0, Axis.FREQUENCY) is None
    power = draw(1, 40_000)
    mean, se = _neighbour_correlations(power.reshape(100, 400), 1)
    assert abs(mean) < 5 * se


# ---------------------------------------------------------------- bench level -------------


def flat_bench(seed=0, **kw) -> SimulatedBench:
    over = {
        "input_cable": {"loss_db": [0.0]},
        "output_cable": {"loss_db": [0.0]},
        "dut__gain_ripple_db": 0.0,
        **kw,
    }
    return SimulatedBench.from_scenario("demo-lna", seed=seed, ideal=True, **over)


def _quad_enbw(filt: RbwFilter) -> float:
    """ENBW / B3 = int |H|^2 df (Friis 1944 'effective bandwidth'), scipy.integrate.simpson."""
    return _integrate(filt.power_response(_X, 1.0))


@pytest.mark.parametrize(
    ("shape", "mode"),
    [("gaussian", SweepMode.SWEPT), ("synchronous", SweepMode.SWEPT), ("gaussian", SweepMode.FFT)],
)
def test_simulated_noise_power_per_point_is_density_times_enbw(shape, mode):
    bench = flat_bench()
    bench.set_path(Path.TERMINATION)
    bench.analyzer.set_filter_shape(shape, poles=4)
    s = bench.analyzer.configure(
        AcquisitionRequest(
            center_hz=2e9,
            span_hz=20e6,
            rbw_hz=30e3,
            points=201,
            averages=200,
            attenuation_db=0.0,
            detector=Detector.SAMPLE,
            mode=mode,
        )
    )
    trace = bench.analyzer.acquire_trace()
    density = bench.truth(trace.freq_hz)["displayed_termination_cold_w_per_hz"]
    ratio = dbm_to_w(trace.values) / (density * s.rbw_hz)
    expected = _quad_enbw(s.rbw_filter)  # docs/references.md §6a: 1.064467 / 1.128499 / Hann
    # independent points (spacing 3.3 RBW): 201 * 200 exponential samples
    assert ratio.mean() == pytest.approx(expected, rel=5 / math.sqrt(201 * 200))
    assert s.enbw_hz / s.rbw_hz == pytest.approx(expected, rel=1e-4)


@pytest.mark.parametrize(
    ("shape", "mode"),
    [("gaussian", SweepMode.SWEPT), ("synchronous", SweepMode.SWEPT), ("gaussian", SweepMode.FFT)],
)
def test_cw_tone_swept_across_the_filter_integrates_to_the_enbw(shape, mode):
    bench = flat_bench(interference={"tones": [{"freq_hz": 2.0000137e9, "level_dbm": -30.0}]})
    bench.set_path(Path.TERMINATION)
    bench.analyzer.set_filter_shape(shape, poles=4)
    s = bench.analyzer.configure(
        AcquisitionRequest(
            center_hz=2e9,
            span_hz=400e3,
            rbw_hz=10e3,
            points=4001,
            averages=1,
            attenuation_db=10.0,
            detector=Detector.SAMPLE,
            mode=mode,
        )
    )
    p = dbm_to_w(bench.analyzer.acquire_trace().values)
    spacing = s.span_hz / (s.points - 1)
    enbw_measured = float(np.sum(p)) * spacing / 1e-6  # tone: -30 dBm = 1e-6 W at the peak
    # the filter shape traced by the tone integrates to ENBW (docs/references.md §6a); the noise
    # adds
    # density * ENBW per point, ~1e-11 of the tone here
    assert enbw_measured / s.rbw_hz == pytest.approx(_quad_enbw(s.rbw_filter), rel=2e-3)
    assert p.max() == pytest.approx(1e-6, rel=0.01)


def test_dut_noise_plus_analyzer_floor_combine_as_friis_says():
    bench = flat_bench(seed=3)
    an = bench.scenario.analyzer
    req = dict(
        center_hz=3e9,
        span_hz=20e6,
        rbw_hz=100e3,
        points=101,
        averages=2000,
        attenuation_db=0.0,
        detector=Detector.SAMPLE,
    )
    s = bench.analyzer.configure(AcquisitionRequest(**req))
    n_meas = dbm_to_w(bench.analyzer.acquire_trace().values).mean() / s.enbw_hz
    bench.set_path(Path.TERMINATION)
    n_floor = dbm_to_w(bench.analyzer.acquire_trace().values).mean() / s.enbw_hz
    dut = bench.scenario.dut
    g = 10 ** (np.interp(3e9, dut.freq_hz, dut.gain_db) / 10)
    te = 290 * (10 ** (np.interp(3e9, dut.freq_hz, dut.nf_db) / 10) - 1)
    te_sa = 290 * (10 ** (np.interp(3e9, an.freq_hz, an.nf_db) / 10) - 1)
    tc, amb = 296.5, bench.scenario.ambient_k
    # docs/references.md §3/§4: N_m = k ((Tc + Te) G + Te_SA), N_f = k (T_amb + Te_SA)
    rel = 5 / math.sqrt(101 * 2000)
    assert n_meas == pytest.approx(K_BOLTZMANN * ((tc + te) * g + te_sa), rel=rel)
    assert n_floor == pytest.approx(K_BOLTZMANN * (amb + te_sa), rel=rel)
    # exact floor correction (docs/references.md §4): N_m - N_f + k T_amb = k (Tc + Te) G
    n_dut = n_meas - n_floor + K_BOLTZMANN * amb
    u = math.hypot(n_meas, n_floor) / math.sqrt(101 * 2000)
    assert n_dut == pytest.approx(K_BOLTZMANN * (tc + te) * g, abs=5 * u)


def test_reported_detector_samples_match_the_scatter():
    bench = flat_bench()
    bench.set_path(Path.TERMINATION)
    s = bench.analyzer.configure(
        AcquisitionRequest(
            center_hz=2e9,
            span_hz=0.0,
            rbw_hz=1e6,
            points=2001,
            sweep_time_s=20e-3,
            averages=1,
            detector=Detector.RMS,
            attenuation_db=0.0,
        )
    )
    k = s.detector_samples
    assert k == round(s.rbw_filter.stat_bw_hz(1e6) * 20e-3 / 2001)  # 15
    p = dbm_to_w(bench.analyzer.acquire_trace().values)
    rel_var = p.var(ddof=1) / p.mean() ** 2
    # radiometer equation: an RMS mean of k independent looks scatters 1/k (gamma shape k)
    n = p.size
    assert rel_var == pytest.approx(1 / k, abs=5 * (1 / k) * math.sqrt(2 / n + 6 / (k * n)))


def _geometric_mean_moments(m: float) -> tuple[float, float]:
    """Mean and relative variance of the geometric mean of m unit-mean exponentials, exactly:
    E[X^s] = Gamma(1 + s) for an exponential X (docs/references.md §6b)."""
    mean = special.gamma(1 + 1 / m) ** m
    return mean, special.gamma(1 + 2 / m) ** m / mean**2 - 1


@pytest.mark.parametrize(
    ("scale", "vbw_hz"),
    [
        (AveragingScale.LOG_POWER, 1e3),
        (AveragingScale.LOG_POWER, 300.0),
        (AveragingScale.VOLTAGE, 1e3),
    ],
)
def test_sample_detector_behind_a_narrow_video_filter_is_estimated_without_bias(scale, vbw_hz):
    # A video filter on a log (or linear-voltage) display averages the detected signal on that
    # scale: k video samples per point, N sweeps -> the scale average of N k single samples.
    bench = flat_bench(seed=11)
    bench.set_path(Path.TERMINATION)
    s = bench.analyzer.configure(
        AcquisitionRequest(
            center_hz=2e9,
            span_hz=20e6,
            rbw_hz=30e3,
            vbw_hz=vbw_hz,
            points=201,
            averages=4,
            attenuation_db=0.0,
            detector=Detector.SAMPLE,
            averaging_scale=scale,
        )
    )
    k = s.detector_samples
    assert k == round(s.rbw_filter.stat_bw_hz(s.rbw_hz) / (math.pi * vbw_hz))  # 14 or 48
    trace = bench.analyzer.acquire_trace()
    truth = bench.truth(2e9)["displayed_termination_cold_w_per_hz"][0]
    m = s.averages * k
    if scale is AveragingScale.LOG_POWER:
        ratio, rel_var = _geometric_mean_moments(m)
    else:
        ratio, var = _squared_mean_moments(m)
        rel_var = var / ratio**2
    # the simulator draws what the model says: raw points read low by the exact ratio
    # (independent points, 3.3 RBW apart: 201 samples of the point distribution)
    points_w = dbm_to_w(trace.values) / s.enbw_hz
    sigma = math.sqrt(rel_var / s.points)
    assert points_w.mean() / truth == pytest.approx(ratio, abs=5 * sigma * ratio)
    # and the estimator removes exactly that bias and states that scatter
    d = estimate_density(trace, reject_spurs=False)
    assert d.bias_correction_db == pytest.approx(-10 * math.log10(ratio), rel=1e-6)
    assert d.relative_u == pytest.approx(sigma, rel=1e-3)
    assert d.density_w_per_hz / truth == pytest.approx(1.0, abs=5 * sigma)


# ---------------------------------------------------------------- both methods on the bench -

from noisebench.bench.registry import simulated_enr_table  # noqa: E402
from noisebench.science.estimator import estimate_density  # noqa: E402
from noisebench.science.methods import calibrate_point, gain_method_point, y_factor_point  # noqa: E402

SEEDS_PER_CASE = 16


def seeds_for(case: int) -> range:
    """A disjoint block of seeds per test case, so the cases are independent experiments."""
    return range(100 + 1000 * case, 100 + 1000 * case + SEEDS_PER_CASE)


class Readings:
    """The densities of one Y-factor and one gain-method measurement at ``freq_hz``."""

    def __init__(self, bench: SimulatedBench, freq_hz: float, averages: int) -> None:
        self.bench, self.freq_hz = bench, freq_hz
        bench.analyzer.configure(
            AcquisitionRequest(
                center_hz=freq_hz,
                span_hz=4e6,
                rbw_hz=100e3,
                points=401,
                averages=averages,
                attenuation_db=0.0,
                preamp=True,
                detector=Detector.RMS,
            )
        )
        bench.set_path(Path.THROUGH)
        self.hot_cal, self.cold_cal = self._hot_cold()
        bench.set_path(Path.DUT)
        self.hot, self.cold = self._hot_cold()
        bench.set_path(Path.TERMINATION)
        self.floor = self._density()
        self.truth = {k: float(v[0]) for k, v in bench.truth(freq_hz).items()}

    def _density(self):
        trace = self.bench.analyzer.acquire_trace()
        return estimate_density(trace, freq_hz=self.freq_hz, band_hz=3e6)

    def _hot_cold(self):
        self.bench.noise_source.set_hot(True)
        hot = self._density()
        self.bench.noise_source.set_hot(False)
        return hot, self._density()

    def y_factor(self):
        t, tc = self.truth, self.bench.noise_source.cold_temperature_k
        enr = float(simulated_enr_table(self.bench).at(self.freq_hz).enr_db)
        cal = calibrate_point(self.hot_cal, self.cold_cal, enr, cold_temperature_k=tc)
        return y_factor_point(
            self.hot,
            self.cold,
            enr,
            cold_temperature_k=tc,
            calibration=cal,
            input_loss_db=t["input_loss_db"],
            input_loss_temperature_k=t["ambient_k"],
        )

    def gain_method(self):
        t = self.truth
        path_gain_db = t["gain_db"] - t["input_loss_db"] - t["output_loss_db"]
        return gain_method_point(
            self.cold,
            path_gain_db,
            floor=self.floor,
            source_temperature_k=self.bench.noise_source.cold_temperature_k,
            floor_temperature_k=t["ambient_k"],
            input_loss_db=t["input_loss_db"],
            output_loss_db=t["output_loss_db"],
            input_loss_temperature_k=t["ambient_k"],
            output_loss_temperature_k=t["ambient_k"],
        )


def _assert_covered(z: np.ndarray) -> None:
    """Normalised errors z = (result - truth) / u must look standard normal.

    No |z| beyond 4.5 (p < 1e-4 for 16 values) and sum z^2 inside the central 99.8 % of its
    chi-square distribution: the stated uncertainty is neither too small nor far too large.
    """
    from scipy.stats import chi2

    assert np.max(np.abs(z)) < 4.5, z
    lo, hi = chi2.ppf([0.001, 0.999], z.size)
    assert lo < float(np.sum(z**2)) < hi, z


@pytest.mark.parametrize(
    ("case", "scenario", "freq_hz", "methods"),
    [
        (0, "demo-lna", 2e9, ("y_factor", "gain")),
        (1, "demo-lna", 5.5e9, ("y_factor", "gain")),
        (2, "high-nf", 1e9, ("y_factor", "gain")),
        (3, "attenuator-6db", 3e9, ("y_factor",)),
    ],
)
def test_methods_recover_the_true_nf_within_their_stated_uncertainty(
    case, scenario, freq_hz, methods
):
    z = {m: [] for m in methods}
    z_gain = []
    for seed in seeds_for(case):
        r = Readings(SimulatedBench.from_scenario(scenario, seed=seed, ideal=True), freq_hz, 100)
        for method in methods:
            result = r.y_factor() if method == "y_factor" else r.gain_method()
            z[method].append((result.nf_db - r.truth["nf_db"]) / result.u_nf_db)
            if method == "y_factor":  # the Y-factor gain of the DUT (input loss de-embedded)
                z_gain.append((result.gain_db - r.truth["gain_db"]) / result.u_gain_db)
    for method in methods:
        _assert_covered(np.array(z[method]))
    _assert_covered(np.array(z_gain))


def test_absolute_level_error_enters_the_gain_method_only():
    # docs/references.md §4: an absolute level error passes 1:1 into the gain method's NF; the
    # Y-factor method works on ratios and does not see it
    error_db = 0.5
    gain_err, y_err, u_gain, u_y = [], [], [], []
    for seed in seeds_for(4)[:8]:
        bench = SimulatedBench.from_scenario(
            "demo-lna", seed=seed, ideal=True, analyzer__amplitude_error_db=error_db
        )
        r = Readings(bench, 2e9, 100)
        g, y = r.gain_method(), r.y_factor()
        gain_err.append(g.nf_db - r.truth["nf_db"])
        u_gain.append(g.u_nf_db)
        y_err.append(y.nf_db - r.truth["nf_db"])
        u_y.append(y.u_nf_db)
    se_gain = math.sqrt(np.sum(np.square(u_gain))) / len(u_gain)
    se_y = math.sqrt(np.sum(np.square(u_y))) / len(u_y)
    # with Ts ~ T0 the level factor a scales F almost exactly: error 10 log10(a) (+ O(1/G))
    assert np.mean(gain_err) == pytest.approx(error_db, abs=5 * se_gain)
    assert np.mean(y_err) == pytest.approx(0.0, abs=5 * se_y)

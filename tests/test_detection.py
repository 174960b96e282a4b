"""Detector and trace-averaging bias and variance for Gaussian noise (noisebench.science.detection).

Closed forms are checked against scipy.special and against Monte Carlo draws of exponential
(power) and Rayleigh (envelope) samples with fixed seeds. Tolerances are 5 standard errors of
the estimate, the standard error taken from the known sampling distribution (or, for variances
and correlations, from batch means of the same draws).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special
from scipy.integrate import quad

from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector
from noisebench.errors import InputError
from noisebench.science.detection import (
    C_DB,
    PointModel,
    PointStatistic,
    envelope_average_bias_db,
    log_average_bias_db,
    point_model,
    point_model_for,
    trace_average_mean_ratio,
    trace_average_model,
    trace_average_relative_variance,
)

GEO, VOLT, MEAN = (
    PointStatistic.GEOMETRIC_MEAN,
    PointStatistic.SQUARED_VOLTAGE_MEAN,
    PointStatistic.MEAN,
)
Z = 5.0  # tolerance in standard errors


def _settings(**kw) -> AcquisitionSettings:
    base = dict(
        center_hz=1e9,
        span_hz=1e6,
        rbw_hz=1e4,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=10,
        points=101,
    )
    base.update(kw)
    return AcquisitionSettings(**base)


def _gamma_powers(rng, shape, size):
    """Powers that are k-sample means of exponential samples (gamma, unit mean)."""
    return rng.gamma(shape, 1.0 / shape, size=size)


def _batch_se(values: np.ndarray, stat, batches: int = 50) -> float:
    """Standard error of ``stat`` over all values, from the scatter of ``batches`` batch values."""
    parts = np.array_split(values, batches, axis=0)
    return float(np.std([stat(p) for p in parts], ddof=1) / math.sqrt(batches))


# --- log averaging -----------------------------------------------------------------------------


def test_log_average_bias_closed_form():
    # reference: docs/references.md §6b, 10 log10(e) * Euler gamma = 2.506816 dB
    assert log_average_bias_db() == pytest.approx(
        -10 * math.log10(math.e) * np.euler_gamma, rel=1e-13
    )
    # E[ln X] = -gamma for a unit exponential, by numerical integration (Papoulis, from memory)
    e_ln = quad(lambda x: math.log(x) * math.exp(-x), 0, np.inf)[0]
    assert log_average_bias_db() == pytest.approx(C_DB * e_ln, rel=1e-9)


def test_log_average_bias_monte_carlo():
    # exponential power samples; one dB reading has std c_dB pi/sqrt(6) (Gumbel, docs/references.md
    # §6c)
    rng = np.random.default_rng(20240601)
    m = 2_000_000
    x = rng.exponential(1.0, m)
    observed = float(np.mean(10 * np.log10(x)))
    se = C_DB * math.pi / math.sqrt(6) / math.sqrt(m)
    assert abs(observed - log_average_bias_db()) < Z * se


@pytest.mark.parametrize("k, table_db", [(2, -1.1742), (10, -0.2208), (100, -0.0218)])
def test_log_bias_of_k_sample_means(k, table_db):
    # reference: docs/references.md §6b, c_dB (psi(k) - ln k) via scipy.special.digamma
    expected = C_DB * (special.digamma(k) - math.log(k))
    assert log_average_bias_db(k) == pytest.approx(expected, rel=1e-13)
    assert log_average_bias_db(k) == pytest.approx(table_db, abs=5e-5)
    # Monte Carlo: Var(ln X) of a k-sample mean is trigamma(k) (gamma distribution)
    rng = np.random.default_rng(k)
    m = 400_000
    obs = float(np.mean(10 * np.log10(_gamma_powers(rng, k, m))))
    se = C_DB * math.sqrt(special.polygamma(1, k) / m)
    assert abs(obs - log_average_bias_db(k)) < Z * se


@pytest.mark.parametrize("n", [1, 2, 5, 20, 100])
def test_geometric_mean_of_n_exponentials_exact(n):
    # E[G] = mu Gamma(1+1/N)^N (reference brief; E[X^s] = Gamma(1+s) for a unit exponential)
    model = trace_average_model(AveragingScale.LOG_POWER, n)
    assert model.mean_ratio() == pytest.approx(special.gamma(1 + 1 / n) ** n, rel=1e-12)
    # Var: E[G^2] = Gamma(1+2/N)^N
    expected_rv = special.gamma(1 + 2 / n) ** n / special.gamma(1 + 1 / n) ** (2 * n) - 1
    assert model.relative_variance() == pytest.approx(expected_rv, rel=1e-10)
    rng = np.random.default_rng(100 + n)
    m = 1_000_000 // n
    g = np.exp(np.mean(np.log(rng.exponential(1.0, (m, n))), axis=1))
    se_mean = math.sqrt(expected_rv) * model.mean_ratio() / math.sqrt(m)
    assert abs(g.mean() - model.mean_ratio()) < Z * se_mean
    rel = g / model.mean_ratio()
    assert abs(np.var(rel) - model.relative_variance()) < Z * _batch_se(rel, np.var)


def test_log_averaging_converges_to_the_asymptotic_bias_and_efficiency():
    # N -> inf: E[G] -> exp(-gamma), i.e. -2.5068 dB; variance -> (pi^2/6)/N (docs/references.md
    # §6c)
    model = trace_average_model(AveragingScale.LOG_POWER, 1e6)
    assert model.bias_db == pytest.approx(log_average_bias_db(), abs=1e-5)
    assert model.correction_db == pytest.approx(-model.bias_db)
    assert model.relative_variance() * 1e6 == pytest.approx(np.pi**2 / 6, rel=1e-5)
    # k-sample values: variance -> trigamma(k)/N, mean bias -> the k-sample log bias
    m10 = trace_average_model(AveragingScale.LOG_POWER, 1e6, samples_per_value=10)
    assert m10.relative_variance() * 1e6 == pytest.approx(special.polygamma(1, 10), rel=1e-5)
    assert m10.bias_db == pytest.approx(log_average_bias_db(10), abs=1e-6)


@pytest.mark.parametrize("k, n", [(3, 4), (10, 2), (2.5, 7)])
def test_geometric_mean_of_gamma_powers(k, n):
    # RMS detector (k-sample power means) + log averaging: E[X^s] = Gamma(k+s)/(Gamma(k) k^s)
    model = trace_average_model(AveragingScale.LOG_POWER, n, samples_per_value=k)
    e_s = lambda s: special.gamma(k + s) / (special.gamma(k) * k**s)  # noqa: E731
    assert model.mean_ratio() == pytest.approx(e_s(1 / n) ** n, rel=1e-12)
    assert model.relative_variance() == pytest.approx(
        e_s(2 / n) ** n / e_s(1 / n) ** (2 * n) - 1, rel=1e-10
    )
    rng = np.random.default_rng(7)
    m = 400_000
    g = np.exp(np.mean(np.log(_gamma_powers(rng, k, (m, n))), axis=1)) / model.mean_ratio()
    assert abs(g.mean() - 1) < Z * math.sqrt(model.relative_variance() / m)
    assert abs(np.var(g) - model.relative_variance()) < Z * _batch_se(g, np.var)


# --- voltage (envelope) averaging ----------------------------------------------------------------


def test_envelope_bias_closed_form_and_rayleigh_monte_carlo():
    # reference: docs/references.md §6b, 10 log10(pi/4) = -1.049101 dB for a Rayleigh envelope
    assert envelope_average_bias_db() == pytest.approx(10 * math.log10(math.pi / 4), rel=1e-13)
    rng = np.random.default_rng(11)
    m = 2_000_000
    v = rng.rayleigh(scale=1 / math.sqrt(2), size=m)  # E[V^2] = 1
    obs_db = 20 * math.log10(v.mean())
    se_db = 20 / math.log(10) * math.sqrt(1 - math.pi / 4) / math.sqrt(m) / v.mean()
    assert abs(obs_db - envelope_average_bias_db()) < Z * se_db


@pytest.mark.parametrize("n", [1, 2, 7, 50])
def test_squared_voltage_mean_exact(n):
    # E[(mean V)^2] = P (pi/4 + (1 - pi/4)/N) for Rayleigh envelopes (reference brief)
    model = trace_average_model(AveragingScale.VOLTAGE, n)
    assert model.mean_ratio() == pytest.approx(math.pi / 4 + (1 - math.pi / 4) / n, rel=1e-12)
    rng = np.random.default_rng(300 + n)
    m = 1_000_000 // n
    p = np.mean(rng.rayleigh(1 / math.sqrt(2), (m, n)), axis=1) ** 2 / model.mean_ratio()
    assert abs(p.mean() - 1) < Z * math.sqrt(model.relative_variance() / m)
    assert abs(np.var(p) - model.relative_variance()) < Z * _batch_se(p, np.var)


def test_voltage_single_value_is_the_power_itself():
    # N = 1: the squared envelope is the exponential power: unbiased, relative variance 1
    model = trace_average_model(AveragingScale.VOLTAGE, 1)
    assert model.mean_ratio() == pytest.approx(1.0, rel=1e-13)
    assert model.relative_variance() == pytest.approx(1.0, rel=1e-12)


def test_voltage_efficiency_many_averages():
    # delta method: Var((mean V)^2)/E^2 -> 4 Var(V)/(N E[V]^2) = (16/pi - 4)/N  [derived]
    model = trace_average_model(AveragingScale.VOLTAGE, 1e5)
    assert model.relative_variance() * 1e5 == pytest.approx(16 / math.pi - 4, rel=1e-4)
    assert model.bias_db == pytest.approx(
        10 * math.log10(math.pi / 4 + (1 - math.pi / 4) / 1e5), abs=1e-12
    )
    assert model.bias_db - envelope_average_bias_db() == pytest.approx(
        C_DB * (4 / math.pi - 1) / 1e5, rel=1e-3
    )  # the 1/N term, to first order


@pytest.mark.parametrize("k, n", [(4, 3), (2, 10)])
def test_squared_voltage_mean_of_gamma_powers(k, n):
    # RMS detector + voltage averaging: V = sqrt of a k-sample power mean
    model = trace_average_model(AveragingScale.VOLTAGE, n, samples_per_value=k)
    m1 = special.gamma(k + 0.5) / (special.gamma(k) * math.sqrt(k))
    assert model.mean_ratio() == pytest.approx(m1**2 + (1 - m1**2) / n, rel=1e-12)
    rng = np.random.default_rng(13)
    m = 300_000
    p = np.mean(np.sqrt(_gamma_powers(rng, k, (m, n))), axis=1) ** 2 / model.mean_ratio()
    assert abs(p.mean() - 1) < Z * math.sqrt(model.relative_variance() / m)
    assert abs(np.var(p) - model.relative_variance()) < Z * _batch_se(p, np.var)


# --- power averaging -----------------------------------------------------------------------------


def test_power_averaging_unbiased_with_1_over_n_variance():
    # reference: docs/references.md §6c, linear power averaging: relative std 1/sqrt(N k)
    assert trace_average_mean_ratio(AveragingScale.POWER, 37, 3) == 1.0
    assert trace_average_relative_variance(AveragingScale.POWER, 37, 3) == pytest.approx(1 / 111)
    rng = np.random.default_rng(17)
    p = np.mean(_gamma_powers(rng, 3, (200_000, 37)), axis=1)
    assert abs(p.mean() - 1) < Z * math.sqrt(1 / 111 / p.size)
    assert abs(np.var(p) - 1 / 111) < Z * _batch_se(p, np.var)


# --- correlation of neighbouring points ----------------------------------------------------------


def _correlated_powers(rng, rho, m, n, k):
    """(m, n, k) power pairs of jointly complex-Gaussian noise with power correlation rho."""
    shape = (m, n, k)
    z1 = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / math.sqrt(2)
    w = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / math.sqrt(2)
    z2 = math.sqrt(rho) * z1 + math.sqrt(1 - rho) * w
    return np.abs(z1) ** 2, np.abs(z2) ** 2


@pytest.mark.parametrize(
    "stat, k, n", [(GEO, 1, 5), (GEO, 3, 4), (VOLT, 1, 7), (VOLT, 4, 3), (MEAN, 2, 3)]
)
def test_point_correlation_monte_carlo(stat, k, n):
    # bivariate-gamma (Kibble) moments: E[X^s Y^t] = E[X^s] E[Y^t] 2F1(-s,-t;k;rho) [derived]
    rho = 0.6
    rng = np.random.default_rng(23)
    x, y = _correlated_powers(rng, rho, 200_000, n, k)
    x, y = x.mean(axis=2), y.mean(axis=2)  # k-sample (RMS) detector
    if stat is GEO:
        p, q = (np.exp(np.log(a).mean(axis=1)) for a in (x, y))
    elif stat is VOLT:
        p, q = (np.sqrt(a).mean(axis=1) ** 2 for a in (x, y))
    else:
        p, q = x.mean(axis=1), y.mean(axis=1)
    pairs = np.stack([p, q], axis=1)
    corr = lambda a: np.corrcoef(a[:, 0], a[:, 1])[0, 1]  # noqa: E731
    expected = PointModel(stat, count=n, shape=k).correlation(np.array([rho]))[0]
    assert abs(corr(pairs) - expected) < Z * _batch_se(pairs, corr)


def test_log_correlation_of_single_samples_is_the_dilogarithm():
    # many log averages of single samples: corr = Li2(rho) / (pi^2/6); scipy spence(1-x) = Li2(x)
    rho = np.array([0.0, 0.1, 0.5, 0.9, 0.999, 1.0])
    for count in (500.0, 5e4):  # both branches (hypergeometric function and its series)
        got = PointModel(GEO, count=count, shape=1.0).correlation(rho)
        expected = special.spence(1 - rho) / (np.pi**2 / 6)
        np.testing.assert_allclose(got, expected, rtol=3e-3, atol=1e-12)


@given(stat=st.sampled_from([GEO, VOLT, MEAN]), k=st.floats(1.0, 500.0), n=st.floats(1.0, 1e5))
@settings(max_examples=60, deadline=None)
def test_model_invariants(stat, k, n):
    model = PointModel(stat, count=n, shape=k)
    ratio = model.mean_ratio()
    # Jensen: geometric and squared-root means never exceed the arithmetic mean
    assert 0 < ratio <= 1 + 1e-12
    if stat is GEO:  # and never fall below the N -> infinity limit exp(psi(k) - ln k)
        assert ratio >= math.exp(special.digamma(k) - math.log(k)) * (1 - 1e-9)
    rv = model.relative_variance()
    assert 0 < rv < math.inf
    rho = np.linspace(0, 1, 11)
    c = model.correlation(rho)
    assert c[0] == pytest.approx(0.0, abs=1e-12) and c[-1] == pytest.approx(1.0, rel=1e-6)
    assert np.all(np.diff(c) >= -1e-9) and np.all(c <= rho + 1e-9)  # never above rho


# --- detectors and refusals --------------------------------------------------------------------


def test_detector_mapping():
    # AVERAGE detector on the log scale: log average of N*k single samples
    avg = point_model(Detector.AVERAGE, AveragingScale.LOG_POWER, 5, 4)
    assert avg == PointModel(GEO, count=20, shape=1.0)
    # RMS detector: N values, each a k-sample power mean
    assert point_model(Detector.RMS, AveragingScale.LOG_POWER, 5, 4) == PointModel(GEO, 5, 4)
    # SAMPLE detector: one sample per point, whatever else is reported as unknown
    assert point_model(Detector.SAMPLE, AveragingScale.VOLTAGE, 3, None) == PointModel(VOLT, 3)
    assert point_model(Detector.SAMPLE, AveragingScale.VOLTAGE, 3, 1) == PointModel(VOLT, 3)
    # SAMPLE with k > 1 video samples: a video filter averages on the display scale, like the
    # AVERAGE detector, so N sweeps hold the scale average of N * k single samples
    assert point_model(Detector.SAMPLE, AveragingScale.LOG_POWER, 5, 4) == PointModel(GEO, 20)
    assert point_model(Detector.SAMPLE, AveragingScale.VOLTAGE, 3, 6) == PointModel(VOLT, 18)
    # power scale: AVERAGE and RMS agree (both are power means of N*k samples)
    a = point_model(Detector.AVERAGE, AveragingScale.POWER, 5, 4)
    r = point_model(Detector.RMS, AveragingScale.POWER, 5, 4)
    assert a.relative_variance() == pytest.approx(r.relative_variance()) == pytest.approx(1 / 20)


@pytest.mark.parametrize("det", [Detector.PEAK, Detector.NEGATIVE_PEAK])
def test_peak_detectors_refused(det):
    with pytest.raises(InputError) as info:
        point_model_for(_settings(detector=det), field="trace.settings")
    assert info.value.field == "trace.settings.detector"
    assert "RMS" in info.value.fix and "sample" in info.value.fix


@pytest.mark.parametrize(
    "det, scale",
    [
        (Detector.RMS, AveragingScale.LOG_POWER),
        (Detector.RMS, AveragingScale.VOLTAGE),
        (Detector.AVERAGE, AveragingScale.LOG_POWER),
        (Detector.AVERAGE, AveragingScale.VOLTAGE),
    ],
)
def test_unknown_detector_samples_refused_where_they_set_the_bias(det, scale):
    with pytest.raises(InputError) as info:
        point_model_for(_settings(detector=det, averaging_scale=scale), field="trace.settings")
    assert info.value.field == "trace.settings.detector_samples"
    assert "not a guess" in str(info.value)


def test_unknown_detector_samples_on_power_scale_leaves_only_the_variance_unknown():
    model = point_model_for(_settings(detector=Detector.RMS))
    assert model.mean_ratio() == 1.0 and not model.variance_known
    with pytest.raises(InputError, match="detector_samples"):
        model.relative_variance()


def test_video_filter_smoothing_needs_the_sample_count():
    narrow = dict(detector=Detector.SAMPLE, vbw_hz=1e3)  # VBW = RBW / 10
    with pytest.raises(InputError, match="detector_samples"):
        point_model_for(_settings(averaging_scale=AveragingScale.LOG_POWER, **narrow))
    assert not point_model_for(_settings(**narrow)).variance_known
    # wide VBW (common practice: >= 3 x RBW does not smooth noise) or a reported count: fine
    wide = point_model_for(
        _settings(detector=Detector.SAMPLE, vbw_hz=3e4, averaging_scale=AveragingScale.LOG_POWER)
    )
    assert wide == PointModel(GEO, 10, 1.0)
    told = point_model_for(
        _settings(averaging_scale=AveragingScale.LOG_POWER, detector_samples=6.5, **narrow)
    )
    assert told == PointModel(GEO, 65, 1.0)  # 10 sweeps x 6.5 video samples on the log scale


@pytest.mark.parametrize("bad", [0, -1, float("nan"), float("inf")])
def test_bad_counts_name_the_field(bad):
    with pytest.raises(InputError, match="samples_per_value"):
        log_average_bias_db(bad)
    with pytest.raises(InputError, match="x.averages"):
        point_model(Detector.SAMPLE, AveragingScale.POWER, bad, None, field="x")

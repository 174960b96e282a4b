"""The simulator's averaged traces drawn from the exact distribution of the average
(``noisebench/sims/averaged.py``) against the brute-force generator that draws every look
(``generate_trace(..., exact=True)``), over seeds: mean, variance and neighbour correlation for
every detector and averaging scale, and the log-scale bias for small trace counts against
closed forms. Tolerances are 5 standard errors of the compared estimates.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special
from scipy.special import hyp2f1, spence

from noisebench.bench.acquisition import AveragingScale, Detector
from noisebench.science.filters import RbwFilter
from noisebench.sims.averaged import averaged_cumulants, scale_correlation, trace_cumulants
from noisebench.sims.noisegen import (
    AGGREGATE_MIN_TRACES,
    Axis,
    TraceRecipe,
    field_kernel,
    generate_trace,
)

Z = 5.0  # standard errors


def _draw(det, scale, looks, n_traces, n_points, seeds, *, exact, kernel=None, seed0=0):
    recipe = TraceRecipe(
        n_traces=n_traces,
        n_points=n_points,
        looks=looks,
        detector=det,
        averaging_scale=scale,
        kernel=kernel,
    )
    return np.stack(
        [
            generate_trace(np.random.default_rng(seed0 + s), recipe, np.ones(n_points), exact=exact)
            for s in range(seeds)
        ]
    )


def _g(x, scale):
    if scale is AveragingScale.LOG_POWER:
        return np.log(x)
    return x if scale is AveragingScale.POWER else np.sqrt(x)


CASES = [(d, s) for d in Detector for s in AveragingScale]


@pytest.mark.parametrize(("det", "scale"), CASES, ids=lambda v: v.value)
def test_average_matches_drawing_every_look_in_mean_and_variance(det, scale):
    looks, n_traces, p, seeds = 3, AGGREGATE_MIN_TRACES, 4000, 6
    fast = _g(_draw(det, scale, looks, n_traces, p, seeds, exact=False), scale).ravel()
    brute = _g(_draw(det, scale, looks, n_traces, p, seeds, exact=True, seed0=100), scale).ravel()
    n = fast.size
    # independent points: the difference of two sample means and of two sample variances
    se_mean = math.sqrt(fast.var() / n + brute.var() / n)
    assert fast.mean() == pytest.approx(brute.mean(), abs=Z * se_mean)
    kurt = float(np.mean((brute - brute.mean()) ** 4) / brute.var() ** 2)
    se_var = brute.var() * math.sqrt(2 * (kurt - 1) / n)
    assert fast.var() == pytest.approx(brute.var(), abs=Z * se_var)
    # and both against the closed-form cumulants (mean and variance of the average)
    k = averaged_cumulants(det, scale, looks, n_traces)
    assert brute.mean() == pytest.approx(k[0], abs=Z * math.sqrt(k[1] / n))
    assert brute.var() == pytest.approx(k[1], abs=Z * se_var)


@pytest.mark.parametrize(
    ("det", "scale"),
    [
        (Detector.SAMPLE, AveragingScale.LOG_POWER),
        (Detector.SAMPLE, AveragingScale.VOLTAGE),
        (Detector.RMS, AveragingScale.LOG_POWER),
        (Detector.AVERAGE, AveragingScale.VOLTAGE),
        (Detector.PEAK, AveragingScale.POWER),
        (Detector.NEGATIVE_PEAK, AveragingScale.LOG_POWER),
    ],
    ids=lambda v: v.value,
)
def test_neighbour_correlation_matches_drawing_every_look(det, scale):
    kernel = field_kernel(RbwFilter(), 0.3, Axis.FREQUENCY)
    looks, n_traces, p, seeds = 3, 10, 3000, 8
    fast = _g(_draw(det, scale, looks, n_traces, p, seeds, exact=False, kernel=kernel), scale)
    brute = _g(
        _draw(det, scale, looks, n_traces, p, seeds, exact=True, kernel=kernel, seed0=50), scale
    )

    def lag_corr(x, lag):
        x = x - x.mean()
        return float(np.mean(x[:, :-lag] * x[:, lag:]) / np.mean(x * x))

    for lag in (1, 2, 4):
        expected = float(scale_correlation(kernel.power_correlation[lag], det, scale, looks)[0])
        r_fast, r_brute = lag_corr(fast, lag), lag_corr(brute, lag)
        # correlated series: the estimate's variance grows with the correlation time
        rho = scale_correlation(kernel.power_correlation, det, scale, looks)
        tau = 1 + 2 * float(np.sum(rho[1:] ** 2))
        se = math.sqrt(2 * tau / (p * seeds))
        assert r_fast == pytest.approx(r_brute, abs=Z * se)
        assert r_brute == pytest.approx(expected, abs=Z * se)


@pytest.mark.parametrize("n_traces", [AGGREGATE_MIN_TRACES, 12, 40])
def test_log_average_of_few_traces_has_the_exact_small_count_bias(n_traces):
    # E[exp(mean of N ln E_i)] = prod E[E^(1/N)] = Gamma(1 + 1/N)^N for unit exponentials
    # (gamma moments E[X^s] = Gamma(1+s)); -> exp(-Euler gamma) for many traces
    p, seeds = 20_000, 4
    values = _draw(Detector.SAMPLE, AveragingScale.LOG_POWER, 1, n_traces, p, seeds, exact=False)
    expected = special.gamma(1 + 1 / n_traces) ** n_traces
    assert values.mean() == pytest.approx(expected, abs=Z * values.std() / math.sqrt(values.size))
    assert expected - math.exp(-np.euler_gamma) > 0.02 / n_traces  # the effect is resolved


def test_voltage_average_of_few_traces_reads_pi_over_4_plus_the_finite_count_term():
    # E[(mean of N Rayleigh envelopes)^2] = pi/4 + (1 - pi/4)/N for unit mean power
    n_traces, p, seeds = AGGREGATE_MIN_TRACES, 20_000, 4
    values = _draw(Detector.SAMPLE, AveragingScale.VOLTAGE, 1, n_traces, p, seeds, exact=False)
    expected = math.pi / 4 + (1 - math.pi / 4) / n_traces
    assert values.mean() == pytest.approx(expected, abs=Z * values.std() / math.sqrt(values.size))


def test_closed_form_cumulants_and_correlation_maps():
    # one look on the log scale: ln of a unit exponential is a negated Gumbel variable:
    # mean -gamma, variance pi^2/6, third cumulant -2 zeta(3), fourth pi^4/15
    k = trace_cumulants(Detector.SAMPLE, AveragingScale.LOG_POWER, 1)
    assert k == pytest.approx(
        [-np.euler_gamma, math.pi**2 / 6, -2 * special.zeta(3), math.pi**4 / 15], rel=1e-9
    )
    # RMS of k looks, log scale: psi(k) - ln k, trigamma(k)
    k10 = trace_cumulants(Detector.RMS, AveragingScale.LOG_POWER, 10)
    assert k10[:2] == pytest.approx(
        [special.digamma(10) - math.log(10), float(special.polygamma(1, 10))], rel=1e-9
    )
    c = np.array([0.1, 0.5, 0.9, 0.99])
    # one look: Cov(ln X, ln Y) = Li2(c) (scipy's spence(1 - c) is Li2(c)); envelopes:
    # (pi/4)(2F1(-1/2, -1/2; 1; c) - 1) over Var = 1 - pi/4
    log_map = scale_correlation(c, Detector.SAMPLE, AveragingScale.LOG_POWER, 1)
    assert log_map == pytest.approx(spence(1 - c) / (math.pi**2 / 6), abs=3e-4)
    v_map = scale_correlation(c, Detector.SAMPLE, AveragingScale.VOLTAGE, 1)
    assert v_map == pytest.approx((hyp2f1(-0.5, -0.5, 1, c) - 1) / (4 / math.pi - 1), abs=3e-4)
    assert scale_correlation(c, Detector.RMS, AveragingScale.POWER, 7) == pytest.approx(c)

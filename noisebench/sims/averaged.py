"""Averaged traces drawn from their exact distributions, without drawing every look.

A trace averaged over ``N`` traces on a scale ``g`` (power: ``g(x) = x``, log-power:
``ln x``, voltage: ``sqrt x``) holds at each point the mean of ``N`` independent values
``g(D)``, where ``D`` is the detected power of one trace (``looks`` looks combined by the
detector). Its distribution is known exactly through its cumulants: the ``n``-th cumulant of the
mean of ``N`` is ``kappa_n(g(D)) / N^(n-1)``, and ``kappa_n(g(D))`` comes in closed form
(gamma and exponential moments, polygamma functions) or, for the peak detector, by quadrature of
the order-statistic density. A point is then drawn as ``kappa_1 + sqrt(kappa_2) w(z)`` with the
Cornish-Fisher expansion ``w(z)`` to the fourth cumulant (Cornish & Fisher 1938; Abramowitz &
Stegun 26.2.51): the mean is exact, the variance exact to O(1/N^2), the skew and kurtosis exact
to their leading order - so the log-scale bias (Euler's constant for one trace, ``psi(k) - ln k``
for ``k`` looks) and its shrinking with ``N`` are reproduced.

Neighbouring points stay correlated: ``z`` is a Gaussian field whose correlation is the
correlation of ``g(D)`` between two points, a function ``h`` of their power correlation ``c``.
For a mean of ``k`` looks, (X, Y) is Kibble's bivariate gamma distribution, whose Laguerre
expansion (Kibble 1941) gives ``Cov(g(X), g(Y)) = sum_n c^n n! Gamma(k) / Gamma(n+k) a_n^2`` with
``a_n = E[g(X) L_n^(k-1)(X)]``: ``-1/n`` for the logarithm and
``Gamma(k+s)/Gamma(k) (-s)_n / n!`` for ``x^s`` (``s = 1`` gives ``h(c) = c``; ``k = 1`` gives
``Li2(c) / zeta(2)`` and ``(2F1(-1/2, -1/2; 1; c) - 1) / (4/pi - 1)``). The peak detectors have no
such series: their ``h`` is measured once by Monte Carlo with a fixed seed (up to
``noisegen.EXACT_LOOKS`` looks; beyond, the power correlation is used, as the per-trace
large-sample form does). Nothing here is shared with the estimator (``science/detection.py``):
the simulator's statistics are derived independently, and ``tests/test_sim_statistics.py``
checks them against the brute-force generator (every look drawn) over seeds.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import integrate
from scipy.special import gammaln, polygamma

from noisebench.bench.acquisition import AveragingScale, Detector

SERIES_TERMS = 4096  # Laguerre series terms; truncation < 2e-4 relative at c -> 1, k = 1
MC_PAIRS = 20_000  # Monte Carlo pairs per correlation for the peak detectors
MC_GRID = 26  # power-correlation grid for the peak detectors' h(c)
EXACT_PEAK_LOOKS = 16  # beyond, the peak detectors use h(c) = c


def _kind(detector: Detector, scale: AveragingScale, looks: int) -> str:
    """How one trace's detected value relates to its looks (mirrors ``noisegen._combine``)."""
    if looks == 1 and detector in (Detector.SAMPLE, Detector.PEAK, Detector.NEGATIVE_PEAK):
        return "gamma"  # one look: an exponential power, whatever the detector
    if detector is Detector.PEAK:
        return "max"
    if detector is Detector.NEGATIVE_PEAK:
        return "min"
    if detector is Detector.RMS or scale is AveragingScale.POWER:
        return "gamma"  # power mean of k looks: Gamma(k) / k
    return "mean_of_g"  # SAMPLE behind a video filter / AVERAGE: mean of k values g(look)


def _central_from_raw(raw: list[float]) -> tuple[float, float, float, float]:
    """(mean, variance, third, fourth central moment) from raw moments E[x^1..4]."""
    m1, m2, m3, m4 = raw
    var = m2 - m1**2
    mu3 = m3 - 3 * m1 * m2 + 2 * m1**3
    mu4 = m4 - 4 * m1 * m3 + 6 * m1**2 * m2 - 3 * m1**4
    return m1, var, mu3, mu4


def _cumulants_from_central(m: float, var: float, mu3: float, mu4: float) -> np.ndarray:
    return np.array([m, var, mu3, mu4 - 3 * var**2])


def _gamma_cumulants(k: float, scale: AveragingScale) -> np.ndarray:
    """Cumulants of g(X / k), X ~ Gamma(k, 1)."""
    if scale is AveragingScale.LOG_POWER:
        return np.array(
            [float(polygamma(0, k)) - math.log(k)] + [float(polygamma(n, k)) for n in (1, 2, 3)]
        )
    if scale is AveragingScale.POWER:
        return np.array([1.0, 1.0 / k, 2.0 / k**2, 6.0 / k**3])
    raw = [math.exp(gammaln(k + j / 2) - gammaln(k) - (j / 2) * math.log(k)) for j in (1, 2, 3, 4)]
    return _cumulants_from_central(*_central_from_raw(raw))


def _min_cumulants(k: float, scale: AveragingScale) -> np.ndarray:
    """Cumulants of g(E / k), E ~ Exp(1): the minimum of k unit-mean exponentials."""
    one = _gamma_cumulants(1.0, scale)
    if scale is AveragingScale.LOG_POWER:
        return one - np.array([math.log(k), 0.0, 0.0, 0.0])
    power = 1.0 if scale is AveragingScale.POWER else 0.5
    return one * np.array([k ** (-power * n) for n in (1, 2, 3, 4)])


def _max_cumulants(k: int, scale: AveragingScale) -> np.ndarray:
    """Cumulants of g(D), D the maximum of k unit-mean exponentials (quadrature of the
    order-statistic density ``k (1 - e^-x)^(k-1) e^-x``)."""

    def g(x):
        if scale is AveragingScale.LOG_POWER:
            return math.log(x)
        return x if scale is AveragingScale.POWER else math.sqrt(x)

    def pdf(x):
        return k * (-math.expm1(-x)) ** (k - 1) * math.exp(-x)

    def moment(fn):
        lo = integrate.quad(lambda x: fn(x) * pdf(x), 0.0, 1.0, limit=200)[0]
        return lo + integrate.quad(lambda x: fn(x) * pdf(x), 1.0, math.inf, limit=200)[0]

    mean = moment(g)
    central = [moment(lambda x, n=n: (g(x) - mean) ** n) for n in (2, 3, 4)]
    return _cumulants_from_central(mean, *central)


@lru_cache(maxsize=256)
def trace_cumulants(detector: Detector, scale: AveragingScale, looks: int) -> np.ndarray:
    """First four cumulants of ``g(D)`` for one trace (unit mean power per look)."""
    kind = _kind(detector, scale, looks)
    if kind == "gamma":
        return _gamma_cumulants(float(looks), scale)
    if kind == "mean_of_g":
        one = _gamma_cumulants(1.0, scale)
        return one / np.array([1.0, looks, looks**2, looks**3])
    if kind == "min":
        return _min_cumulants(float(looks), scale)
    return _max_cumulants(int(looks), scale)


def averaged_cumulants(
    detector: Detector, scale: AveragingScale, looks: int, n_traces: int
) -> np.ndarray:
    """Cumulants of the mean of ``n_traces`` independent ``g(D)``."""
    return trace_cumulants(detector, scale, looks) / np.array(
        [1.0, n_traces, n_traces**2, n_traces**3]
    )


def cornish_fisher(z: np.ndarray, cumulants: np.ndarray) -> np.ndarray:
    """Quantile of a distribution with these four cumulants at standard normal ``z``."""
    k1, k2, k3, k4 = (float(c) for c in cumulants)
    sd = math.sqrt(k2)
    g1, g2 = k3 / sd**3, k4 / k2**2
    z2 = z * z
    w = (
        z
        + (z2 - 1.0) * (g1 / 6.0)
        + z * (z2 - 3.0) * (g2 / 24.0)
        - z * (2 * z2 - 5.0) * (g1 * g1 / 36.0)
    )
    return k1 + sd * w


def finish(value_on_scale: np.ndarray, scale: AveragingScale) -> np.ndarray:
    """Averaged value on its scale -> power (unit mean per look)."""
    if scale is AveragingScale.LOG_POWER:
        return np.exp(value_on_scale)
    if scale is AveragingScale.POWER:
        return np.maximum(value_on_scale, 0.0)
    return np.maximum(value_on_scale, 0.0) ** 2


# ----------------------------------------------------------------- correlation map ---------


def _series_weights(k: float, scale: AveragingScale) -> np.ndarray:
    """``n! Gamma(k)/Gamma(n+k) a_n^2`` for n = 1..SERIES_TERMS (Kibble's expansion)."""
    n = np.arange(1, SERIES_TERMS + 1, dtype=float)
    log_w = gammaln(n + 1) + gammaln(k) - gammaln(n + k)
    if scale is AveragingScale.LOG_POWER:
        log_a2 = -2.0 * np.log(n)
    else:  # x^(1/2): a_n = Gamma(k+1/2)/Gamma(k) (-1/2)_n / n!
        # with |(-1/2)_n| = Gamma(n-1/2) / (2 sqrt pi)
        log_a2 = 2.0 * (
            gammaln(k + 0.5)
            - gammaln(k)
            + gammaln(n - 0.5)
            - gammaln(n + 1)
            - math.log(2 * math.sqrt(math.pi))
        )
    return np.exp(log_w + log_a2)


def _gamma_correlation(c: np.ndarray, k: float, scale: AveragingScale) -> np.ndarray:
    if scale is AveragingScale.POWER:
        return c.copy()
    weights = _series_weights(k, scale)
    variance = float(_gamma_cumulants(k, scale)[1]) * (
        k if scale is AveragingScale.VOLTAGE else 1.0
    )
    n = np.arange(1, SERIES_TERMS + 1, dtype=float)
    out = np.empty_like(c)
    for i, ci in enumerate(c):
        if ci >= 1.0:
            out[i] = 1.0
        elif ci <= 0.0:
            out[i] = 0.0
        else:
            out[i] = float(np.sum(weights * np.exp(n * math.log(ci)))) / variance
    return np.minimum(out, 1.0)


@lru_cache(maxsize=64)
def _peak_correlation_table(detector: Detector, scale: AveragingScale, looks: int) -> np.ndarray:
    """h on a grid of c, measured with a fixed seed (common random numbers over the grid)."""
    rng = np.random.default_rng(20_241_117)
    shape = (MC_PAIRS, looks)
    x = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * math.sqrt(0.5)
    w = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * math.sqrt(0.5)
    reduce = np.max if detector is Detector.PEAK else np.min
    grid = np.linspace(0.0, 1.0, MC_GRID)
    table = np.empty(MC_GRID)
    px = reduce(np.abs(x) ** 2, axis=1)
    gx = _g(px, scale)
    for i, c in enumerate(grid):
        y = math.sqrt(c) * x + math.sqrt(1.0 - c) * w
        gy = _g(reduce(np.abs(y) ** 2, axis=1), scale)
        table[i] = np.corrcoef(gx, gy)[0, 1]
    table[0], table[-1] = 0.0, 1.0
    return table


def _g(power: np.ndarray, scale: AveragingScale) -> np.ndarray:
    if scale is AveragingScale.LOG_POWER:
        return np.log(np.maximum(power, 1e-300))
    return power if scale is AveragingScale.POWER else np.sqrt(power)


def scale_correlation(
    power_correlation: np.ndarray, detector: Detector, scale: AveragingScale, looks: int
) -> np.ndarray:
    """Correlation of ``g(D)`` between two points whose power correlation is ``c``."""
    c = np.atleast_1d(np.clip(np.asarray(power_correlation, dtype=float), 0.0, 1.0))
    kind = _kind(detector, scale, looks)
    if kind == "gamma":
        return _gamma_correlation(c, float(looks), scale)
    if kind == "mean_of_g":
        return _gamma_correlation(c, 1.0, scale)
    if looks > EXACT_PEAK_LOOKS:
        return c.copy()
    table = _peak_correlation_table(detector, scale, int(looks))
    return np.interp(c, np.linspace(0.0, 1.0, MC_GRID), table)

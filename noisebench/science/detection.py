"""What a trace point holds for Gaussian noise: detector and trace-averaging bias and variance.

Pure functions, no I/O. Powers are normalised to the true mean noise power in the RBW (``mu = 1``).

Model (docs/references.md §6b/6c). Band-limited Gaussian noise gives exponentially distributed power
samples. A detector that averages ``k`` independent samples in linear power (RMS) yields a
gamma-distributed power with shape ``k`` and mean ``mu``. A trace point is then one of three
statistics of ``count`` independent values, chosen by the averaging scale:

* ``MEAN`` (power scale): arithmetic mean. Unbiased; relative variance ``1 / (k * count)``.
* ``GEOMETRIC_MEAN`` (log-power scale, i.e. dB values averaged):
  ``E[G] = mu * [Gamma(k + 1/N) / (Gamma(k) k^(1/N))]^N`` with ``N = count`` — for single samples
  ``mu * Gamma(1 + 1/N)^N``, tending to ``exp(-gamma)`` (-2.5068 dB). ``E[X^s]`` of a gamma variable
  is known in closed form, so every moment is exact.
* ``SQUARED_VOLTAGE_MEAN`` (voltage scale): the envelope ``V = sqrt(X)`` is averaged and squared:
  ``E[(mean V)^2] = m1^2 + (1 - m1^2) / N`` with ``m1 = E[V]`` — for single samples
  ``mu * (pi/4 + (1 - pi/4) / N)``. The variance follows exactly from the cumulants of ``V``.

How detectors map onto the model (``N`` trace averages, ``k`` = ``detector_samples``):

=================  ==========================  ==============================================
detector           shape ``k`` of each value   ``count`` of values on the averaging scale
=================  ==========================  ==============================================
SAMPLE             1                           N * k  (k video samples, 1 without smoothing)
RMS                k (power mean per point)    N
AVERAGE            1 (scale-averaged samples)  N * k  (the detector averages on the same scale)
PEAK, NEG. PEAK    refused: the extreme of a random number of samples has no usable
                   relation to the mean noise power
=================  ==========================  ==============================================

SAMPLE with ``k > 1``: a video filter narrower than the RBW smooths the *detected* signal,
which on a log display is the log power and on a linear display the envelope voltage, so it
averages on the display (= averaging) scale, exactly like the AVERAGE detector (common
practice: a narrow VBW makes noise read low on a log display by up to the full 2.51 dB of
docs/references.md §6b, however many samples it averages). A point is then the scale average of
``N * k`` single samples, with ``k`` the effective number of independent samples in a video
filter's averaging time (``B_stat / (pi VBW)`` for a one-pole filter, reported by the
instrument as ``detector_samples``). On the power scale this is the power mean of ``N * k``
samples, as for RMS. The equal-weight average is the model; a one-pole filter weights its
samples exponentially, which ``k`` (its equivalent count) captures for the variance.

Non-integer ``k`` or ``N * k`` (effective sample counts) use the same formulas: the gamma moments
and the cumulant sums are analytic in the count, which is exact for integers and the natural
interpolation in between.

Correlation between neighbouring points. Two powers of jointly complex-Gaussian noise with power
correlation ``rho`` form a bivariate gamma pair (Kibble-Moran) for which
``E[X^s Y^t] = E[X^s] E[Y^t] 2F1(-s, -t; k; rho)``. From it the correlation of two point values
follows exactly for every statistic (:meth:`PointModel.correlation`); log and voltage averaging
decorrelate neighbours slightly (for single-sample logs it is ``Li2(rho) / (pi^2/6)``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum

import numpy as np
from scipy import special

from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector
from noisebench.errors import InputError
from noisebench.units import format_frequency

C_DB = 10.0 / math.log(10.0)  # dB per neper of power: 10 / ln 10 = 4.342945

#: a video filter narrower than this many RBWs smooths the detected signal (common practice)
VBW_SMOOTHING_RATIO = 3.0


class PointStatistic(str, Enum):
    """How a trace point combines its values (set by the averaging scale)."""

    MEAN = "mean"  # linear power average
    GEOMETRIC_MEAN = "geometric_mean"  # dB values averaged, i.e. the geometric mean of powers
    SQUARED_VOLTAGE_MEAN = "squared_voltage_mean"  # envelope volts averaged, then squared


_STATISTIC_OF_SCALE = {
    AveragingScale.POWER: PointStatistic.MEAN,
    AveragingScale.LOG_POWER: PointStatistic.GEOMETRIC_MEAN,
    AveragingScale.VOLTAGE: PointStatistic.SQUARED_VOLTAGE_MEAN,
}


def statistic_for_scale(scale: AveragingScale) -> PointStatistic:
    """The statistic a trace point holds after averaging on ``scale``."""
    return _STATISTIC_OF_SCALE[AveragingScale(scale)]


# --- gamma-function helpers ------------------------------------------------------------------


def _lgamma_shift(k: float, s: float) -> float:
    """ln Gamma(k + s) - ln Gamma(k), accurate also for s << k (Taylor series in s)."""
    if s == 0.0:
        return 0.0
    if abs(s) <= 0.25 * k:
        total, term_pow, fact = 0.0, 1.0, 1.0
        for j in range(1, 60):
            term_pow *= s
            fact *= j
            term = float(special.polygamma(j - 1, k)) * term_pow / fact
            total += term
            if abs(term) <= 1e-18 * abs(total):
                break
        return total
    return float(special.gammaln(k + s) - special.gammaln(k))


def _log_moment_excess(k: float, s: float) -> float:
    """ln(E[X^(2s)] / E[X^s]^2) for gamma X of shape k: lnG(k+2s) + lnG(k) - 2 lnG(k+s)."""
    if 2.0 * abs(s) <= 0.25 * k:
        total, term_pow, fact = 0.0, 1.0, 1.0
        for j in range(1, 60):
            term_pow *= s
            fact *= j
            if j == 1:
                continue  # the linear terms cancel exactly
            term = float(special.polygamma(j - 1, k)) * (2.0**j - 2.0) * term_pow / fact
            total += term
            if abs(term) <= 1e-18 * abs(total):
                break
        return total
    return _lgamma_shift(k, 2.0 * s) - 2.0 * _lgamma_shift(k, s)


def _gamma_power_moment(k: float, s: float) -> float:
    """E[X^s] for X gamma-distributed with shape k and unit mean."""
    return math.exp(_lgamma_shift(k, s) - s * math.log(k))


_SERIES_TERMS = 20_000  # terms of the small-parameter series (tail < 1e-4 relative at rho -> 1)


def _hyp2f1_minus_one(a: float, b: float, c: float, rho: np.ndarray) -> np.ndarray:
    """2F1(a, b; c; rho) - 1 for 0 <= rho <= 1, without losing digits when the result is tiny."""
    rho = np.clip(np.asarray(rho, dtype=float), 0.0, 1.0)
    if a == b and abs(a) < 1e-3:
        out = _small_equal_parameter_series(-a, c, rho)
    else:
        out = special.hyp2f1(a, b, c, np.minimum(rho, 1.0 - 1e-15)) - 1.0
    at_one = rho >= 1.0
    if np.any(at_one):  # Gauss: 2F1(a,b;c;1) = G(c) G(c-a-b) / (G(c-a) G(c-b))
        if a == b:
            val = math.expm1(_log_moment_excess(c, -a))
        else:
            val = math.expm1(
                float(
                    special.gammaln(c)
                    + special.gammaln(c - a - b)
                    - special.gammaln(c - a)
                    - special.gammaln(c - b)
                )
            )
        out = np.where(at_one, val, out)
    return out


def _small_equal_parameter_series(s: float, c: float, rho: np.ndarray) -> np.ndarray:
    """sum_{n>=1} ((-s)_n)^2 / ((c)_n n!) rho^n for small s > 0, summed in logs (vectorised)."""
    n = np.arange(1, _SERIES_TERMS + 1, dtype=float)
    log_coef = (
        2.0 * (math.log(s) + special.gammaln(n - s) - special.gammaln(1.0 - s))
        - (special.gammaln(n + c) - special.gammaln(c))
        - special.gammaln(n + 1.0)
    )
    out = np.zeros_like(rho)
    flat = rho.ravel()
    res = out.ravel()
    positive = np.flatnonzero((flat > 0) & (flat < 1))
    for chunk in np.array_split(positive, max(1, positive.size // 32)):
        if chunk.size == 0:
            continue
        log_rho = np.log(flat[chunk])[:, None]
        res[chunk] = np.sum(np.exp(log_coef[None, :] + n[None, :] * log_rho), axis=1)
    return res.reshape(rho.shape)


# --- the point model -------------------------------------------------------------------------


@dataclass(frozen=True)
class PointModel:
    """The distribution of one trace point of Gaussian noise, relative to the true mean power.

    ``statistic`` of ``count`` independent values, each a gamma power of shape ``shape``
    (``shape=None``: the detector's sample count is unknown — only possible on the power scale,
    where the mean is unbiased but the variance is not known).
    """

    statistic: PointStatistic
    count: float
    shape: float | None = 1.0

    @property
    def variance_known(self) -> bool:
        return self.shape is not None

    def _shape(self) -> float:
        if self.shape is None:
            raise InputError(
                "settings.detector_samples",
                "is unknown, so the variance of a trace point cannot be computed",
                fix="read the detector's sample count back from the instrument",
            )
        return float(self.shape)

    def mean_ratio(self) -> float:
        """E[point] / true mean power (1 = unbiased)."""
        if self.statistic is PointStatistic.MEAN:
            return 1.0
        k, n = self._shape(), float(self.count)
        if self.statistic is PointStatistic.GEOMETRIC_MEAN:
            s = 1.0 / n
            return math.exp(n * (_lgamma_shift(k, s) - s * math.log(k)))
        m1, kappa2, _, _ = self._voltage_cumulants()
        return m1**2 + kappa2 / n

    @property
    def bias_db(self) -> float:
        """10 log10 of :meth:`mean_ratio`: how far the point reads below (-) the true power, dB."""
        return C_DB * math.log(self.mean_ratio())

    @property
    def correction_db(self) -> float:
        """dB to add to a point to make it an unbiased power estimate (= -``bias_db``)."""
        return -self.bias_db

    def relative_variance(self) -> float:
        """Var(point) / E[point]^2."""
        k, n = self._shape(), float(self.count)
        if self.statistic is PointStatistic.MEAN:
            return 1.0 / (k * n)
        if self.statistic is PointStatistic.GEOMETRIC_MEAN:
            return math.expm1(n * _log_moment_excess(k, 1.0 / n))
        m1, k2, k3, k4 = self._voltage_cumulants()
        var = 4 * m1**2 * k2 / n + (4 * m1 * k3 + 2 * k2**2) / n**2 + k4 / n**3
        return var / (m1**2 + k2 / n) ** 2

    @property
    def equivalent_samples(self) -> float:
        """Independent exponential power samples giving the same relative variance."""
        return 1.0 / self.relative_variance()

    def _voltage_cumulants(self) -> tuple[float, float, float, float]:
        """E[V] and cumulants 2..4 of V = sqrt(X), X gamma(shape k, unit mean)."""
        k = self._shape()
        ln_m1 = _lgamma_shift(k, 0.5) - 0.5 * math.log(k)
        m1 = math.exp(ln_m1)
        m3 = _gamma_power_moment(k, 1.5)
        m4 = _gamma_power_moment(k, 2.0)  # = 1 + 1/k
        kappa2 = -math.expm1(2.0 * ln_m1)  # 1 - m1^2 (E[V^2] = 1)
        kappa3 = m3 - 3.0 * m1 + 2.0 * m1**3
        kappa4 = m4 - 4.0 * m1 * m3 - 3.0 + 12.0 * m1**2 - 6.0 * m1**4
        return m1, kappa2, kappa3, kappa4

    def correlation(self, power_correlation: np.ndarray) -> np.ndarray:
        """Correlation of two point values whose underlying power samples correlate by ``rho``."""
        rho = np.clip(np.asarray(power_correlation, dtype=float), 0.0, 1.0)
        if self.statistic is PointStatistic.MEAN:
            return rho
        k, n = self._shape(), float(self.count)
        if self.statistic is PointStatistic.GEOMETRIC_MEAN:
            s = 1.0 / n
            num = np.expm1(n * np.log1p(_hyp2f1_minus_one(-s, -s, k, rho)))
            den = math.expm1(n * _log_moment_excess(k, s))
            return np.clip(num / den, 0.0, 1.0)
        cov = self._voltage_covariance(rho)
        return np.clip(cov / self._voltage_covariance(np.ones(1))[0], 0.0, 1.0)

    def _voltage_covariance(self, rho: np.ndarray) -> np.ndarray:
        """Cov of two squared-voltage-mean points (unit-mean powers) at power correlation rho."""
        k, n = self._shape(), float(self.count)
        m1, kappa2, _, _ = self._voltage_cumulants()
        f11 = _hyp2f1_minus_one(-0.5, -0.5, k, rho)  # 2F1(-1/2,-1/2;k;rho) - 1
        c11 = m1**2 * f11
        c12 = m1 * rho / (2.0 * k) - 2.0 * m1**3 * f11
        c22 = kappa2**2 + rho / k * (1.0 - 2.0 * m1**2) + 4.0 * m1**4 * f11
        k22 = c22 - kappa2**2 - 2.0 * c11**2
        return 4 * m1**2 * c11 / n + (4 * m1 * c12 + 2 * c11**2) / n**2 + k22 / n**3

    # gamma approximation of the distribution (exact for MEAN); used for thresholds
    def _gamma_shape(self) -> float:
        return 1.0 / self.relative_variance()

    @property
    def excess_kurtosis(self) -> float:
        """Excess kurtosis of a point (gamma approximation: 6 * relative variance)."""
        return 6.0 * self.relative_variance()


# --- public functions ------------------------------------------------------------------------


def log_average_bias_db(samples_per_value: float = 1.0) -> float:
    """Mean of dB readings minus the dB of the true mean power, dB (many averages).

    Each reading is the log of a ``samples_per_value``-sample linear power mean (gamma, shape k):
    ``c_dB * (psi(k) - ln k)``; single samples: ``-10 log10(e) * gamma = -2.5068 dB``.
    """
    k = _require_count("samples_per_value", samples_per_value)
    return C_DB * (float(special.digamma(k)) - math.log(k))


def envelope_average_bias_db(samples_per_value: float = 1.0) -> float:
    """dB error of squaring the average of many envelope (voltage) readings, dB.

    ``20 log10(E[sqrt X] / sqrt(E X))`` for a ``samples_per_value``-sample power mean X;
    single samples (Rayleigh envelope): ``10 log10(pi / 4) = -1.0491 dB``.
    """
    k = _require_count("samples_per_value", samples_per_value)
    return 2.0 * C_DB * (_lgamma_shift(k, 0.5) - 0.5 * math.log(k))


def trace_average_model(
    scale: AveragingScale, averages: float, samples_per_value: float | None = 1.0
) -> PointModel:
    """Point model after ``averages`` trace averages on ``scale`` of k-sample power means."""
    n = _require_count("averages", averages)
    k = (
        None
        if samples_per_value is None
        else _require_count("samples_per_value", samples_per_value)
    )
    stat = _STATISTIC_OF_SCALE[AveragingScale(scale)]
    if k is None and stat is not PointStatistic.MEAN:
        raise _unknown_samples(AveragingScale(scale), "settings.detector_samples")
    return PointModel(statistic=stat, count=n, shape=k)


def trace_average_mean_ratio(
    scale: AveragingScale, averages: float, samples_per_value: float = 1.0
) -> float:
    """E[point] / true power after ``averages`` averages on ``scale`` (exact, finite N)."""
    return trace_average_model(scale, averages, samples_per_value).mean_ratio()


def trace_average_relative_variance(
    scale: AveragingScale, averages: float, samples_per_value: float = 1.0
) -> float:
    """Var(point) / E[point]^2 after ``averages`` averages on ``scale`` (exact, finite N)."""
    return trace_average_model(scale, averages, samples_per_value).relative_variance()


def point_model(
    detector: Detector,
    scale: AveragingScale,
    averages: int,
    detector_samples: float | None,
    *,
    field: str = "settings",
) -> PointModel:
    """The :class:`PointModel` for a detector, averaging scale, trace averages and sample count.

    Refuses PEAK / NEGATIVE_PEAK, and an unknown ``detector_samples`` wherever it sets the bias
    (RMS or AVERAGE detector with log or voltage averaging). ``field`` prefixes error fields.
    """
    detector, scale = Detector(detector), AveragingScale(scale)
    n = _require_count(f"{field}.averages", averages)
    if detector in (Detector.PEAK, Detector.NEGATIVE_PEAK):
        raise InputError(
            f"{field}.detector",
            f"the {detector.value} detector cannot measure noise: it keeps "
            "the extreme of a random number of noise samples, whose relation to the mean noise "
            "power depends on that number and on the VBW",
            value=detector.value,
            fix="use the RMS (power average) or the sample detector",
        )
    k = (
        None
        if detector_samples is None
        else _require_count(f"{field}.detector_samples", detector_samples)
    )
    stat = _STATISTIC_OF_SCALE[scale]
    if detector is Detector.SAMPLE:  # k video samples averaged on the scale (module docstring)
        return PointModel(statistic=stat, count=n * (1.0 if k is None else k), shape=1.0)
    if k is None:
        if stat is not PointStatistic.MEAN:
            raise _unknown_samples(scale, f"{field}.detector_samples", detector)
        return PointModel(statistic=stat, count=n, shape=None)
    if detector is Detector.RMS:
        return PointModel(statistic=stat, count=n, shape=k)
    return PointModel(statistic=stat, count=n * k, shape=1.0)  # AVERAGE: on the scale itself


def point_model_for(settings: AcquisitionSettings, *, field: str = "settings") -> PointModel:
    """:func:`point_model` for applied acquisition settings (also checks video-filter smoothing).

    A video filter narrower than :data:`VBW_SMOOTHING_RATIO` x RBW averages the detected signal on
    the averaging scale; its effective sample count must then be given in ``detector_samples``
    (SAMPLE with ``k`` samples is then modelled like AVERAGE: ``N * k`` values on the scale).
    """
    samples = settings.detector_samples
    smoothed = (
        settings.vbw_hz is not None and settings.vbw_hz < VBW_SMOOTHING_RATIO * settings.rbw_hz
    )
    if settings.detector is Detector.SAMPLE and smoothed and samples is None:
        if settings.averaging_scale is not AveragingScale.POWER:
            raise InputError(
                f"{field}.detector_samples",
                f"is unknown while the VBW "
                f"({format_frequency(settings.vbw_hz)}) smooths the detected noise on the "
                f"{settings.averaging_scale.value} scale, so its bias is not known",
                fix=f"report detector_samples, set VBW >= {VBW_SMOOTHING_RATIO:g} x RBW, "
                "or average on the power scale",
            )
        return PointModel(statistic=PointStatistic.MEAN, count=float(settings.averages), shape=None)
    return point_model(
        settings.detector, settings.averaging_scale, settings.averages, samples, field=field
    )


def _require_count(field: str, value: float) -> float:
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise InputError(field, f"must be a finite count > 0 (got {value!r})", value=value)
    return v


def _unknown_samples(
    scale: AveragingScale, field: str, detector: Detector | None = None
) -> InputError:
    what = f"the {detector.value} detector" if detector else "each averaged value"
    return InputError(
        field,
        f"is unknown, but with {scale.value} averaging the bias depends on how many "
        f"power samples {what} combined (unknown settings are an error, not a guess)",
        fix="read the sample count back from the instrument, use the sample detector, "
        "or average on the power scale",
    )

"""Noise density from analyzer traces and marker readings: trace -> :class:`NoiseDensity`.

Per trace (:func:`estimate_density`, or :func:`estimate_densities` for many frequency points
covered by one trace):

1. convert every point to linear power (W per RBW, or W/Hz for density traces);
2. divide by the exact detector / trace-averaging bias of the applied settings
   (:mod:`noisebench.science.detection`), so each point is an unbiased estimate of the mean power;
3. find narrowband spurs: a point is a spur if it exceeds a running-median noise baseline by more
   than the known sampling distribution of a noise point allows at ``spur_threshold_sigma``
   (one-sided Gaussian tail probability, converted through the point's own distribution). The
   neighbourhood where the line's skirt, seen through the RBW filter's power response, still
   exceeds a small fraction of the statistical resolution is excluded as well;
4. average the remaining points of the band in linear power and divide by the ENBW -> W/Hz.

Uncertainty (type A, JCGM 100:2008 §4.2 with the statistics known a priori): every point has the
relative variance ``r`` of its detector/averaging model; neighbouring points are correlated by
``rho(lag)`` (filter-bank model in :mod:`noisebench.science.filters`, transformed to the averaging
scale
by :meth:`PointModel.correlation`). For ``n`` used points, ``S = sum_ij rho(|i-j|)`` and

    u_rel^2 = r * S / n^2,   independent bins = n^2 / S,   independent samples = (n^2 / S) / r,

i.e. ``independent_samples`` is the number of independent exponential power samples that would
give the same variance (``u_rel = 1 / sqrt(independent_samples)``). Dense points give
``n^2 / S -> band / (correlation bandwidth)`` (B_stat for a Gaussian RBW); sparse points give
``n``. In zero span the points lie on a time axis ``dt = sweep_time / points`` apart and
correlate through the filter's time response ``C(tau)`` (``integral C = 1/B_stat``, so a long
trace holds ``averages * sweep_time * B_stat`` independent samples: the radiometer equation). A
SAMPLE point is an instant (``rho = C(j dt)``); an RMS/AVERAGE point averages its whole window
(``rho_j = integral C(u) max(0, dt - |u - j dt|) du`` normalised), used when ``dt * B_stat > 1``.
A zero-span trace needs its ``sweep_time_s``; it has no spur search (a line inside the RBW
looks like noise there).

Cross-check: the scatter of the used points about a straight line (a gain slope is not noise)
is compared with its expectation ``r * m^2 * (n - tr(P C))`` (``P`` the projection on the line,
``C`` the correlation matrix). ``scatter_ratio`` = observed / predicted standard deviation. When
it exceeds its own 99 % sampling quantile (chi-square with Satterthwaite degrees of freedom,
widened for the points' kurtosis) the prediction is contradicted by the data and the uncertainty
is widened by the ratio. When the detector's sample count is unknown (power scale only), the
uncertainty comes from this observed scatter alone.

Size: one pipeline, trace -> density (preparation, scatter state, spur search, band estimate,
markers); its steps share the prepared-trace state and are read top to bottom in the order the
docstring lists them.
"""

from __future__ import annotations

import functools
import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np
from scipy import ndimage, optimize, signal, special, stats

from noisebench.bench.acquisition import (
    AcquisitionSettings,
    Detector,
    MarkerKind,
    MarkerReading,
    SweepMode,
    Trace,
    TraceUnit,
)
from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.detection import PointModel, point_model_for, statistic_for_scale
from noisebench.science.filters import (
    frequency_power_correlation,
    response_halfwidth_ratio,
    time_power_correlation,
)
from noisebench.science.plausibility import check_trace_values
from noisebench.units import format_frequency, format_frequency_range

logger = logging.getLogger(__name__)
T = TypeVar("T")

#: default spur threshold, as a one-sided Gaussian tail (5 sigma: 2.9e-7 false alarms per point)
DEFAULT_SPUR_THRESHOLD_SIGMA = 5.0
#: a spur's skirt is excluded down to this fraction of the band's relative resolution
SPUR_SKIRT_FRACTION = 0.1
#: quantile of the scatter ratio above which the observed scatter replaces the prediction
SCATTER_WIDEN_QUANTILE = 0.99
#: correlations below this are treated as zero (sets the kernel length)
CORRELATION_FLOOR = 1e-7
MAX_KERNEL_LAGS = 20_000
MIN_SPUR_SEARCH_POINTS = 8
#: independent bins in the running-median window of the spur search
SPUR_BASELINE_BINS = 100


# --- public API -------------------------------------------------------------------------------


def estimate_density(
    trace: Trace,
    *,
    freq_hz: float | None = None,
    band_hz: float | None = None,
    reject_spurs: bool = True,
    spur_threshold_sigma: float = DEFAULT_SPUR_THRESHOLD_SIGMA,
    min_points: int = 3,
    known_lines_hz: Sequence[float] = (),
) -> NoiseDensity:
    """Noise density (W/Hz) at ``freq_hz`` from the points of ``trace`` within ``band_hz``.

    Defaults: the whole trace, reported at its centre. With ``freq_hz`` and ``band_hz`` the band
    ``freq_hz +/- band_hz/2`` is used; it must lie inside the trace and hold ``min_points``.
    In zero span all points are at the centre frequency and ``band_hz`` is not used.
    ``known_lines_hz``: lines known to be there (a converter's LO leakage and its harmonics),
    excluded with their filter skirts whether or not the spur search finds them.
    """
    prepared = _prepare(
        trace,
        reject_spurs=reject_spurs,
        threshold_sigma=spur_threshold_sigma,
        known_lines_hz=known_lines_hz,
    )
    return _estimate_band(prepared, freq_hz, band_hz, min_points=min_points)


def estimate_densities(
    trace: Trace,
    freqs_hz: Sequence[float] | np.ndarray,
    band_hz: float | Sequence[float] | np.ndarray,
    *,
    reject_spurs: bool = True,
    spur_threshold_sigma: float = DEFAULT_SPUR_THRESHOLD_SIGMA,
    min_points: int = 3,
    known_lines_hz: Sequence[float] = (),
) -> list[NoiseDensity]:
    """One :class:`NoiseDensity` per frequency in ``freqs_hz``, each over its own band.

    Conversion, bias correction and spur search run once over the whole trace (vectorised);
    each band then costs only its own sums. ``band_hz`` is one value or one per frequency.
    ``known_lines_hz`` as in :func:`estimate_density`.
    """
    freqs = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    if freqs.ndim != 1 or freqs.size == 0:
        raise InputError(
            "freqs_hz",
            "must be a non-empty list of frequencies",
            fix="pass the frequency points this trace covers",
        )
    bands = np.asarray(band_hz, dtype=float)
    if bands.ndim > 1 or bands.size not in (1, freqs.size):
        raise InputError(
            "band_hz",
            f"has {bands.size} values for {freqs.size} frequencies",
            fix="pass one band or one per frequency",
        )
    # one band for every frequency, or one each (plain floats: no broadcast view per trace)
    band_list = bands.ravel().tolist()
    if len(band_list) == 1:
        band_list *= freqs.size
    prepared = _prepare(
        trace,
        reject_spurs=reject_spurs,
        threshold_sigma=spur_threshold_sigma,
        known_lines_hz=known_lines_hz,
    )
    out = []
    for i, (f, b) in enumerate(zip(freqs.tolist(), band_list, strict=True)):
        try:
            out.append(_estimate_band(prepared, f, b, min_points=min_points))
        except (InputError, MeasurementError) as exc:
            exc.add_context(freq_hz=float(f), index=i)
            raise
    return out


def band_weights_hz(freq_hz: np.ndarray, center_hz: float, band_hz: float) -> np.ndarray:
    """Hz of the band ``center_hz +/- band_hz/2`` that each point of a uniform axis stands for.

    Point ``i`` stands for its cell ``f_i +/- spacing/2``; its weight is the overlap of that cell
    with the band. ``sum(w * P) / ENBW`` is then the trace integrated over exactly the band
    (``P`` the point powers in W), and ``sum(w) == band_hz`` whenever the band lies inside the
    trace's cells (``f_0 - spacing/2 .. f_last + spacing/2``); outside it the band is cut.
    This is the band-power definition of the markers (:func:`density_from_marker`).
    """
    f = np.asarray(freq_hz, dtype=float)
    if f.ndim != 1 or f.size < 2:
        raise InputError(
            "freq_hz",
            "must hold two or more trace frequencies",
            fix="pass the trace's frequency axis",
        )
    spacing = _uniform_spacing(f)
    center, band = float(center_hz), float(band_hz)
    if not math.isfinite(center):
        raise InputError("center_hz", f"must be finite (got {center_hz!r})")
    if not math.isfinite(band) or band <= 0:
        raise InputError(
            "band_hz",
            f"must be a finite bandwidth > 0 (got {band_hz!r})",
            fix="give the marker band in Hz",
        )
    # cell edges relative to the band centre, on the ideal grid (no cancellation at GHz)
    edges = (f[0] - center) + (np.arange(f.size + 1) - 0.5) * spacing
    lo, hi = -band / 2.0, band / 2.0
    return np.maximum(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0)


def density_from_marker(reading: MarkerReading) -> NoiseDensity:
    """Noise density (W/Hz) from a band-power or noise-density marker reading.

    What the instrument did is stated by ``reading.instrument_corrected``; this function applies
    exactly what is missing (and nothing twice):

    * ``True``: the value is already an unbiased noise measure, detector / averaging bias
      removed and, for NOISE_DENSITY, divided by the RBW filter's noise bandwidth (ENBW).
    * ``False``: the value comes from the displayed (biased) trace. BAND_POWER: the trace
      integrated over ``band_hz`` (``sum(w P) / ENBW``, :func:`band_weights_hz`), which carries
      the ENBW already, so it is divided by the detector bias only. NOISE_DENSITY: the mean
      displayed point power over the band divided by the *nominal* RBW, so it is multiplied
      by RBW/ENBW and divided by the detector bias.

    BAND_POWER density = band power / ``band_hz`` (the band is integrated, so no ENBW).
    Uncertainty from the settings: averages x detector samples x the points of the band with
    their band weights and correlations (one point for a noise-density marker without
    ``band_hz``). When the sample count is unknown the variance of a single-sample detector is
    used, an upper bound.
    """
    s = reading.settings
    model = _marker_model(reading)
    ratio = 1.0 if reading.instrument_corrected else model.mean_ratio()
    value_lin = 10.0 ** (reading.value_db / 10.0) * 1e-3  # W or W/Hz
    if reading.kind is MarkerKind.BAND_POWER:
        if reading.band_hz is None:
            raise InputError(
                "reading.band_hz",
                "a band-power reading needs its band",
                fix="set band_hz to the integration band of the marker",
            )
        band = float(reading.band_hz)
        density = value_lin / ratio / band
    else:
        band = float(reading.band_hz) if reading.band_hz is not None else s.enbw_hz
        enbw_fix = 1.0 if reading.instrument_corrected else s.rbw_hz / s.enbw_hz
        density = value_lin * enbw_fix / ratio
    n_points, spread = _marker_points(reading, model)
    rel_var = model.relative_variance() * spread
    return NoiseDensity(
        freq_hz=reading.freq_hz,
        density_w_per_hz=density,
        u_density_w_per_hz=density * math.sqrt(rel_var),
        independent_samples=1.0 / rel_var,
        band_hz=band,
        bins_used=n_points,
        excluded_freq_hz=[],
        scatter_ratio=None,
        bias_correction_db=0.0 if reading.instrument_corrected else model.correction_db,
        settings=s,
        acquisition_time_s=reading.acquisition_time_s,
    )


# --- preparation (once per trace) -------------------------------------------------------------


@dataclass(frozen=True)
class _Prepared:
    trace: Trace
    freq_hz: np.ndarray
    power: np.ndarray  # bias-corrected linear power per point (W, or W/Hz for density traces)
    to_density: float  # factor from ``power`` to W/Hz (1/ENBW, or 1 for density traces)
    model: PointModel
    rel_var: float | None  # predicted relative variance of a point (None: unknown)
    kernel: np.ndarray  # correlation of point values at lags 0..L
    excluded: np.ndarray  # bool mask of points excluded as spur neighbourhoods
    spurs_hz: np.ndarray  # spur line frequencies
    spur_halfwidth_hz: np.ndarray  # half-width excluded around each spur
    zero_span: bool


def _prepare(
    trace: Trace,
    *,
    reject_spurs: bool,
    threshold_sigma: float,
    known_lines_hz: Sequence[float] = (),
) -> _Prepared:
    s = trace.settings
    threshold_sigma = float(threshold_sigma)
    if not math.isfinite(threshold_sigma) or threshold_sigma <= 0:
        raise InputError(
            "spur_threshold_sigma",
            "must be a finite number > 0",
            value=threshold_sigma,
            fix="use e.g. 5",
        )
    key = _settings_key(s)  # what the statistics depend on
    model = _cached(("model", key), lambda: point_model_for(s, field="trace.settings"))
    power, to_density = _linear_power(trace)
    power = power / model.mean_ratio()
    f = trace.freq_hz
    # zero span: all points at one frequency (no differences but zeros, as np.ptp(f) == 0);
    # the differences then give the spacing too
    steps = f[1:] - f[:-1] if s.span_hz != 0 and f.size > 1 else None  # np.diff, undispatched
    zero_span = steps is None or not steps.any()
    spacing = 0.0 if zero_span else _uniform_spacing(f, steps)
    rel_var, kernel = _kernel_of(trace, key, model, zero_span, spacing)
    excluded = np.zeros(power.size, dtype=bool)
    spurs = np.empty(0)
    widths = np.empty(0)
    if rel_var is not None:
        _check_scatter_state(trace, power, rel_var, kernel, model, threshold_sigma, zero_span)
    if reject_spurs and not zero_span and power.size >= MIN_SPUR_SEARCH_POINTS:
        search_var = rel_var if rel_var is not None else _robust_relative_variance(power)
        excluded, spurs, widths = _find_spurs(
            trace,
            power,
            search_var,
            kernel,
            threshold_sigma,
            marked=trace.excluded,
            spacing=spacing,
        )
    elif trace.excluded is not None:
        excluded, marked_hz, marked_widths = _marked_regions(trace.freq_hz, trace.excluded)
        spurs, widths = np.asarray(marked_hz), np.asarray(marked_widths)
    if len(known_lines_hz) and not zero_span:
        search_var = rel_var if rel_var is not None else _robust_relative_variance(power)
        excluded, spurs, widths = _exclude_known_lines(
            trace, power, search_var, excluded, spurs, widths, known_lines_hz
        )
    return _Prepared(
        trace=trace,
        freq_hz=trace.freq_hz,
        power=power,
        to_density=to_density,
        model=model,
        rel_var=rel_var,
        kernel=kernel,
        excluded=excluded,
        spurs_hz=spurs,
        spur_halfwidth_hz=widths,
        zero_span=zero_span,
    )


def _settings_key(s: AcquisitionSettings) -> tuple:
    """The applied settings but the centre, as a key of the kept statistics: the field values
    in a tuple (the model is frozen; its own hash and equality compare the same values, at
    several times the cost of a tuple's on every trace)."""
    return (type(s), tuple(s.__dict__.values())[1:])


assert next(iter(AcquisitionSettings.model_fields)) == "center_hz"  # what _settings_key drops


_STATISTICS_CACHE: dict[tuple, Any] = {}
_STATISTICS_CACHE_SIZE = 512


def _cached(key: tuple, compute: Callable[[], T]) -> T:
    """``compute()``, kept under ``key``: the point model and the correlation kernel are
    functions of the applied settings other than the centre (and of the point spacing), so a
    sweep computes them once per setting instead of once per trace. Every number is what a
    fresh computation gives, so results never depend on the cache; errors are not kept."""
    found = _STATISTICS_CACHE.get(key, _MISSING)
    if found is _MISSING:
        found = compute()
        if len(_STATISTICS_CACHE) >= _STATISTICS_CACHE_SIZE:
            _STATISTICS_CACHE.clear()
        _STATISTICS_CACHE[key] = found
    return found


_MISSING = object()


def _kernel_of(
    trace: Trace, key: tuple, model: PointModel, zero_span: bool, spacing: float
) -> tuple[float | None, np.ndarray]:
    """(predicted relative variance of a point or None, correlation kernel of the point
    values), kept per (settings without the centre, points, exact point spacing)."""
    n = trace.freq_hz.size

    def compute() -> tuple[float | None, np.ndarray]:
        lags_power = _power_kernel(trace, zero_span)
        rel_var = model.relative_variance() if model.variance_known else None
        kernel = model.correlation(lags_power) if model.variance_known else lags_power
        kernel.flags.writeable = False  # kept in the cache: nobody may change it
        return rel_var, kernel

    return _cached(("kernel", key, n, zero_span, spacing), compute)


def _linear_power(trace: Trace) -> tuple[np.ndarray, float]:
    """Points in W (per RBW) or W/Hz, and the factor that turns them into W/Hz."""
    v = trace.values
    unit = trace.unit
    logarithmic = unit in (TraceUnit.DBM, TraceUnit.DBM_PER_HZ)
    check_trace_values(v, logarithmic=logarithmic, freq_hz=trace.freq_hz)
    if logarithmic:
        power = 10.0 ** (v / 10.0) * 1e-3
    else:
        power = v.astype(float)
    density_unit = unit in (TraceUnit.DBM_PER_HZ, TraceUnit.W_PER_HZ)
    return power, 1.0 if density_unit else 1.0 / trace.settings.enbw_hz


def _power_kernel(trace: Trace, zero_span: bool) -> np.ndarray:
    """Power correlation of two points at lags 0, 1, ... (trimmed where it becomes negligible)."""
    s = trace.settings
    n = trace.freq_hz.size
    if n == 1:
        return np.ones(1)
    max_lag = min(n - 1, MAX_KERNEL_LAGS)
    lags = np.arange(max_lag + 1, dtype=float)
    if zero_span:
        if s.mode is SweepMode.FFT:
            raise InputError(
                "trace.settings.mode",
                "a zero-span trace in FFT mode has no defined time axis",
                fix="use swept mode for zero span",
            )
        if s.sweep_time_s is None:
            raise InputError(
                "trace.settings.sweep_time_s",
                "is unknown, so the correlation of "
                "the zero-span points (their time spacing) is unknown",
                fix="read the sweep time back from the instrument",
            )
        dt = s.sweep_time_s / n
        windowed = s.detector is not Detector.SAMPLE and dt * s.rbw_filter.stat_bw_hz(s.rbw_hz) > 1
        rho = (
            _window_time_kernel(s, dt, max_lag)
            if windowed
            else time_power_correlation(s.rbw_filter, lags * dt, s.rbw_hz)
        )
    else:
        spacing = _uniform_spacing(trace.freq_hz)
        rho = frequency_power_correlation(s.rbw_filter, lags * spacing, s.rbw_hz)
    rho[0] = 1.0
    keep = np.flatnonzero(rho >= CORRELATION_FLOOR)
    return rho[: int(keep[-1]) + 1]


def _mean(x: np.ndarray) -> float:
    """``float(np.mean(x))`` of a non-empty 1-D float array, bit for bit (the same pairwise
    sum, divided by the count) without ``np.mean``'s dispatch, which costs more than the sum
    on the few dozen points of a trace."""
    return float(np.add.reduce(x)) / x.size


def _sum(x: np.ndarray) -> float:
    """``float(np.sum(x))`` of a 1-D float array, bit for bit (``np.sum`` is ``np.add.reduce``
    behind its dispatch, which costs more than the sum of a short kernel)."""
    return float(np.add.reduce(x))


def _median(x: np.ndarray) -> float:
    """``float(np.median(x))`` of a non-empty 1-D array of finite values, bit for bit (the
    middle value, or the mean of the two middle ones: ``0.5 (a + b)`` is exactly
    ``(a + b) / 2``), from one sort instead of ``np.median``'s partition and dispatch."""
    s = np.sort(x)
    m = s.size // 2
    return float(s[m]) if s.size % 2 else 0.5 * (float(s[m - 1]) + float(s[m]))


def _uniform_spacing(freq_hz: np.ndarray, steps: np.ndarray | None = None) -> float:
    """The spacing of a uniform axis (``steps``: its ``np.diff`` when the caller has it)."""
    d = np.diff(freq_hz) if steps is None else steps
    spacing = _mean(d)
    if spacing <= 0 or np.abs(d - spacing).max() > 0.01 * abs(spacing):
        raise InputError(
            "trace.freq_hz",
            "must be increasing and uniformly spaced",
            fix="pass the trace's own frequency axis (linear sweep)",
        )
    return spacing


def _window_time_kernel(s: AcquisitionSettings, dt: float, max_lag: int) -> np.ndarray:
    """Correlation of point averages over consecutive windows of ``dt`` (RMS/AVERAGE, zero span).

    Cov(j) = integral C(u) max(0, dt - |u - j dt|) du, C the power correlation in time
    (trapezoidal rule on a grid fine against both dt and the correlation time).
    """
    corr_time = 1.0 / s.rbw_filter.stat_bw_hz(s.rbw_hz)
    reach = min(60.0 * corr_time, (max_lag + 1) * dt)  # C is negligible beyond 60 / B_stat
    step = min(dt, corr_time) / 64.0
    u = np.linspace(0.0, reach, int(math.ceil(reach / step)) + 1)
    c = time_power_correlation(s.rbw_filter, u, s.rbw_hz)
    lags = np.arange(0, min(max_lag, int(reach / dt) + 1) + 1)
    weight = np.maximum(0.0, dt - np.abs(u[None, :] - lags[:, None] * dt))
    cov = np.trapezoid(c[None, :] * weight, u, axis=1)
    cov[0] *= 2.0  # the window overlaps itself on both sides of u = 0
    out = cov / cov[0]
    return np.append(out, 0.0)


# --- scatter state: does the trace scatter as its settings say? -------------------------------

#: false-alarm probability of each scatter-state test on clean noise (per trace)
SCATTER_STATE_FALSE_ALARM = 1e-6
#: the scatter-state tests need this many independent differences to say anything
SCATTER_STATE_MIN_DOF = 3.0
#: a trace scattering more than this many times (standard deviation) what its averages predict
#: is refused even when its statistics would allow a smaller factor (robust scale, spurs kept)
SCATTER_STATE_MAX_RATIO = 3.0


@dataclass(frozen=True)
class ScatterState:
    """Observed over predicted point scatter of a whole trace, from differences at one lag.

    ``ratio``: root-mean-square ratio (1 for clean noise); ``robust_ratio``: the same from the
    median absolute difference (insensitive to spurs; reads about 0.73 for single-sample
    exponential points and 1 for Gaussian ones); ``dof``: effective degrees of freedom of
    ``ratio``; ``low_limit``: the ratio below which clean noise falls with probability
    ``SCATTER_STATE_FALSE_ALARM``; ``high_limit`` likewise for ``robust_ratio`` (at least
    ``SCATTER_STATE_MAX_RATIO``).
    """

    ratio: float
    robust_ratio: float
    dof: float
    low_limit: float
    high_limit: float


def scatter_state(
    power: np.ndarray,
    rel_var: float,
    kernel: np.ndarray,
    excess_kurtosis: float,
    usable: np.ndarray | None = None,
) -> ScatterState | None:
    """Scatter of a trace's points about their neighbours against the prediction ``rel_var``.

    Differences ``d_i = p_(i+L) - p_i`` at the first lag ``L`` where the point correlation
    ``rho`` falls to 0.5 or below remove any slope or ripple slower than ``L`` points (a DUT's
    gain slope is not noise) and have ``E[d^2] = 2 (1 - rho_L) r m^2`` (``r`` the relative
    variance of a point, ``m`` the mean level; a slope only raises the ratio, so the
    too-little test stays safe). Degrees of freedom: ``2 N / (k + 3)`` for ``N`` independent
    bins (``n / (2 sum(rho) - 1)``) and the points' excess kurtosis ``k`` (successive
    differences share a point; derived from the fourth moments). None when the trace is too
    short to tell. ``usable``: only differences whose two points are both usable count (the
    points clear of spur lines).
    """
    n = power.size
    below = np.flatnonzero(kernel <= 0.5)
    lag = int(below[0]) if below.size else int(kernel.size)
    if lag >= n - 1:
        return None
    rho = float(kernel[lag]) if lag < kernel.size else 0.0
    d = power[lag:] - power[:-lag]
    mean = _mean(power)
    if usable is not None:
        pairs = usable[lag:] & usable[:-lag]
        if not np.any(pairs):
            return None
        d = d[pairs]
        mean = _mean(power[usable])
    d = d / mean
    expected = 2.0 * (1.0 - rho) * rel_var
    corr_points = max(1.0, 2.0 * _sum(kernel) - 1.0)
    independent = d.size / max(corr_points, float(lag))
    # sum of squared successive differences of N independent points with excess kurtosis k:
    # relative variance (k + 3)/N (neighbouring differences share a point), so 2N/(k + 3) dof
    dof = 2.0 * independent / (max(excess_kurtosis, 0.0) + 3.0)
    if dof < SCATTER_STATE_MIN_DOF:
        return None
    ratio = math.sqrt(_mean(d**2) / expected)
    mad = _median(np.abs(d - _median(d)))
    robust = 1.4826 * mad / math.sqrt(expected)
    low = _chi2_low_limit(dof)
    high = max(SCATTER_STATE_MAX_RATIO, 1.0 + 8.0 / math.sqrt(dof))
    return ScatterState(ratio=ratio, robust_ratio=robust, dof=dof, low_limit=low, high_limit=high)


def _level_scatter_limit(
    freq_hz: np.ndarray,
    power: np.ndarray,
    usable: np.ndarray,
    rel_var: float,
    kernel: np.ndarray,
    excess_kurtosis: float,
) -> tuple[float, float] | None:
    """(observed over predicted scatter of the usable points about a straight line, the ratio
    clean noise exceeds with probability ``SCATTER_STATE_FALSE_ALARM``), for a stretch too
    short for the difference test; a constant replaces the line below three independent bins,
    None below two.

    Degrees of freedom ``2 (B - p) / (k + 2)`` for ``B`` independent bins, ``p`` fitted
    parameters and excess kurtosis ``k`` (the relative variance of a sum of squares is
    ``(k + 2)/B``); correlated neighbours scatter less about their own fit than independent
    points, so this errs on the side of not refusing."""
    corr_points = max(1.0, 2.0 * _sum(kernel) - 1.0)
    bins = int(usable.sum()) / corr_points
    params = 2 if bins >= 3.0 else 1
    if bins < 2.0:
        return None
    f = freq_hz[usable]
    p = power[usable]
    if params == 2:
        x = (f - f.mean()) / max(float(np.ptp(f)), 1e-300)
        slope, offset = np.polyfit(x, p, 1)
        resid = p - (offset + slope * x)
    else:
        resid = p - p.mean()
    ratio = math.sqrt(float(np.mean(resid**2)) / rel_var) / float(np.mean(p))
    dof = 2.0 * (bins - params) / (max(excess_kurtosis, 0.0) + 2.0)
    limit = math.sqrt(stats.chi2.isf(SCATTER_STATE_FALSE_ALARM, dof) / dof)
    return ratio, max(SCATTER_STATE_MAX_RATIO, limit)


def _lines_explain_scatter(
    trace: Trace,
    power: np.ndarray,
    rel_var: float,
    kernel: np.ndarray,
    model: PointModel,
    state: ScatterState,
    threshold_sigma: float,
) -> bool:
    """True when spur lines, not missing averaging, make a trace scatter too much.

    Lines covering a large share of a short trace (a comb: 1 MHz RBW lines 1.25 MHz apart over
    10 MHz) raise even the median-based ratio. The ordinary search (claimed scatter) would
    also take the noise peaks of an unaveraged trace for lines, so lines count only where they
    stand out from the scatter *observed* clear of that search (from the lower half of the
    points, which that search's cut hardly changes); each keeps the whole
    neighbourhood the ordinary search excludes around it (a comb merges into one region). The
    rest of the trace must then scatter as the settings say: by the difference test where it
    holds enough points, otherwise about a straight line (chi-square limit)."""
    if power.size < MIN_SPUR_SEARCH_POINTS:
        return False
    ordinary, _, _ = _find_spurs(trace, power, rel_var, kernel, threshold_sigma)
    if not np.any(ordinary) or np.all(ordinary):
        return False
    observed = _lower_half_scatter_ratio(trace.freq_hz, power, ~ordinary, rel_var, kernel)
    if observed is None:
        observed = state.robust_ratio
    strong, _, _ = _find_spurs(
        trace, power, rel_var * max(observed, 1.0) ** 2, kernel, threshold_sigma
    )
    if not np.any(strong):
        return False
    labels, _ = ndimage.label(ordinary)
    touched = np.unique(labels[strong & ordinary])
    usable = ~(strong | np.isin(labels, touched[touched > 0]))
    if not np.any(usable):
        return False
    rest = scatter_state(power, rel_var, kernel, model.excess_kurtosis, usable=usable)
    if rest is not None:
        return rest.robust_ratio <= rest.high_limit
    levels = _level_scatter_limit(
        trace.freq_hz, power, usable, rel_var, kernel, model.excess_kurtosis
    )
    if levels is None:
        return True  # the lines leave too little noise to tell; the band estimate widens u
    ratio, limit = levels
    return ratio <= limit


def _lower_half_scatter_ratio(
    freq_hz: np.ndarray, power: np.ndarray, usable: np.ndarray, rel_var: float, kernel: np.ndarray
) -> float | None:
    """Observed over predicted scatter of the usable points from their lower half (median
    minus lower quartile, over a straight line), so that cutting the highest points (a spur
    search run on an unaveraged trace) hardly lowers it; None below two independent bins."""
    corr_points = max(1.0, 2.0 * _sum(kernel) - 1.0)
    if int(usable.sum()) / corr_points < 2.0:
        return None
    f = freq_hz[usable]
    p = power[usable]
    x = (f - f.mean()) / max(float(np.ptp(f)), 1e-300)
    slope, offset = np.polyfit(x, p, 1)
    resid = p - (offset + slope * x)
    q25, q50 = np.quantile(resid, [0.25, 0.5])
    sigma = float(q50 - q25) / float(special.ndtri(0.75))
    return sigma / (math.sqrt(rel_var) * float(np.mean(p)))


@functools.lru_cache(maxsize=1024)
def _chi2_low_limit(dof: float) -> float:
    """sqrt(chi2 quantile at SCATTER_STATE_FALSE_ALARM / dof) (cached: traces repeat dofs)."""
    return math.sqrt(stats.chi2.ppf(SCATTER_STATE_FALSE_ALARM, dof) / dof)


def _check_scatter_state(
    trace: Trace,
    power: np.ndarray,
    rel_var: float,
    kernel: np.ndarray,
    model: PointModel,
    threshold_sigma: float,
    zero_span: bool,
) -> None:
    """Refuse a trace whose scatter contradicts its settings, naming the likely cause."""
    state = scatter_state(power, rel_var, kernel, model.excess_kurtosis)
    if state is None:
        return
    s = trace.settings
    said = f"averages={s.averages}, detector={s.detector.value}"
    if state.ratio < state.low_limit:
        raise MeasurementError(
            f"the trace scatters only {state.ratio:.3g}x what its settings ({said}) predict for "
            f"noise (clean noise stays above {state.low_limit:.2g}x): a frozen or held display, "
            "a clipped or overranged input, or more averaging than the analyzer reported; check "
            "that the trace is updating (clear/write), the reference level and attenuation, and "
            "that the analyzer's averaging count matches the settings"
        )
    if state.robust_ratio > state.high_limit and (
        zero_span
        or not _lines_explain_scatter(trace, power, rel_var, kernel, model, state, threshold_sigma)
    ):
        raise MeasurementError(
            f"the trace scatters {state.robust_ratio:.3g}x more than its settings ({said}) "
            "predict: the analyzer is probably not averaging as reported (trace averaging left "
            "off or reset by a previous user, or a different average type); check the "
            "averaging state and count on the instrument and in the profile"
        )


# --- spur search ------------------------------------------------------------------------------


def _gamma_shape(rel_var: float) -> float:
    return 1.0 / rel_var


def _robust_relative_variance(power: np.ndarray) -> float:
    """Relative variance of the points from their median absolute deviation (spur-robust)."""
    med = _median(power)
    mad = _median(np.abs(power - med))
    return max((1.4826 * mad / med) ** 2, 1e-12)


def _marked_regions(
    freq_hz: np.ndarray, marked: np.ndarray
) -> tuple[np.ndarray, list[float], list[float]]:
    """Points the instrument marked unusable: (mask, centre of each run, its half-width Hz)."""
    mask = np.asarray(marked, dtype=bool).copy()
    centres: list[float] = []
    widths: list[float] = []
    if not np.any(mask):
        return mask, centres, widths
    spacing = _uniform_spacing(freq_hz) if freq_hz.size > 1 else 0.0
    labels, count = ndimage.label(mask)
    for lab in range(1, count + 1):
        idx = np.flatnonzero(labels == lab)
        lo, hi = float(freq_hz[idx[0]]), float(freq_hz[idx[-1]])
        centres.append(0.5 * (lo + hi))
        widths.append(0.5 * (hi - lo) + spacing / 2)
    return mask, centres, widths


@functools.lru_cache(maxsize=256)
def _median_ratio(shape: float) -> float:
    """Median over mean of a gamma(``shape``) point (cached: a sweep repeats its shape)."""
    return float(special.gammaincinv(shape, 0.5) / shape)


@functools.lru_cache(maxsize=64)
def _normal_tail(sigma: float) -> float:
    """P(Z > sigma) of a standard normal (cached)."""
    return float(special.ndtr(-sigma))


@functools.lru_cache(maxsize=256)
def median_threshold_ratio(shape: float, bins: int, false_alarm: float) -> float:
    """``t`` with P(X > t M) = ``false_alarm``: X a gamma(``shape``) point, M the median of
    ``bins`` independent such points (the spur search's baseline).

    The sample median's CDF value is Beta(k, bins + 1 - k) distributed with k = (bins + 1)/2
    (order statistics; non-integer k interpolates for even counts), so
    P(X > t M) = E_U[Q(a, a t F^-1(U))], integrated by Gauss-Legendre quadrature on the beta
    quantiles and solved for t. Large ``bins`` gives the plain gamma quantile over the median.
    """
    a = float(shape)
    k = (bins + 1) / 2.0
    nodes, weights = np.polynomial.legendre.leggauss(96)
    u = 0.5 * (nodes + 1.0)
    median_cdf = stats.beta.ppf(u, k, bins + 1.0 - k)  # CDF value of the sample median
    m = special.gammaincinv(a, median_cdf) / a  # the median itself, mean-1 units
    w = 0.5 * weights

    def excess(log_t: float) -> float:
        return float(np.sum(w * special.gammaincc(a, a * math.exp(log_t) * m))) - false_alarm

    median_1 = float(special.gammaincinv(a, 0.5) / a)
    t_plain = float(special.gammainccinv(a, false_alarm) / a) / median_1
    lo, hi = math.log(t_plain) - 1e-9, math.log(t_plain) + 1.0
    while excess(hi) > 0:
        hi += 1.0
    return math.exp(optimize.brentq(excess, lo, hi, xtol=1e-10))


def _find_spurs(
    trace: Trace,
    power: np.ndarray,
    rel_var: float,
    kernel: np.ndarray,
    threshold_sigma: float,
    marked: np.ndarray | None = None,
    skirt_rel_var: float | None = None,
    spacing: float | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exclusion mask, spur frequencies and their excluded half-widths (Hz).

    ``marked``: points the instrument already marked unusable; they start excluded and are
    reported as lines (centre and half-width of each marked run). ``skirt_rel_var``: the
    relative variance that sizes each line's excluded skirt (default ``rel_var``, which sets
    the detection threshold). ``spacing``: the trace's point spacing when the caller has it."""
    s = trace.settings
    f = trace.freq_hz
    n = power.size
    spacing = _uniform_spacing(f) if spacing is None else spacing
    a = _gamma_shape(rel_var)
    median_ratio = _median_ratio(a)
    # running-median window: ~SPUR_BASELINE_BINS independent bins, so the baseline itself is
    # quiet (its relative noise ~ 1.25 sigma / sqrt(bins)); narrower only for long traces
    corr_points = max(1.0, 2.0 * _sum(kernel) - 1.0)
    window = int(min(n, max(101, SPUR_BASELINE_BINS * corr_points)))
    window += (window + 1) % 2  # odd
    short = window >= n
    # the threshold over the sample median that clean noise crosses with the design probability,
    # the median's own scatter included (its window holds this many independent bins)
    bins = max(1, round(min(window, n) / corr_points))
    tail_ratio = median_ratio * median_threshold_ratio(a, bins, _normal_tail(threshold_sigma))
    # residual skirt allowed per point: a fraction of the relative resolution of the full trace
    skirt_var = rel_var if skirt_rel_var is None else skirt_rel_var
    skirt_level = SPUR_SKIRT_FRACTION * math.sqrt(skirt_var / n)
    excluded = np.zeros(n, dtype=bool)
    spurs: list[float] = []
    widths: list[float] = []
    noise_points = power
    if marked is not None:
        excluded, spurs, widths = _marked_regions(f, marked)
        if np.any(~excluded):
            noise_points = power[~excluded]  # marked points are no noise sample at all
    baseline = np.full(n, _median(noise_points) / median_ratio)
    for _ in range(50):
        # short: one median of all points, spurs included (the baseline above, the same in
        # every pass): a line moves it by one rank at most, while dropping excluded points
        # would lower it and let the next noise peak cross
        if not short:
            work = np.where(excluded, baseline * median_ratio, power)
            baseline = ndimage.median_filter(work, size=window, mode="mirror") / median_ratio
        hits = (power > tail_ratio * baseline) & ~excluded
        if not hits.any():
            break
        labels, count = ndimage.label(hits)
        for lab in range(1, count + 1):
            idx = np.flatnonzero(labels == lab)
            peak = int(idx[np.argmax(power[idx] / baseline[idx])])
            excess = max(power[peak] - baseline[peak], 0.0)
            # the line may sit half a point away from the peak point: size it for that worst case
            edge = float(s.rbw_filter.power_response(np.array([spacing / 2]), s.rbw_hz)[0])
            line = excess / max(edge, 1e-300)
            level = skirt_level * baseline[peak] / line
            half = response_halfwidth_ratio(s.rbw_filter, level) * s.rbw_hz + spacing / 2
            excluded |= np.abs(f - f[peak]) <= half
            spurs.append(float(f[peak]))
            widths.append(half)
    if not spurs:  # the common case: no line (empty float arrays, as below)
        return excluded, np.empty(0), np.empty(0)
    logger.debug("excluded %d spur(s) at %s", len(spurs), ", ".join(map(format_frequency, spurs)))
    order = np.argsort(spurs)
    return excluded, np.asarray(spurs)[order], np.asarray(widths)[order]


def _exclude_known_lines(
    trace: Trace,
    power: np.ndarray,
    rel_var: float,
    excluded: np.ndarray,
    spurs: np.ndarray,
    widths: np.ndarray,
    lines_hz: Sequence[float],
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Add known lines inside the trace to the exclusion, each sized like a found spur (its
    skirt down to the same residual level) and at least for a line as strong as the noise."""
    s = trace.settings
    f = trace.freq_hz
    spacing = _uniform_spacing(f)
    lines = np.asarray([float(x) for x in lines_hz], dtype=float)
    if not np.all(np.isfinite(lines)):
        raise InputError("known_lines_hz", "must be finite frequencies", fix="pass Hz values")
    a = _gamma_shape(rel_var)
    median_ratio = float(special.gammaincinv(a, 0.5) / a)
    quiet = power[~excluded] if np.any(~excluded) else power
    base = _median(quiet) / median_ratio
    skirt_level = SPUR_SKIRT_FRACTION * math.sqrt(rel_var / power.size)
    edge = float(s.rbw_filter.power_response(np.array([spacing / 2]), s.rbw_hz)[0])
    excluded = excluded.copy()
    new_spurs, new_widths = list(spurs), list(widths)
    for line in lines:
        if line < f[0] - spacing or line > f[-1] + spacing:
            continue  # outside the trace: plan validation keeps its skirt out of the bands
        near = np.abs(f - line) <= max(spacing, 0.5 * s.rbw_hz)
        peak = float(power[near].max()) if np.any(near) else base
        line_power = max(peak - base, base) / max(edge, 1e-300)
        half = (
            response_halfwidth_ratio(s.rbw_filter, skirt_level * base / line_power) * s.rbw_hz
            + spacing / 2
        )
        excluded |= np.abs(f - line) <= half
        new_spurs.append(float(line))
        new_widths.append(half)
    order = np.argsort(new_spurs)
    return excluded, np.asarray(new_spurs)[order], np.asarray(new_widths)[order]


# --- per-band estimate ------------------------------------------------------------------------


def _select_band(
    p: _Prepared, freq_hz: float | None, band_hz: float | None, min_points: int
) -> tuple[float, slice, int]:
    """(reported frequency, slice of the trace points inside the band, points required).

    A requested band must hold ``min_points``; the whole trace (no band) needs fewer when it
    has fewer points.
    """
    f = p.freq_hz
    s = p.trace.settings
    if freq_hz is not None and (not math.isfinite(freq_hz) or freq_hz <= 0):
        raise InputError("freq_hz", f"must be a finite frequency > 0 (got {freq_hz!r})")
    if band_hz is not None and (not math.isfinite(band_hz) or band_hz <= 0):
        raise InputError(
            "band_hz",
            f"must be a finite bandwidth > 0 (got {band_hz!r})",
            fix="omit it to use the whole trace",
        )
    if min_points < 1:
        raise InputError("min_points", "must be >= 1", value=min_points)
    lo, hi = float(f[0]), float(f[-1])
    whole = slice(0, f.size)
    if p.zero_span:
        if freq_hz is not None and abs(freq_hz - lo) > s.enbw_hz / 2:
            raise InputError(
                "freq_hz",
                f"{format_frequency(freq_hz)} is not within the RBW of the zero-span trace at "
                f"{format_frequency(lo)}",
                fix="estimate at the trace's centre",
            )
        report, band = (lo if freq_hz is None else freq_hz), whole
    else:
        spacing = (hi - lo) / (f.size - 1)
        report = 0.5 * (lo + hi) if freq_hz is None else freq_hz
        if band_hz is None:
            if freq_hz is not None and not lo - spacing / 2 <= freq_hz <= hi + spacing / 2:
                raise InputError(
                    "freq_hz",
                    f"{format_frequency(freq_hz)} is outside the trace "
                    f"({format_frequency_range(lo, hi)})",
                    fix="use a trace that covers it",
                )
            band = whole
        else:
            half = band_hz / 2
            if report - half < lo - spacing / 2 or report + half > hi + spacing / 2:
                raise InputError(
                    "band_hz",
                    f"{format_frequency(report)} +/- {format_frequency(half)} extends beyond the "
                    "trace "
                    f"({format_frequency_range(lo, hi)})",
                    fix="narrow the band or widen the span",
                )
            tol = half * 1e-12 + 1e-9 * spacing
            band = slice(
                int(f.searchsorted(report - half - tol, side="left")),
                int(f.searchsorted(report + half + tol, side="right")),
            )
    count = band.stop - band.start
    required = min_points if band is not whole else min(min_points, f.size)
    if count < required:
        raise InputError(
            "band_hz",
            f"holds {count} trace point(s), fewer than {required}",
            fix="widen the band or acquire more trace points",
        )
    return report, band, required


def _estimate_band(
    p: _Prepared, freq_hz: float | None, band_hz: float | None, *, min_points: int
) -> NoiseDensity:
    report_hz, sl, required = _select_band(p, freq_hz, band_hz, min_points)
    used = ~p.excluded[sl]
    n = int(used.sum())
    if n < max(required, 1):
        raise MeasurementError(
            f"only {n} of {used.size} points in the band are free of spurs "
            f"(spurs at {np.round(p.spurs_hz, 1).tolist()} Hz)",
            freq_hz=report_hz,
        )
    values = p.power[sl]
    mean = _mean(values[used])  # > 0: every point is a positive power
    stats_ = _band_statistics(values, used, p.kernel)
    rel_var, scatter_ratio = _relative_variance(p, stats_, mean)
    rel_u = math.sqrt(rel_var * stats_.s1) / n
    if scatter_ratio is not None and p.rel_var is not None:
        if scatter_ratio > _widen_limit(stats_, p.model):
            logger.debug(
                "scatter %.2fx the prediction at %s: uncertainty widened",
                scatter_ratio,
                format_frequency(report_hz),
            )
            rel_u *= scatter_ratio
    density = mean * p.to_density
    f_used = p.freq_hz[sl][used]
    # np.ptp(f_used); off zero span the axis is ascending (_uniform_spacing checked it)
    width = float(np.ptp(f_used)) if p.zero_span else float(f_used[-1] - f_used[0])
    enbw = p.trace.settings.enbw_hz
    spurs = _spurs_touching(p, float(p.freq_hz[sl][0]), float(p.freq_hz[sl][-1]))
    return NoiseDensity(
        freq_hz=report_hz,
        density_w_per_hz=density,
        u_density_w_per_hz=density * rel_u,
        independent_samples=n**2 / stats_.s1 / rel_var,
        band_hz=width + enbw,
        bins_used=n,
        excluded_freq_hz=spurs,
        scatter_ratio=scatter_ratio,
        bias_correction_db=p.model.correction_db,
        settings=p.trace.settings,
        acquisition_time_s=_acquisition_time(p.trace),
    )


@dataclass(frozen=True)
class _BandStats:
    n: int
    s1: float  # sum_ij rho_ij over used points
    s2: float  # sum_ij rho_ij^2 over used points
    rss: float  # residual sum of squares about a straight line
    expected_rss_factor: float  # n - tr(P C): E[rss] = r m^2 * this


#: below this many multiply-adds a direct convolution beats the FFT (measured: a 42-point
#: trace with a 14-lag kernel takes 4 us directly, 66 us through scipy's overlap-add; the two
#: break even near 10 001 points with a 60-lag kernel)
DIRECT_CONVOLUTION_OPS = 4_000_000


def _convolve_same(x: np.ndarray, sym: np.ndarray) -> np.ndarray:
    """``x`` convolved with the odd-length symmetric ``sym``, centred, ``x``'s length (as
    ``scipy.signal.oaconvolve(x, sym, mode="same")``), directly when that is cheaper."""
    if x.size * sym.size > DIRECT_CONVOLUTION_OPS:
        return signal.oaconvolve(x, sym, mode="same")
    half = (sym.size - 1) // 2
    return np.convolve(x, sym)[half : half + x.size]


@dataclass(frozen=True)
class _BandGeometry:
    """What a band's statistics need besides its values: the used points and the kernel
    only (the same for every trace of a sweep with the same settings and no spur)."""

    n: int
    s1: float
    s2: float
    mask: np.ndarray
    t: np.ndarray | None  # centred, scaled point index (None: fewer than 3 points)
    x: np.ndarray | None  # design columns, zero outside the used points
    xtx: np.ndarray | None
    tr_pc: float


_GEOMETRY_CACHE: dict[tuple[bytes, bytes], _BandGeometry] = {}
_GEOMETRY_CACHE_SIZE = 256


def _band_geometry(used: np.ndarray, kernel: np.ndarray) -> _BandGeometry:
    """:class:`_BandGeometry` of ``used`` and ``kernel``, kept per (kernel, used) pair: every
    number is computed exactly as it would be afresh, so results do not depend on the cache."""
    key = (kernel.tobytes(), used.tobytes())
    geometry = _GEOMETRY_CACHE.get(key)
    if geometry is None:
        geometry = _compute_band_geometry(used, kernel)
        if len(_GEOMETRY_CACHE) >= _GEOMETRY_CACHE_SIZE:
            _GEOMETRY_CACHE.clear()
        _GEOMETRY_CACHE[key] = geometry
    return geometry


def _compute_band_geometry(used: np.ndarray, kernel: np.ndarray) -> _BandGeometry:
    mask = used.astype(float)
    n = int(used.sum())
    sym = np.concatenate([kernel[:0:-1], kernel])

    def corr_apply(x: np.ndarray) -> np.ndarray:  # (C x) restricted to used points
        if kernel.size == 1:
            return x * mask
        return _convolve_same(x * mask, sym) * mask

    c_mask = corr_apply(mask)
    s1 = float(np.sum(c_mask))
    s2 = float(np.sum((_convolve_same(mask, sym**2) if kernel.size > 1 else mask) * mask))
    if n < 3:
        return _BandGeometry(n, s1, s2, mask, None, None, None, 0.0)
    idx = np.arange(used.size, dtype=float)
    t = (idx - idx[used].mean()) / max(float(np.ptp(idx[used])), 1.0)
    x = np.stack([mask, t * mask])
    xtx = x @ x.T
    cx = np.stack([c_mask, corr_apply(x[1])])
    tr_pc = float(np.trace(np.linalg.solve(xtx, x @ cx.T)))
    for shared in (mask, t, x, xtx):  # kept in the cache: nobody may change them
        shared.flags.writeable = False
    return _BandGeometry(n, s1, s2, mask, t, x, xtx, tr_pc)


def _band_statistics(values: np.ndarray, used: np.ndarray, kernel: np.ndarray) -> _BandStats:
    g = _band_geometry(used, kernel)
    if g.t is None or g.x is None or g.xtx is None:
        return _BandStats(n=g.n, s1=g.s1, s2=g.s2, rss=0.0, expected_rss_factor=0.0)
    beta = np.linalg.solve(g.xtx, g.x @ (values * g.mask))
    resid = (values - beta[0] - beta[1] * g.t) * g.mask
    rss = float(resid @ resid)
    return _BandStats(n=g.n, s1=g.s1, s2=g.s2, rss=rss, expected_rss_factor=g.n - g.tr_pc)


def _relative_variance(p: _Prepared, st: _BandStats, mean: float) -> tuple[float, float | None]:
    """(relative variance of one point, scatter ratio) — predicted, or observed when unknown."""
    observed = (
        st.rss / (mean**2 * st.expected_rss_factor) if st.expected_rss_factor >= 1.0 else None
    )
    if p.rel_var is not None:
        ratio = None if observed is None else math.sqrt(observed / p.rel_var)
        return p.rel_var, ratio
    if observed is None or st.expected_rss_factor < 2.0:
        raise InputError(
            "trace.settings.detector_samples",
            "is unknown and the band holds too few "
            "independent points to measure the noise scatter instead",
            fix="read the detector's sample count back from the instrument, or widen the band",
        )
    return observed, None


def _widen_limit(st: _BandStats, model: PointModel) -> float:
    """99 % quantile of the scatter ratio of clean noise (chi-square, Satterthwaite dof)."""
    dof = st.n**2 / st.s2 - 2.0
    dof = max(dof / (1.0 + model.excess_kurtosis / 2.0), 1.0)
    return _chi2_quantile_ratio(SCATTER_WIDEN_QUANTILE, dof)


@functools.lru_cache(maxsize=4096)
def _chi2_quantile_ratio(quantile: float, dof: float) -> float:
    """sqrt(chi2 quantile / dof) (cached: bands repeat their degrees of freedom)."""
    return math.sqrt(stats.chi2.ppf(quantile, dof) / dof)


def _spurs_touching(p: _Prepared, lo_hz: float, hi_hz: float) -> list[float]:
    if p.spurs_hz.size == 0:
        return []
    touch = (p.spurs_hz + p.spur_halfwidth_hz >= lo_hz) & (
        p.spurs_hz - p.spur_halfwidth_hz <= hi_hz
    )
    return [float(x) for x in p.spurs_hz[touch]]


def _acquisition_time(trace: Trace) -> float | None:
    if trace.acquisition_time_s is not None:
        return trace.acquisition_time_s
    s = trace.settings
    return None if s.sweep_time_s is None else s.sweep_time_s * s.averages


# --- markers ----------------------------------------------------------------------------------


def _marker_model(reading: MarkerReading) -> PointModel:
    """Point model of the reading; with unknown sample count the single-sample variance bound."""
    s = reading.settings
    try:
        model = point_model_for(s, field="reading.settings")
    except InputError as exc:
        if not (reading.instrument_corrected and exc.field.endswith("detector_samples")):
            raise
        model = None
    if model is None or not model.variance_known:
        stat = model.statistic if model is not None else statistic_for_scale(s.averaging_scale)
        model = PointModel(statistic=stat, count=float(s.averages), shape=1.0)
    return model


def _marker_points(reading: MarkerReading, model: PointModel) -> tuple[int, float]:
    """(points in the marker band, ``w^T R w / (sum w)^2``) from the settings.

    ``w`` are the band weights of :func:`band_weights_hz` and ``R`` the correlation of the
    point values, so the relative variance of the reading is the point's times the second.
    """
    s = reading.settings
    if reading.band_hz is None or s.span_hz == 0 or s.points < 2:
        return 1, 1.0
    weights = band_weights_hz(s.frequencies_hz(), reading.freq_hz, reading.band_hz)
    touched = np.flatnonzero(weights > 0)
    if touched.size == 0:  # the band misses the trace: a single point is the honest bound
        return 1, 1.0
    w = weights[touched[0] : touched[-1] + 1]
    spacing = s.span_hz / (s.points - 1)
    lags = np.arange(min(w.size, MAX_KERNEL_LAGS + 1), dtype=float)
    rho = frequency_power_correlation(s.rbw_filter, lags * spacing, s.rbw_hz)
    rho[0] = 1.0
    rho = model.correlation(rho[: int(np.flatnonzero(rho >= CORRELATION_FLOOR)[-1]) + 1])
    if rho.size == 1:
        quad = float(w @ w)
    else:
        sym = np.concatenate([rho[:0:-1], rho])
        quad = float(w @ _convolve_same(w, sym))
    return int(touched.size), quad / float(np.sum(w)) ** 2

"""Random trace synthesis: correlated Gaussian noise, detectors and trace averaging, vectorized.

The analyzer's IF signal at trace point ``i`` is a complex Gaussian value (plus any tones) whose
power has mean ``noise_w[i]``. Neighbouring points are correlated exactly as the RBW filter makes
them: white complex noise on a fine grid is convolved with the filter's *amplitude* response
(frequency axis: swept or FFT trace, points spaced ``delta_hz``) or with its impulse response
(time axis: zero span, points spaced ``delta_s``). The amplitude correlation between two points
is then the filter's autocorrelation, and the power correlation its square modulus.

Each point's detector combines ``looks`` independent looks (independent realisations of the
correlated field): SAMPLE takes one, RMS averages power, AVERAGE averages on its scale (power,
log-power or voltage), PEAK / NEGATIVE_PEAK take the max / min. ``n_traces`` detector outputs are
then averaged on the averaging scale. All traces of one acquisition are generated as arrays
(chunked to bound memory).

Large look counts (> ``EXACT_LOOKS``) use a large-sample form instead of drawing every look:
power means by the Wilson-Hilferty cube-root normal form of the gamma distribution, log and
voltage means by the central limit theorem, extremes by the exact order-statistic quantiles -
each driven by a Gaussian field with the filter's power correlation. Averages of power over many
traces of a steady input are drawn in one step the same way (the mean of M independent looks).
An average of ``AGGREGATE_MIN_TRACES`` or more traces of a steady input, on any scale and for
any detector, is drawn from the exact distribution of the average itself
(``noisebench/sims/averaged.py``: exact cumulants, Cornish-Fisher, a Gaussian field with the
average's own neighbour correlation); points a tone reaches are still drawn look by look.
``tests/test_sim_statistics.py`` and ``tests/test_sim_averaged.py`` check these forms against
the exact moments and against drawing every look (``exact=True``), which stays for the tests.

Modelling choices: a swept trace uses the quasi-static (frequency-domain) picture, i.e. the
correlation an FFT analyzer or an infinitely slow sweep gives; a real sweep decorrelates
neighbours further through the time between them, so the simulator shows the upper bound.
Tones add a complex amplitude with a random phase per look (noise x tone cross terms included);
in the large-sample forms their power is added to the detected noise.

Size: one job, random trace synthesis: filter kernels, correlated fields and the detector forms
share the kernel cache.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.special import ndtr

from noisebench.bench.acquisition import AveragingScale, Detector, FilterKind, RbwFilter
from noisebench.errors import InputError
from noisebench.sims.averaged import (
    averaged_cumulants,
    cornish_fisher,
    finish,
    scale_correlation,
)
from noisebench.sims.rbw_shapes import power_response

EXACT_LOOKS = 16  # up to this many looks per value are drawn one by one
INDEPENDENT_POWER_CORRELATION = 1e-3  # neighbours less correlated than this are drawn independent
# Fine-grid step, in RBWs (frequency axis) or 1/RBW (time axis). The Riemann sum of the filter
# integral with these steps is exact to < 1e-6 for the Gaussian and n-pole (n >= 2) responses
# (their error falls as exp(-2 pi^2 sigma^2 / step^2) / exp(-2 pi b / step)); for FFT windows it
# is exact by Poisson summation while 1/step exceeds the frame length (1.44 / RBW for Hann).
GRID_STEP = {"frequency": 0.5, "time": 0.1}
CAUSAL_TIME_GRID_STEP = 0.04  # finer for the causal n-pole impulse response (kink at t = 0)
KERNEL_ENERGY_TAIL = 1e-6  # truncated kernel energy
MAX_KERNEL_HALF_WIDTH = 64.0  # in correlation units (RBW or 1/RBW)
CHUNK_SAMPLES = 2_000_000  # complex samples per generated chunk
DIRECT_CONVOLUTION_TAPS = 48  # longer kernels are applied by FFT
AGGREGATE_MIN_TRACES = 8  # from this many averaged traces, draw the average's distribution
TONE_NEGLIGIBLE = 1e-6  # tone power below this fraction of the noise: its mean is added


class Axis:
    FREQUENCY = "frequency"  # swept / FFT trace: points spaced in frequency (unit: RBW)
    TIME = "time"  # zero span: points spaced in time (unit: 1/RBW)


# ----------------------------------------------------------------- filter kernels ----------


def _amplitude_response(filt: RbwFilter, x: np.ndarray) -> np.ndarray:
    """|H| at offsets ``x`` in units of the RBW (peak 1)."""
    return np.sqrt(np.maximum(power_response(filt, x), 0.0))


@lru_cache(maxsize=64)
def _support_half_width(filt: RbwFilter) -> float:
    """Half width (in RBWs) holding all but ``KERNEL_ENERGY_TAIL`` of the power response."""
    x = np.linspace(0.0, MAX_KERNEL_HALF_WIDTH, 65537)
    p = power_response(filt, x)
    cum = np.cumsum(p)
    cum /= cum[-1]
    idx = int(np.searchsorted(cum, 1.0 - KERNEL_ENERGY_TAIL))
    return float(max(x[min(idx, x.size - 1)], 2.0))


def _synchronous_stage_bw(poles: int) -> float:
    """Bandwidth parameter b of one stage, in units of the overall B3: |H|^2 = (1+(x/b)^2)^-n."""
    return 1.0 / (2.0 * math.sqrt(2.0 ** (1.0 / poles) - 1.0))


@lru_cache(maxsize=64)
def _support(filt: RbwFilter, axis: str) -> tuple[float, float]:
    """Offsets (correlation units) outside which the kernel is negligible."""
    if axis == Axis.FREQUENCY:
        half = _support_half_width(filt)
        return -half, half
    if filt.kind is FilterKind.GAUSSIAN:
        # g(t) ~ exp(-pi^2 t^2 / (2 ln 2)): energy beyond |t| = 1.2 is < 1e-9
        return -1.2, 1.2
    if filt.kind is FilterKind.SYNCHRONOUS:
        n, rate = int(filt.poles or 1), 2 * math.pi * _synchronous_stage_bw(int(filt.poles or 1))
        # energy of t^(n-1) e^(-rate t): gamma(2n-1) tail; find where it is below the tail limit
        t = np.linspace(0.0, 200.0 / rate, 200001)
        e = t ** (2 * (n - 1)) * np.exp(-2 * rate * t)
        cum = np.cumsum(e) / np.sum(e)
        return 0.0, float(t[int(np.searchsorted(cum, 1.0 - KERNEL_ENERGY_TAIL))])
    raise InputError(
        "rbw_filter",
        "an FFT filter has no zero-span (time axis) response",
        fix="use swept mode for zero span",
    )


def _kernel_values(filt: RbwFilter, offset: np.ndarray, axis: str) -> np.ndarray:
    """Amplitude response (frequency axis) or impulse response (time axis) at ``offset``.

    The time-axis kernels are the filters' impulse responses: zero-phase Gaussian, and the
    causal response of n identical single-pole stages, ``t^(n-1) exp(-2 pi b t)``. Only
    ``|H|^2`` sets the statistics (Wiener-Khinchin), so the phase choice does not matter.
    """
    if axis == Axis.FREQUENCY:
        return _amplitude_response(filt, offset)
    if filt.kind is FilterKind.GAUSSIAN:
        return np.exp(-(math.pi**2) * offset**2 / (2.0 * math.log(2.0)))
    n = int(filt.poles or 1)
    rate = 2 * math.pi * _synchronous_stage_bw(n)
    t = np.maximum(offset, 0.0)
    return np.where(offset >= 0, t ** (n - 1) * np.exp(-rate * t), 0.0)


def amplitude_correlation(filt: RbwFilter, lag: np.ndarray | float, axis: str) -> np.ndarray:
    """Correlation of the complex IF amplitude between points ``lag`` apart.

    ``lag`` is in RBWs on the frequency axis (``int h(f) h(f+d) df / int h^2 df``) or in units
    of 1/RBW on the time axis (``int |H|^2 cos(2 pi f tau) df / int |H|^2 df``).
    """
    lag = np.atleast_1d(np.asarray(lag, dtype=float))
    half = _support_half_width(filt)
    reach = float(np.max(np.abs(lag))) if axis == Axis.FREQUENCY else 0.0
    f = np.linspace(-half - reach, half + reach, 16385)
    df = f[1] - f[0]
    if axis == Axis.FREQUENCY:
        h = _amplitude_response(filt, f)
        norm = np.sum(h**2) * df
        return np.array([np.sum(h * _amplitude_response(filt, f + d)) * df for d in lag]) / norm
    p = power_response(filt, f)
    norm = np.sum(p) * df
    return (np.cos(2 * math.pi * np.outer(lag, f)) @ p) * df / norm


@dataclass(frozen=True, eq=False)
class FieldKernel:
    """How to draw one correlated look of a trace.

    Each trace point ``i`` (at ``i * spacing`` in correlation units: RBWs on the frequency axis,
    1/RBW on the time axis) is ``sum_j k(x_i - u_j) w_j`` over white complex noise ``w_j`` on a
    grid ``u_j = j * grid_step`` (``GRID_STEP``) - the Riemann sum of the filter integral,
    accurate far beyond the statistics for these smooth kernels. Rows are normalised
    so every point has unit mean power.
    """

    filt: RbwFilter
    axis: str
    spacing: float
    grid_step: float
    support: tuple[float, float]  # kernel offsets (lo, hi) in correlation units

    @property
    def power_correlation(self) -> np.ndarray:
        """|rho|^2 between points 0, 1, 2, ... lags apart, as the generator produces it."""
        return _power_correlation(self)


@lru_cache(maxsize=32)
def _kernel_matrix(kernel: FieldKernel, n_points: int):
    from scipy.sparse import csr_matrix

    d, step = kernel.spacing, kernel.grid_step
    lo, hi = kernel.support
    x = np.arange(n_points) * d
    j0 = np.ceil((x - hi) / step - 1e-9).astype(np.int64)  # offset x - u <= hi
    width = int(math.floor((hi - lo) / step)) + 2
    cols = j0[:, None] + np.arange(width)[None, :]
    offset = x[:, None] - cols * step
    inside = (offset >= lo - 1e-12) & (offset <= hi + 1e-12)
    vals = np.where(inside, _kernel_values(kernel.filt, offset, kernel.axis), 0.0)
    vals /= np.sqrt(np.sum(vals**2, axis=1, keepdims=True))
    cols -= cols.min()
    n_grid = int(cols.max()) + 1
    rows = np.repeat(np.arange(n_points), width)
    mat = csr_matrix((vals.ravel(), (rows, cols.ravel())), shape=(n_points, n_grid))
    mat.eliminate_zeros()
    return mat, n_grid


@lru_cache(maxsize=64)
def _power_correlation(kernel: FieldKernel) -> np.ndarray:
    lo, hi = kernel.support
    max_lag = int(math.ceil((hi - lo) / kernel.spacing)) + 1
    n = 2 * max_lag + 1
    mat, _ = _kernel_matrix(kernel, n)
    dense = mat.toarray()
    mid = max_lag
    rho = dense[mid : mid + max_lag + 1] @ dense[mid]
    return np.where(np.arange(rho.size) == 0, 1.0, rho**2)


@lru_cache(maxsize=256)
def field_kernel(filt: RbwFilter, spacing_in_corr_units: float, axis: str) -> FieldKernel | None:
    """Kernel for points ``spacing_in_corr_units`` apart (RBWs or 1/RBWs); None: independent."""
    d = float(spacing_in_corr_units)
    if not d > 0:
        raise InputError("spacing", "must be > 0", value=d)
    rho1 = float(amplitude_correlation(filt, d, axis)[0])
    if rho1**2 < INDEPENDENT_POWER_CORRELATION:
        return None
    target = GRID_STEP[axis]
    if axis == Axis.TIME and filt.kind is FilterKind.SYNCHRONOUS:
        target = CAUSAL_TIME_GRID_STEP
    step = d / math.ceil(d / target) if d >= target else d * math.floor(target / d)
    return FieldKernel(
        filt=filt, axis=axis, spacing=d, grid_step=step, support=_support(filt, axis)
    )


# ----------------------------------------------------------------- random fields -----------


@lru_cache(maxsize=64)
def _phase_taps(kernel: FieldKernel) -> tuple[int, int, int, np.ndarray]:
    """Polyphase form of the kernel on its grid.

    Returns ``(q, m, offset, taps)``: point ``p`` is ``conv_r[(p // q) * m + offset]`` with
    ``r = p % q`` and ``conv_r`` the convolution of the grid noise with ``taps[r]``. Either
    ``q == 1`` (``m`` grid steps per point spacing) or ``m == 1`` (``q`` points per grid step).
    """
    d, step = kernel.spacing, kernel.grid_step
    lo, hi = kernel.support
    if step <= d * (1 + 1e-9):
        q, m = 1, int(round(d / step))
    else:
        q, m = int(round(step / d)), 1
    lmin = [math.ceil((lo - r * d) / step - 1e-9) for r in range(q)]
    lmax = [math.floor((hi - r * d) / step + 1e-9) for r in range(q)]
    l_lo, l_hi = min(lmin), max(lmax)
    taps = np.zeros((q, l_hi - l_lo + 1))
    for r in range(q):
        ell = np.arange(lmin[r], lmax[r] + 1)
        vals = _kernel_values(kernel.filt, ell * step + r * d, kernel.axis)
        taps[r, ell - l_lo] = vals / math.sqrt(float(np.sum(vals**2)))
    return q, m, l_hi - l_lo, taps


def complex_looks(
    rng: np.random.Generator, n_looks: int, n_points: int, kernel: FieldKernel | None
) -> np.ndarray:
    """``n_looks`` x ``n_points`` complex Gaussian values with E|y|^2 = 1, correlated by kernel.

    White noise is drawn in single precision (the statistics need far fewer than 24 bits);
    short kernels are applied tap by tap (direct convolution, all looks at once), long ones by
    FFT.
    """
    if kernel is None:
        white = rng.standard_normal((n_looks, 2 * n_points), dtype=np.float32)
        return white.view(np.complex64) * np.float32(math.sqrt(0.5))
    q, m, offset, taps = _phase_taps(kernel)
    n_rows = -(-n_points // q)
    n_grid = (n_rows - 1) * m + 1 + offset
    white = rng.standard_normal((n_looks, 2 * n_grid), dtype=np.float32).view(np.complex64)
    white *= np.float32(math.sqrt(0.5))
    if taps.shape[1] <= DIRECT_CONVOLUTION_TAPS:
        out = _convolve_direct(white, taps, q, m, n_rows)
    else:
        out = _convolve_fft(white, taps, q, m, offset, n_rows)
    return out.reshape(n_looks, n_rows * q)[:, :n_points]


def _convolve_direct(
    white: np.ndarray, taps: np.ndarray, q: int, m: int, n_rows: int
) -> np.ndarray:
    """(looks, rows, q): row i of phase r is sum_j taps[r, L-1-j] * white[i*m + j]."""
    rev = taps[:, ::-1].astype(np.float32)
    out = np.zeros((white.shape[0], n_rows, q), dtype=np.complex64)
    stop = (n_rows - 1) * m + 1
    for j in range(rev.shape[1]):
        seg = white[:, j : j + stop : m]
        if q == 1:
            out[:, :, 0] += rev[0, j] * seg
        else:
            out += seg[:, :, None] * rev[:, j]
    return out


def _convolve_fft(
    white: np.ndarray, taps: np.ndarray, q: int, m: int, offset: int, n_rows: int
) -> np.ndarray:
    nfft = 1 << int(math.ceil(math.log2(white.shape[1] + taps.shape[1])))
    spectrum = np.fft.fft(white, nfft, axis=-1)
    tap_spectra = np.fft.fft(taps, nfft, axis=-1)
    out = np.empty((white.shape[0], n_rows, q), dtype=np.complex64)
    rows = np.arange(n_rows) * m + offset
    for r in range(q):
        out[:, :, r] = np.fft.ifft(spectrum * tap_spectra[r], axis=-1)[:, rows]
    return out


def correlated_normals(
    rng: np.random.Generator, n_rows: int, n_points: int, kernel: FieldKernel | None
) -> np.ndarray:
    """Real standard normal fields whose correlation between points is the power correlation."""
    if kernel is None:
        return rng.standard_normal((n_rows, n_points))
    return normals_with_correlation(rng, n_rows, n_points, kernel.power_correlation)


def normals_with_correlation(
    rng: np.random.Generator, n_rows: int, n_points: int, c: np.ndarray
) -> np.ndarray:
    """Real standard normal fields with correlation ``c[lag]`` (circulant embedding)."""
    amplitude = _circulant_amplitude(c.tobytes(), n_points)
    size = amplitude.size
    n_pairs = (n_rows + 1) // 2
    w = rng.standard_normal((n_pairs, size)) + 1j * rng.standard_normal((n_pairs, size))
    x = np.fft.fft(amplitude * w, axis=-1)[:, :n_points]
    return np.concatenate([x.real, x.imag], axis=0)[:n_rows]


@lru_cache(maxsize=64)
def _circulant_amplitude(c_bytes: bytes, n_points: int) -> np.ndarray:
    """sqrt(eigenvalues / size) of the circulant embedding of the correlation ``c``."""
    c = np.frombuffer(c_bytes, dtype=float)
    lag_max = c.size - 1
    size = 1 << int(math.ceil(math.log2(2 * (n_points + lag_max))))
    row = np.zeros(size)
    row[: c.size] = c
    if lag_max:
        row[size - lag_max :] = c[1:][::-1]
    lam = np.maximum(np.fft.fft(row).real, 0.0)
    return np.sqrt(lam / size)


# ----------------------------------------------------------------- detection ---------------


def _combine(power: np.ndarray, detector: Detector, scale: AveragingScale) -> np.ndarray:
    """Reduce looks (axis 1) of power values to one detected power per point."""
    if detector is Detector.SAMPLE and power.shape[1] == 1:
        return power[:, 0]
    if detector is Detector.PEAK:
        return power.max(axis=1)
    if detector is Detector.NEGATIVE_PEAK:
        return power.min(axis=1)
    if detector is Detector.RMS:
        return power.mean(axis=1)
    return average_on_scale(power, scale, axis=1)


def average_on_scale(power: np.ndarray, scale: AveragingScale, axis: int = 0) -> np.ndarray:
    """Average power values on ``scale``; return the result as a power."""
    if scale is AveragingScale.POWER:
        return power.mean(axis=axis)
    if scale is AveragingScale.LOG_POWER:
        return np.exp(np.log(np.maximum(power, 1e-300)).mean(axis=axis))
    return np.sqrt(power).mean(axis=axis) ** 2


def _large_sample(
    z: np.ndarray, looks: int, detector: Detector, scale: AveragingScale
) -> np.ndarray:
    """Detected power (mean 1 per look) for many looks, from standard normals ``z``."""
    k = float(looks)
    if detector is Detector.PEAK:
        u = ndtr(z)
        return -np.log1p(-np.power(u, 1.0 / k))
    if detector is Detector.NEGATIVE_PEAK:
        return -np.log(ndtr(-z)) / k
    if detector is Detector.RMS or scale is AveragingScale.POWER:
        return gamma_mean_wilson_hilferty(z, k)
    if scale is AveragingScale.LOG_POWER:
        return np.exp(-np.euler_gamma + z * math.pi / math.sqrt(6.0 * k))
    mean_v = math.sqrt(math.pi) / 2.0
    return np.maximum(mean_v + z * math.sqrt((1.0 - math.pi / 4.0) / k), 0.0) ** 2


def gamma_mean_wilson_hilferty(z: np.ndarray, shape: float) -> np.ndarray:
    """Mean of ``shape`` unit-mean exponentials from normals ``z`` (Wilson-Hilferty 1931)."""
    a = 1.0 - 1.0 / (9.0 * shape)
    return np.maximum(a + z / (3.0 * math.sqrt(shape)), 0.0) ** 3


IF_LIMITER_SMOOTHNESS = 4.0  # sharp, converter-like: -0.004 dB at the reference level


def soft_clip(power_w: np.ndarray, full_scale_w: float | None) -> np.ndarray:
    """IF overload: power limited smoothly towards ``full_scale_w`` (None: no limit)."""
    if full_scale_w is None:
        return power_w
    near = power_w > 0.01 * full_scale_w  # below: the factor differs from 1 by < 3e-9
    if not np.any(near):
        return power_w
    out = np.array(power_w, copy=True)
    s = IF_LIMITER_SMOOTHNESS
    out[near] = power_w[near] / (1.0 + (power_w[near] / full_scale_w) ** s) ** (1.0 / s)
    return out


@dataclass(frozen=True)
class TraceRecipe:
    """Everything the generator needs about one averaged acquisition."""

    n_traces: int
    n_points: int
    looks: int
    detector: Detector
    averaging_scale: AveragingScale
    kernel: FieldKernel | None
    full_scale_w: float | None = None


def generate_trace(
    rng: np.random.Generator,
    recipe: TraceRecipe,
    noise_w: np.ndarray,
    tone_w: np.ndarray | None = None,
    tone_scale: np.ndarray | None = None,
    *,
    exact: bool = False,
) -> np.ndarray:
    """One averaged trace in W per point.

    ``noise_w`` is the mean noise power per point, shape ``(P,)`` or ``(N, P)`` (a source that
    changes during the acquisition). ``tone_w`` holds each tone's power at each point
    ``(T, P)`` (already weighted by the RBW response); ``tone_scale`` an optional per-trace
    factor ``(N,)`` on the tones. ``exact`` draws every look even when there are many.
    """
    r = recipe
    noise_w = np.asarray(noise_w, dtype=float)
    if np.any(noise_w < 0) or not np.all(np.isfinite(noise_w)):
        raise InputError("noise_w", "must be finite and >= 0")
    steady = noise_w.ndim == 1 and tone_scale is None
    power_scale = (
        r.detector in (Detector.SAMPLE, Detector.RMS, Detector.AVERAGE)
        and r.averaging_scale is AveragingScale.POWER
    )
    total_looks = r.looks * r.n_traces
    fast = not exact and steady and not _may_clip(noise_w, tone_w, r.full_scale_w)
    if fast and power_scale and total_looks > EXACT_LOOKS:
        return _aggregate_power(rng, r, noise_w, tone_w, total_looks)
    if fast and r.n_traces >= AGGREGATE_MIN_TRACES:
        return _aggregate_on_scale(rng, r, noise_w, tone_w)
    return _trace_by_trace(rng, r, noise_w, tone_w, tone_scale, exact)


def _may_clip(noise_w: np.ndarray, tone_w: np.ndarray | None, full_scale_w: float | None) -> bool:
    if full_scale_w is None:
        return False
    peak = float(np.max(noise_w)) * 30.0  # exp(-30) ~ 1e-13 per look of exceeding
    if tone_w is not None and tone_w.size:
        peak += 4.0 * float(np.max(tone_w.sum(axis=0)))
    return peak > 0.01 * full_scale_w


def _aggregate_power(
    rng: np.random.Generator,
    r: TraceRecipe,
    noise_w: np.ndarray,
    tone_w: np.ndarray | None,
    looks: int,
) -> np.ndarray:
    z = correlated_normals(rng, 1, r.n_points, r.kernel)[0]
    out = noise_w * gamma_mean_wilson_hilferty(z, float(looks))
    if tone_w is not None and tone_w.size:
        t = tone_w.sum(axis=0)
        cross = rng.standard_normal(r.n_points) * np.sqrt(2.0 * noise_w * t / looks)
        out = np.maximum(out + t + cross, 0.0)
    return out


def _aggregate_on_scale(
    rng: np.random.Generator, r: TraceRecipe, noise_w: np.ndarray, tone_w: np.ndarray | None
) -> np.ndarray:
    """Averaged trace drawn from the exact distribution of the average (``sims/averaged.py``);
    the points a tone reaches are drawn look by look (tone x noise statistics), in windows."""
    cumulants = averaged_cumulants(r.detector, r.averaging_scale, r.looks, r.n_traces)
    z = _scale_correlated_normals(rng, r)
    out = noise_w * finish(cornish_fisher(z, cumulants), r.averaging_scale)
    if tone_w is None or not tone_w.size:
        return out
    tone_total = tone_w.sum(axis=0)
    out += tone_total  # below the threshold: the tone's mean power, far below the scatter
    reached = tone_total > TONE_NEGLIGIBLE * np.maximum(noise_w, 1e-300)
    if not np.any(reached):
        return out
    pad = _kernel_reach_points(r.kernel)
    for lo, hi in _windows(np.flatnonzero(reached), pad, r.n_points):
        sub = TraceRecipe(
            n_traces=r.n_traces,
            n_points=hi - lo,
            looks=r.looks,
            detector=r.detector,
            averaging_scale=r.averaging_scale,
            kernel=r.kernel,
            full_scale_w=r.full_scale_w,
        )
        out[lo:hi] = _trace_by_trace(rng, sub, noise_w[lo:hi], tone_w[:, lo:hi], None, False)
    return out


def _kernel_reach_points(kernel: FieldKernel | None) -> int:
    if kernel is None:
        return 0
    lo, hi = kernel.support
    return int(math.ceil((hi - lo) / kernel.spacing))


def _windows(cols: np.ndarray, pad: int, n_points: int) -> list[tuple[int, int]]:
    """Merged index windows [lo, hi) covering ``cols`` widened by ``pad`` on each side."""
    out: list[tuple[int, int]] = []
    for c in cols:
        lo, hi = max(0, int(c) - pad), min(n_points, int(c) + pad + 1)
        if out and lo <= out[-1][1]:
            out[-1] = (out[-1][0], max(out[-1][1], hi))
        else:
            out.append((lo, hi))
    return out


def _scale_correlated_normals(rng: np.random.Generator, r: TraceRecipe) -> np.ndarray:
    """One standard normal field correlated as ``g(D)`` is between points."""
    if r.kernel is None:
        return rng.standard_normal(r.n_points)
    corr = _scale_correlation_cached(r.kernel, r.detector, r.averaging_scale, r.looks)
    return normals_with_correlation(rng, 1, r.n_points, corr)[0]


@lru_cache(maxsize=128)
def _scale_correlation_cached(
    kernel: FieldKernel, detector: Detector, scale: AveragingScale, looks: int
) -> np.ndarray:
    return scale_correlation(kernel.power_correlation, detector, scale, looks)


def _tone_amplitudes(rng: np.random.Generator, tone_w: np.ndarray, n_looks: int) -> np.ndarray:
    phases = np.exp(2j * math.pi * rng.random((n_looks, tone_w.shape[0])))
    # an explicit sum: a BLAS call for these small shapes costs more than the arithmetic
    return np.einsum("lt,tp->lp", phases, np.sqrt(tone_w).astype(complex))


def _trace_by_trace(
    rng: np.random.Generator,
    r: TraceRecipe,
    noise_w: np.ndarray,
    tone_w: np.ndarray | None,
    tone_scale: np.ndarray | None,
    exact: bool,
) -> np.ndarray:
    large = r.looks > EXACT_LOOKS and not exact
    per_trace = r.n_points * (1 if large else r.looks)
    chunk = max(1, CHUNK_SAMPLES // max(per_trace, 1))
    acc = np.zeros(r.n_points)
    for start in range(0, r.n_traces, chunk):
        n = min(chunk, r.n_traces - start)
        mean = noise_w if noise_w.ndim == 1 else noise_w[start : start + n]
        scale = None if tone_scale is None else np.asarray(tone_scale)[start : start + n]
        if large:
            det = _detect_large(rng, r, n, mean, tone_w, scale)
        else:
            det = _detect_exact(rng, r, n, mean, tone_w, scale)
        acc += _accumulate(det, r.averaging_scale)
    return _finish(acc / r.n_traces, r.averaging_scale)


def _detect_exact(
    rng: np.random.Generator,
    r: TraceRecipe,
    n: int,
    mean: np.ndarray,
    tone_w: np.ndarray | None,
    scale: np.ndarray | None,
) -> np.ndarray:
    y = complex_looks(rng, n * r.looks, r.n_points, r.kernel).reshape(n, r.looks, r.n_points)
    amp = np.sqrt(mean)
    y *= amp[:, None, :] if amp.ndim == 2 else amp
    if tone_w is not None and tone_w.size:
        cols = np.flatnonzero(tone_w.max(axis=0) > 0.0)  # points the tones reach
        a = _tone_amplitudes(rng, tone_w[:, cols], n * r.looks).reshape(n, r.looks, cols.size)
        if scale is not None:
            a *= np.sqrt(scale)[:, None, None]
        y[:, :, cols] += a
    power = soft_clip(np.abs(y) ** 2, r.full_scale_w)
    return _combine(power, r.detector, r.averaging_scale)


def _detect_large(
    rng: np.random.Generator,
    r: TraceRecipe,
    n: int,
    mean: np.ndarray,
    tone_w: np.ndarray | None,
    scale: np.ndarray | None,
) -> np.ndarray:
    z = correlated_normals(rng, n, r.n_points, r.kernel)
    det = mean * _large_sample(z, r.looks, r.detector, r.averaging_scale)
    if tone_w is not None and tone_w.size:
        t = tone_w.sum(axis=0) * (1.0 if scale is None else np.asarray(scale)[:, None])
        det = det + t
    return soft_clip(det, r.full_scale_w)


def _accumulate(det: np.ndarray, scale: AveragingScale) -> np.ndarray:
    if scale is AveragingScale.POWER:
        return det.sum(axis=0)
    if scale is AveragingScale.LOG_POWER:
        return np.log(np.maximum(det, 1e-300)).sum(axis=0)
    return np.sqrt(det).sum(axis=0)


def _finish(mean_on_scale: np.ndarray, scale: AveragingScale) -> np.ndarray:
    if scale is AveragingScale.POWER:
        return mean_on_scale
    if scale is AveragingScale.LOG_POWER:
        return np.exp(mean_on_scale)
    return mean_on_scale**2

"""Resolution-bandwidth filter shapes: equivalent noise bandwidth and statistical bandwidth.

All ratios are relative to the filter's nominal -3 dB bandwidth ``B3`` (what an analyzer calls
its RBW). ``ENBW = integral |H|^2 df / |H(0)|^2`` sets density = band power / ENBW;
``B_stat = (integral |H|^2 df)^2 / integral |H|^4 df`` sets the number of independent samples
(radiometer equation). Formulas: Gaussian and synchronously tuned n-pole filters in closed form,
FFT windows numerically from their spectrum (scipy.signal.get_window).

The estimator also needs how strongly the detected noise powers of two trace points correlate
(:func:`frequency_power_correlation` between points of a trace, :func:`time_power_correlation`
between zero-span samples) and how far a CW line's skirt reaches (:func:`response_halfwidth_ratio`).
"""

from __future__ import annotations

import math
from enum import Enum
from functools import lru_cache

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

from noisebench.errors import InputError


class FilterKind(str, Enum):
    """The family of an RBW filter."""

    GAUSSIAN = "gaussian"
    SYNCHRONOUS = "synchronous"  # n synchronously tuned single-pole stages
    FFT = "fft"  # FFT analyzer: window shape sets the bin response


class RbwFilter(BaseModel):
    """Shape of an RBW filter. ``poles`` for synchronous filters, ``window`` for FFT mode."""

    model_config = ConfigDict(frozen=True)

    kind: FilterKind = FilterKind.GAUSSIAN
    poles: int | None = Field(default=None, ge=1, le=64)
    window: str | None = None

    @model_validator(mode="after")
    def _check(self) -> RbwFilter:
        if self.kind is FilterKind.SYNCHRONOUS and self.poles is None:
            raise InputError(
                "filter.poles",
                "a synchronous filter needs its number of poles",
                fix="set poles, e.g. 4",
            )
        if self.kind is FilterKind.FFT:
            if not self.window:
                raise InputError(
                    "filter.window",
                    "an FFT filter needs its window name",
                    fix="set window, e.g. 'hann'",
                )
            _window_ratios(self.window)  # validates the name
        return self

    @property
    def enbw_ratio(self) -> float:
        """ENBW / B3 (dimensionless)."""
        return enbw_ratio(self)

    @property
    def stat_bw_ratio(self) -> float:
        """B_stat / B3 (dimensionless)."""
        return stat_bw_ratio(self)

    def enbw_hz(self, rbw_hz: float) -> float:
        """Equivalent noise bandwidth in Hz for a nominal -3 dB bandwidth ``rbw_hz``."""
        return self.enbw_ratio * float(rbw_hz)

    def stat_bw_hz(self, rbw_hz: float) -> float:
        """Statistical (radiometer) bandwidth in Hz for a nominal -3 dB bandwidth ``rbw_hz``."""
        return self.stat_bw_ratio * float(rbw_hz)

    def power_response(self, offset_hz: np.ndarray, rbw_hz: float) -> np.ndarray:
        """Power response |H(f)|^2 (peak 1) at frequency offsets ``offset_hz`` from centre."""
        x = np.asarray(offset_hz, dtype=float) / float(rbw_hz)
        if self.kind is FilterKind.GAUSSIAN:
            return np.exp(-4.0 * math.log(2.0) * x**2)
        if self.kind is FilterKind.SYNCHRONOUS:
            n = int(self.poles or 1)
            b = 1.0 / (2.0 * math.sqrt(2.0 ** (1.0 / n) - 1.0))  # per-stage bw in units of B3
            return (1.0 + (x / b) ** 2) ** (-n)
        return _window_response(str(self.window), x)


GAUSSIAN = RbwFilter(kind=FilterKind.GAUSSIAN)


def gaussian_enbw_ratio() -> float:
    """ENBW/B3 of a Gaussian filter: sqrt(pi / (4 ln 2)) = 1.064467."""
    return math.sqrt(math.pi / (4.0 * math.log(2.0)))


def synchronous_enbw_ratio(poles: int) -> float:
    """ENBW/B3 of ``poles`` synchronously tuned single-pole stages (narrow-band model)."""
    n = int(poles)
    if n < 1:
        raise InputError("poles", "must be >= 1", value=poles)
    return (
        math.sqrt(math.pi)
        * math.gamma(n - 0.5)
        / math.gamma(n)
        / (2.0 * math.sqrt(2.0 ** (1.0 / n) - 1.0))
    )


def synchronous_stat_bw_ratio(poles: int) -> float:
    """B_stat/B3 of ``poles`` synchronously tuned single-pole stages."""
    n = int(poles)
    if n < 1:
        raise InputError("poles", "must be >= 1", value=poles)
    b = 1.0 / (2.0 * math.sqrt(2.0 ** (1.0 / n) - 1.0))
    i2 = b * math.sqrt(math.pi) * math.gamma(n - 0.5) / math.gamma(n)  # integral (1+u^2)^-n
    i4 = b * math.sqrt(math.pi) * math.gamma(2 * n - 0.5) / math.gamma(2 * n)
    return i2**2 / i4


@lru_cache(maxsize=64)
def _window_ratios(window: str) -> tuple[float, float, float]:
    """(ENBW/B3, Bstat/B3, B3 in bins) for an FFT window, from its zero-padded spectrum."""
    from scipy.signal import get_window

    try:
        w = np.asarray(get_window(window, 1024, fftbins=True), dtype=float)
    except (ValueError, TypeError) as exc:
        raise InputError(
            "filter.window",
            f"unknown FFT window {window!r}",
            fix="use a scipy.signal window name such as 'hann', 'flattop', 'blackmanharris'",
        ) from exc
    pad = 64
    spec = np.abs(np.fft.fft(w, len(w) * pad)) ** 2
    spec /= spec[0]
    # -3 dB half-width in bins: first crossing below 0.5
    below = np.nonzero(spec[: len(w) * pad // 2] < 0.5)[0][0]
    # linear interpolation between below-1 and below
    y0, y1 = spec[below - 1], spec[below]
    half = (below - 1 + (y0 - 0.5) / (y0 - y1)) / pad
    b3_bins = 2.0 * half
    enbw_bins = len(w) * np.sum(w**2) / np.sum(w) ** 2
    # B_stat in bins = (sum|H|^2)^2 / sum|H|^4 over the continuous response (per-bin units)
    df = 1.0 / pad
    bstat_bins = (np.sum(spec) * df) ** 2 / (np.sum(spec**2) * df)
    return enbw_bins / b3_bins, bstat_bins / b3_bins, b3_bins


def _window_response(window: str, x: np.ndarray) -> np.ndarray:
    from scipy.signal import get_window

    _, _, b3_bins = _window_ratios(window)
    w = np.asarray(get_window(window, 1024, fftbins=True), dtype=float)
    pad = 64
    spec = np.abs(np.fft.fft(w, len(w) * pad)) ** 2
    spec = np.fft.fftshift(spec / spec[0])
    bins = (np.arange(len(spec)) - len(spec) // 2) / pad
    return np.interp(np.asarray(x) * b3_bins, bins, spec, left=0.0, right=0.0)


def window_b3_bins(window: str) -> float:
    """-3 dB bandwidth of an FFT window's bin response, in bins (the RBW of one bin)."""
    return _window_ratios(window)[2]


def window_enbw_bins(window: str, n: int = 1024) -> float:
    """ENBW of an FFT window in bins: N * sum(w^2) / sum(w)^2 (Harris 1978)."""
    from scipy.signal import get_window

    w = np.asarray(get_window(window, n, fftbins=True), dtype=float)
    return float(n * np.sum(w**2) / np.sum(w) ** 2)


def enbw_ratio(f: RbwFilter) -> float:
    """ENBW / B3 for any supported filter shape."""
    if f.kind is FilterKind.GAUSSIAN:
        return gaussian_enbw_ratio()
    if f.kind is FilterKind.SYNCHRONOUS:
        return synchronous_enbw_ratio(int(f.poles or 1))
    return _window_ratios(str(f.window))[0]


def stat_bw_ratio(f: RbwFilter) -> float:
    """B_stat / B3 for any supported filter shape (Gaussian: sqrt(2) * 1.064467)."""
    if f.kind is FilterKind.GAUSSIAN:
        return math.sqrt(2.0) * gaussian_enbw_ratio()
    if f.kind is FilterKind.SYNCHRONOUS:
        return synchronous_stat_bw_ratio(int(f.poles or 1))
    return _window_ratios(str(f.window))[1]


# --- correlation of detected noise power between trace points --------------------------------
#
# Model ("filter bank"): every trace point is the squared envelope of white Gaussian noise seen
# through the same RBW filter, tuned to the point's frequency (non-zero span) or sampled at the
# point's time (zero span). For jointly complex-Gaussian outputs the correlation coefficient of
# the two detected powers is |R|^2, R being the correlation coefficient of the complex outputs:
#   frequency offset D:  R(D)   = integral H(f) H*(f - D) df / integral |H|^2
#   time lag tau:        r(tau) = integral |H(f)|^2 exp(j 2 pi f tau) df / integral |H|^2
# r depends on |H| only; integral |r(tau)|^2 dtau = 1 / B_stat exactly (radiometer equation).
# R depends on the phase of H. We take the zero-phase amplitude response |H|: by the triangle
# inequality |R| <= integral |H(f)||H(f - D)| df / integral |H|^2, so this is exact for linear-phase
# shapes (Gaussian, symmetric FFT windows up to sidelobe signs) and an upper bound for any other
# phase, i.e. never optimistic about the number of independent points. A swept analyzer
# decorrelates neighbours further (they are also measured at different times).


def frequency_power_correlation(f: RbwFilter, offset_hz: np.ndarray, rbw_hz: float) -> np.ndarray:
    """Correlation coefficient (0..1) of noise powers of two trace points ``offset_hz`` apart.

    Squared autocorrelation of the amplitude response |H| (see the model above). Gaussian in
    closed form: exp(-2 ln2 (D/B3)^2); other shapes from a cached numerical table.
    """
    x = np.abs(np.asarray(offset_hz, dtype=float)) / float(rbw_hz)
    if f.kind is FilterKind.GAUSSIAN:
        return np.exp(-2.0 * math.log(2.0) * x**2)
    grid, table = _amplitude_autocorrelation(f)
    return np.interp(x, grid, table, right=0.0)


def time_power_correlation(f: RbwFilter, lag_s: np.ndarray, rbw_hz: float) -> np.ndarray:
    """Correlation coefficient of noise powers sampled ``lag_s`` apart at one frequency (0..1).

    |r(tau)|^2 with r the normalised Fourier transform of |H|^2. Gaussian:
    exp(-pi^2 B3^2 tau^2 / (2 ln 2)); synchronous: squared Matern function of order n - 1/2.
    FFT-mode filters have no continuous time response: InputError.
    """
    tau = np.abs(np.asarray(lag_s, dtype=float)) * float(rbw_hz)  # in units of 1/B3
    if f.kind is FilterKind.GAUSSIAN:
        return np.exp(-(math.pi**2) * tau**2 / (2.0 * math.log(2.0)))
    if f.kind is FilterKind.SYNCHRONOUS:
        from scipy.special import gamma as gamma_fn
        from scipy.special import kv

        n = int(f.poles or 1)
        nu = n - 0.5
        z = 2.0 * math.pi * _stage_bw_ratio(n) * tau
        with np.errstate(invalid="ignore", over="ignore"):
            r = 2.0 ** (1.0 - nu) / gamma_fn(nu) * z**nu * kv(nu, z)
        r = np.where(z < 1e-12, 1.0, np.nan_to_num(r, nan=0.0))
        return np.clip(r, 0.0, 1.0) ** 2
    raise InputError(
        "settings.rbw_filter",
        "an FFT-window filter has no zero-span time response",
        fix="use a swept (Gaussian or synchronous) RBW filter for zero span",
    )


def correlation_bw_ratio(f: RbwFilter) -> float:
    """Integral of :func:`frequency_power_correlation` over the offset, in units of B3.

    Equals B_stat / B3 for a Gaussian filter; the number of independent points in a band W
    of densely spaced points is W / (ratio * B3).
    """
    if f.kind is FilterKind.GAUSSIAN:
        return math.sqrt(math.pi / (2.0 * math.log(2.0)))
    grid, table = _amplitude_autocorrelation(f)
    step = grid[1] - grid[0]
    return float(2.0 * step * (np.sum(table) - 0.5 * table[0]))


def response_halfwidth_ratio(f: RbwFilter, level: float) -> float:
    """Largest offset, in units of B3, at which the power response is still >= ``level``.

    Used to size the exclusion around a narrowband spur: a CW line of power A shows at offset D
    as A |H(D)|^2, so beyond this half-width it contributes less than ``level`` * A.
    """
    level = float(level)
    if not 0.0 < level:
        raise InputError("level", "must be > 0", value=level)
    if level >= 1.0:
        return 0.0
    if f.kind is FilterKind.GAUSSIAN:
        return math.sqrt(math.log(1.0 / level) / (4.0 * math.log(2.0)))
    if f.kind is FilterKind.SYNCHRONOUS:
        n = int(f.poles or 1)
        return _stage_bw_ratio(n) * math.sqrt(level ** (-1.0 / n) - 1.0)
    x, spec = _window_half_spectrum(str(f.window))
    above = np.nonzero(spec >= level)[0]
    return float(x[above[-1] + 1]) if above[-1] + 1 < len(x) else float(x[-1])


def _stage_bw_ratio(poles: int) -> float:
    """Bandwidth of one of ``poles`` synchronous stages (its f_c), in units of the overall B3."""
    return 1.0 / (2.0 * math.sqrt(2.0 ** (1.0 / poles) - 1.0))


_CORR_STEP = 1.0 / 64.0  # grid step of the correlation table, in B3
_CORR_HALF_SPAN = 256.0  # half-span of the grid, in B3


@lru_cache(maxsize=64)
def _amplitude_autocorrelation(f: RbwFilter) -> tuple[np.ndarray, np.ndarray]:
    """(offset in B3, squared normalised autocorrelation of |H|) for offsets >= 0."""
    x = np.arange(-_CORR_HALF_SPAN, _CORR_HALF_SPAN + _CORR_STEP / 2, _CORR_STEP)
    amp = np.sqrt(np.maximum(f.power_response(x, 1.0), 0.0))
    nfft = 1 << int(math.ceil(math.log2(2 * x.size)))
    spec = np.fft.rfft(amp, nfft)
    acf = np.fft.irfft(np.abs(spec) ** 2, nfft)[: x.size]
    acf = np.maximum(acf / acf[0], 0.0)
    return np.arange(x.size) * _CORR_STEP, acf**2


@lru_cache(maxsize=64)
def _window_half_spectrum(window: str) -> tuple[np.ndarray, np.ndarray]:
    """(offset in B3 units, power response) on the positive half of the window's spectrum."""
    from scipy.signal import get_window

    _, _, b3_bins = _window_ratios(window)
    w = np.asarray(get_window(window, 1024, fftbins=True), dtype=float)
    pad = 64
    spec = np.abs(np.fft.rfft(w, len(w) * pad)) ** 2
    spec = spec / spec[0]
    return np.arange(spec.size) / pad / b3_bins, spec

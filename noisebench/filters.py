"""Resolution-bandwidth filter shapes: equivalent noise bandwidth and statistical bandwidth.

All ratios are relative to the filter's nominal -3 dB bandwidth ``B3`` (what an analyzer calls
its RBW). ``ENBW = integral |H|^2 df / |H(0)|^2`` sets density = band power / ENBW;
``B_stat = (integral |H|^2 df)^2 / integral |H|^4 df`` sets the number of independent samples
(radiometer equation). Formulas: Gaussian and synchronously tuned n-pole filters in closed form,
FFT windows numerically from their spectrum (scipy.signal.get_window).
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
            raise InputError("filter.poles", "a synchronous filter needs its number of poles",
                             fix="set poles, e.g. 4")
        if self.kind is FilterKind.FFT:
            if not self.window:
                raise InputError("filter.window", "an FFT filter needs its window name",
                                 fix="set window, e.g. 'hann'")
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
    return (math.sqrt(math.pi) * math.gamma(n - 0.5) / math.gamma(n)
            / (2.0 * math.sqrt(2.0 ** (1.0 / n) - 1.0)))


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
        raise InputError("filter.window", f"unknown FFT window {window!r}",
                         fix="use a scipy.signal window name such as 'hann', 'flattop', "
                             "'blackmanharris'") from exc
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

"""The simulated analyzer's RBW filter shapes, worked out here independently of the estimator.

The estimator (``science/filters.py``) divides a measured band power by the filter's equivalent
noise bandwidth and weighs trace points by their statistical bandwidth. If the simulator used the
same functions to *make* its traces, an error in them would cancel and no test would see it. So
the simulator keeps its own copy of the physics of the filter, computed a different way: the
closed forms of ``science/filters.py`` are replaced here by numerical integration of the power
response ``|H(x)|^2`` (``x`` = offset / B3, peak 1), and FFT windows are evaluated from their
discrete-time Fourier transform. ``tests/test_sim_independence.py`` compares the two sets, so the
two derivations check each other.

* Gaussian: ``|H|^2 = 2^(-4 x^2)`` (half power at ``x = +/- 1/2`` by the definition of B3).
* ``n`` synchronously tuned single poles: ``|H|^2 = (1 + (x/b)^2)^-n``, with the stage width
  ``b`` set by ``|H(1/2)|^2 = 1/2``: ``b = 1 / (2 sqrt(2^(1/n) - 1))``.
* FFT window ``w`` (scipy.signal.get_window, periodic): a bin's response is
  ``|W(nu)|^2 / |W(0)|^2``, ``nu`` in bins; B3 in bins is found by root finding on the transform.

ENBW = ``integral |H|^2 dx`` and B_stat = ``(integral |H|^2 dx)^2 / integral |H|^4 dx``, both in
units of B3 (the radiometer equation's statistical bandwidth; Dicke 1946).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import integrate, optimize

from noisebench.bench.acquisition import FilterKind, RbwFilter
from noisebench.errors import InputError

WINDOW_LENGTH = 512  # samples of the FFT window evaluated here
WINDOW_GRID_PER_BIN = 128  # zero padding of the window's spectrum (grid step 1/128 bin)


def stage_width(poles: int) -> float:
    """Width ``b`` of one of ``poles`` synchronous single-pole stages, in units of B3."""
    return 0.5 / math.sqrt(2.0 ** (1.0 / poles) - 1.0)


@lru_cache(maxsize=32)
def _window(name: str) -> np.ndarray:
    from scipy.signal import get_window

    try:
        return np.asarray(get_window(name, WINDOW_LENGTH, fftbins=True), dtype=float)
    except (ValueError, TypeError) as exc:
        raise InputError(
            "rbw_filter.window", f"unknown FFT window {name!r}", fix="use a scipy.signal window"
        ) from exc


def _window_dtft_power(name: str, nu_bins: float) -> float:
    """``|W(nu)|^2 / |W(0)|^2`` of the window at ``nu`` bins, straight from its transform."""
    w = _window(name)
    n = np.arange(w.size)
    value = np.sum(w * np.exp(-2j * math.pi * nu_bins * n / w.size))
    return float(abs(value) ** 2 / np.sum(w) ** 2)


@lru_cache(maxsize=32)
def window_b3_bins(name: str) -> float:
    """-3 dB width of the window's bin response, in bins (root of ``|W|^2 = 1/2``)."""
    nu, spec = _window_spectrum(name)
    positive = nu >= 0.0
    nu, spec = nu[positive], spec[positive]
    first = int(np.nonzero(spec < 0.5)[0][0])  # the grid cell holding the first crossing
    half = optimize.brentq(
        lambda x: _window_dtft_power(name, x) - 0.5, nu[first - 1], nu[first], xtol=1e-13
    )
    return 2.0 * float(half)


@lru_cache(maxsize=32)
def _window_spectrum(name: str) -> tuple[np.ndarray, np.ndarray]:
    """(offset in bins, ``|W|^2 / |W(0)|^2``) over one full period of the zero-padded spectrum."""
    w = _window(name)
    size = w.size * WINDOW_GRID_PER_BIN
    spec = np.abs(np.fft.fft(w, size)) ** 2
    spec = np.fft.fftshift(spec / spec[0])
    nu = (np.arange(size) - size // 2) / WINDOW_GRID_PER_BIN
    return nu, spec


def power_response(filt: RbwFilter, x: np.ndarray | float) -> np.ndarray:
    """``|H|^2`` (peak 1) at offsets ``x`` in units of the filter's -3 dB bandwidth."""
    x = np.asarray(x, dtype=float)
    if filt.kind is FilterKind.GAUSSIAN:
        return np.power(2.0, -4.0 * x**2)
    if filt.kind is FilterKind.SYNCHRONOUS:
        n = int(filt.poles or 1)
        return (1.0 + (x / stage_width(n)) ** 2) ** (-n)
    name = str(filt.window)
    nu, spec = _window_spectrum(name)
    return np.interp(x * window_b3_bins(name), nu, spec, left=0.0, right=0.0)


@lru_cache(maxsize=64)
def _integrals(filt: RbwFilter) -> tuple[float, float]:
    """(integral |H|^2 dx, integral |H|^4 dx), x in B3 units."""
    if filt.kind is FilterKind.FFT:
        name = str(filt.window)
        nu, spec = _window_spectrum(name)
        step = 1.0 / WINDOW_GRID_PER_BIN / window_b3_bins(name)  # one full period: Parseval
        return float(np.sum(spec) * step), float(np.sum(spec**2) * step)

    def moment(power: int) -> float:
        value, _ = integrate.quad(
            lambda x: float(power_response(filt, x)) ** power, 0.0, np.inf, limit=400
        )
        return 2.0 * value

    return moment(1), moment(2)


def enbw_ratio(filt: RbwFilter) -> float:
    """Equivalent noise bandwidth over B3 (dimensionless)."""
    return _integrals(filt)[0]


def stat_bw_ratio(filt: RbwFilter) -> float:
    """Statistical (radiometer) bandwidth over B3 (dimensionless)."""
    i2, i4 = _integrals(filt)
    return i2 * i2 / i4


def enbw_hz(filt: RbwFilter, rbw_hz: float) -> float:
    """Equivalent noise bandwidth, Hz, of the filter at a -3 dB bandwidth ``rbw_hz``."""
    return enbw_ratio(filt) * float(rbw_hz)


def stat_bw_hz(filt: RbwFilter, rbw_hz: float) -> float:
    """Statistical bandwidth, Hz, of the filter at a -3 dB bandwidth ``rbw_hz``."""
    return stat_bw_ratio(filt) * float(rbw_hz)

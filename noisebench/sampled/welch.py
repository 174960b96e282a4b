"""Welch power spectral density of sample blocks, and what its statistics are.

Pure functions, arrays in and out, SI units. A block of samples (full-scale units) becomes a
density in full-scale units squared per Hz with :func:`scipy.signal.welch`; multiplying by the
receiver's scale (W per full-scale unit squared) gives W/Hz at the reference plane.

Statistics (what the estimator needs):

* **ENBW of the window** in bins: ``N sum(w^2) / (sum w)^2`` (Harris 1978, "On the use of
  windows for harmonic analysis with the discrete Fourier transform", Proc. IEEE 66(1) 51-83).
  ``scipy.signal.welch(scaling="density")`` divides by ``fs sum(w^2)``, i.e. it already
  normalises by the ENBW, so its output is a density.
* **Independent samples per bin.** One windowed periodogram bin of Gaussian noise is an
  exponential power (chi-square with 2 degrees of freedom). ``K`` segments of length ``L``
  shifted by ``D`` overlap, so their periodograms are correlated; Welch (1967, "The use of fast
  Fourier transform for the estimation of power spectra: a method based on time averaging over
  short, modified periodograms", IEEE Trans. Audio Electroacoust. AU-15(2) 70-73) gives the
  variance of the average of a locally flat spectrum as::

      var / mean^2 = (1/K) [1 + 2 sum_{j=1}^{K-1} (1 - j/K) rho(j)],
      rho(j) = [sum_n w(n) w(n + jD)]^2 / [sum_n w(n)^2]^2

  so the equivalent number of independent exponential samples is ``K_eff = mean^2 / var`` and
  the equivalent degrees of freedom ``2 K_eff``. ``tests/test_sampled_welch.py`` checks it
  against a direct simulation over seeds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import fft as sp_fft
from scipy import signal

from noisebench.errors import InputError
from noisebench.science.filters import FilterKind, RbwFilter, window_b3_bins
from noisebench.units import format_frequency

#: windows the sampled analyzer offers, with their default segment overlap (fraction of a
#: segment). Overlaps are common practice: about where more overlap stops adding independent
#: samples for the window's shape (Harris 1978 tabulates the overlap correlation).
WINDOW_OVERLAP: dict[str, float] = {
    "hann": 0.5,
    "hamming": 0.5,
    "blackman": 2.0 / 3.0,
    "blackmanharris": 2.0 / 3.0,
    "nuttall": 2.0 / 3.0,
    "flattop": 0.75,
}
SUPPORTED_WINDOWS = tuple(WINDOW_OVERLAP)
DEFAULT_WINDOW = "hann"
MIN_SEGMENT = 16
MAX_SEGMENT = 1 << 22


def check_window(window: str) -> str:
    """The window name, lower case, if supported; InputError naming the choices otherwise."""
    name = str(window).strip().lower()
    if name not in WINDOW_OVERLAP:
        raise InputError(
            "window",
            f"unknown or unsupported window {window!r}",
            fix=f"use one of {', '.join(SUPPORTED_WINDOWS)}",
        )
    return name


def window_values(window: str, length: int) -> np.ndarray:
    """The periodic window of ``length`` samples as ``scipy.signal.welch`` uses it."""
    return np.asarray(signal.get_window(check_window(window), int(length)), dtype=float)


def enbw_bins(window: str, length: int) -> float:
    """Equivalent noise bandwidth of the window in bins: N sum(w^2) / (sum w)^2 (Harris 1978)."""
    w = window_values(window, length)
    return float(w.size * np.sum(w**2) / np.sum(w) ** 2)


@lru_cache(maxsize=32)
def b3_bins(window: str) -> float:
    """-3 dB bandwidth of the window's bin response, in bins (from its zero-padded spectrum)."""
    return float(window_b3_bins(check_window(window)))


def overlap_correlation(window: str, length: int, step: int, lags: int) -> np.ndarray:
    """Welch's rho(j), j = 1..lags: squared normalised overlap of the window with itself
    shifted by j * step samples."""
    w = window_values(window, length)
    energy = float(np.sum(w**2))
    out = np.zeros(max(int(lags), 0))
    for j in range(1, out.size + 1):
        shift = j * int(step)
        if shift >= w.size:
            break
        out[j - 1] = (float(np.dot(w[: w.size - shift], w[shift:])) / energy) ** 2
    return out


def welch_relative_variance(window: str, length: int, step: int, segments: int) -> float:
    """var / mean^2 of a Welch average of ``segments`` periodograms (Welch 1967, flat spectrum)."""
    k = int(segments)
    if k < 1:
        raise InputError("segments", "must be >= 1", value=segments)
    rho = overlap_correlation(window, length, step, k - 1)
    j = np.arange(1, k, dtype=float)
    return float((1.0 + 2.0 * np.sum((1.0 - j / k) * rho)) / k)


def equivalent_samples(window: str, length: int, step: int, segments: int) -> float:
    """Equivalent independent exponential samples per bin, ``K_eff`` (EDOF = 2 K_eff)."""
    return 1.0 / welch_relative_variance(window, length, step, segments)


@dataclass(frozen=True)
class SegmentPlan:
    """How a capture is cut into Welch segments.

    ``length`` samples per segment, ``step`` samples between segment starts (``length - step``
    overlap), ``segments`` segments, so a capture holds ``samples`` samples.
    """

    window: str
    sample_rate_hz: float
    length: int
    step: int
    segments: int

    @property
    def overlap(self) -> int:
        return self.length - self.step

    @property
    def samples(self) -> int:
        return self.length + (self.segments - 1) * self.step

    @property
    def bin_hz(self) -> float:
        """Bin spacing, Hz."""
        return self.sample_rate_hz / self.length

    @property
    def rbw_hz(self) -> float:
        """-3 dB bandwidth of one bin, Hz (what an analyzer calls its RBW)."""
        return b3_bins(self.window) * self.bin_hz

    @property
    def enbw_hz(self) -> float:
        """Equivalent noise bandwidth of one bin, Hz."""
        return enbw_bins(self.window, self.length) * self.bin_hz

    @property
    def rbw_filter(self) -> RbwFilter:
        return RbwFilter(kind=FilterKind.FFT, window=self.window)

    @property
    def equivalent_samples(self) -> float:
        """``K_eff``: independent exponential samples per bin after the overlap loss."""
        return equivalent_samples(self.window, self.length, self.step, self.segments)

    @property
    def duration_s(self) -> float:
        return self.samples / self.sample_rate_hz

    def with_segments(self, segments: int) -> SegmentPlan:
        return SegmentPlan(self.window, self.sample_rate_hz, self.length, self.step, segments)

    def segments_in(self, samples: int) -> int:
        """Whole segments a block of ``samples`` samples holds (0 if shorter than one)."""
        if samples < self.length:
            return 0
        return 1 + (int(samples) - self.length) // self.step


def plan_segments(
    sample_rate_hz: float,
    rbw_hz: float,
    segments: int,
    *,
    window: str = DEFAULT_WINDOW,
    overlap: float | None = None,
) -> SegmentPlan:
    """Segment length for a requested RBW (-3 dB bin width), rounded up to a fast FFT length
    (so the applied RBW is at most the request), and the overlap of the window."""
    name = check_window(window)
    fs, rbw = float(sample_rate_hz), float(rbw_hz)
    if not (math.isfinite(fs) and fs > 0):
        raise InputError("sample_rate_hz", f"must be a finite rate > 0 (got {sample_rate_hz!r})")
    if not (math.isfinite(rbw) and rbw > 0):
        raise InputError("rbw_hz", f"must be a finite bandwidth > 0 (got {rbw_hz!r})")
    wanted = math.ceil(b3_bins(name) * fs / rbw)
    length = int(sp_fft.next_fast_len(max(wanted, MIN_SEGMENT)))
    if length > MAX_SEGMENT:
        raise InputError(
            "acquisition.rbw_hz",
            f"{format_frequency(rbw)} needs segments of {length} samples at {fs:g} samples/s "
            f"(at most {MAX_SEGMENT})",
            fix="raise rbw_hz",
        )
    frac = WINDOW_OVERLAP[name] if overlap is None else float(overlap)
    if not 0.0 <= frac < 1.0:
        raise InputError("overlap", f"must be in [0, 1) (got {overlap!r})")
    step = max(1, int(round(length * (1.0 - frac))))
    return SegmentPlan(name, fs, length, step, max(1, int(segments)))


def welch_density(samples: np.ndarray, plan: SegmentPlan) -> tuple[np.ndarray, np.ndarray, int]:
    """(offset frequencies Hz ascending, density in full-scale^2/Hz, segments used).

    Complex samples give a two-sided spectrum about 0 Hz (the capture centre); real samples a
    one-sided spectrum 0..fs/2 whose integral is the mean square. Uses the whole segments the
    block holds; a block shorter than one segment is refused.
    """
    x = np.asarray(samples)
    if x.ndim != 1:
        raise InputError("samples", f"must be one-dimensional (got shape {x.shape})")
    used = plan.segments_in(x.size)
    if used < 1:
        raise InputError(
            "samples",
            f"{x.size} samples are fewer than one segment of {plan.length}",
            fix="capture more samples or raise the RBW",
        )
    x = x[: plan.length + (used - 1) * plan.step]
    is_complex = np.iscomplexobj(x)
    freqs, psd = signal.welch(
        x,
        fs=plan.sample_rate_hz,
        window=plan.window,
        nperseg=plan.length,
        noverlap=plan.overlap,
        detrend=False,
        return_onesided=not is_complex,
        scaling="density",
        average="mean",
    )
    if is_complex:
        freqs = np.fft.fftshift(freqs)
        psd = np.fft.fftshift(psd)
    return np.asarray(freqs, dtype=float), np.asarray(psd, dtype=float), used

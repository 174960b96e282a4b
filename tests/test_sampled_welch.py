"""Welch density of sample blocks: window ENBW, overlap correlation, equivalent samples.

References: Harris 1978 (Proc. IEEE 66(1) 51-83: ENBW = N sum w^2 / (sum w)^2, Table 1 values
and overlap correlations); Welch 1967 (IEEE Trans. Audio Electroacoust. AU-15(2) 70-73: the
variance of an average of overlapped, windowed periodograms); scipy.signal window definitions.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from noisebench.errors import InputError
from noisebench.sampled import welch

SCIPY_WINDOWS = {
    "hann": signal.windows.hann,
    "hamming": signal.windows.hamming,
    "blackman": signal.windows.blackman,
    "blackmanharris": signal.windows.blackmanharris,
    "nuttall": signal.windows.nuttall,
    "flattop": signal.windows.flattop,
}


def test_every_supported_window_is_checked_here():
    assert set(SCIPY_WINDOWS) == set(welch.SUPPORTED_WINDOWS)


@pytest.mark.parametrize("name", sorted(SCIPY_WINDOWS))
@pytest.mark.parametrize("length", [64, 147, 1000, 4096])
def test_enbw_equals_sum_of_squares_over_square_of_sum(name, length):
    # reference: Harris 1978 eq. for ENBW; window values from scipy.signal.windows (periodic,
    # as scipy.signal.welch uses them)
    w = SCIPY_WINDOWS[name](length, sym=False)
    expected = length * np.sum(w**2) / np.sum(w) ** 2
    assert welch.enbw_bins(name, length) == pytest.approx(expected, rel=1e-12)


# reference: Harris 1978, Table 1, ENBW in bins (from memory): rectangle 1.00, Hanning 1.50,
# Hamming 1.36, exact Blackman 1.73 (scipy's "blackman" is the classic a0 = 0.42 form: 1.727),
# 4-term Blackman-Harris (-92 dB) 2.00
@pytest.mark.parametrize(
    "name, harris",
    [("hann", 1.50), ("hamming", 1.36), ("blackman", 1.73), ("blackmanharris", 2.00)],
)
def test_enbw_matches_harris_table(name, harris):
    assert welch.enbw_bins(name, 4096) == pytest.approx(harris, abs=0.006)


def test_hann_half_overlap_correlation_matches_harris():
    # reference: Harris 1978 Table 1 (from memory): Hanning overlap correlation 16.7 % at 50 %
    # overlap; Welch's rho is its square
    rho = welch.overlap_correlation("hann", 1024, 512, 1)
    assert math.sqrt(rho[0]) == pytest.approx(1.0 / 6.0, abs=1e-3)


def test_no_overlap_gives_k_independent_samples():
    for name in welch.SUPPORTED_WINDOWS:
        assert welch.equivalent_samples(name, 256, 256, 37) == pytest.approx(37.0, rel=1e-12)


def test_welch_formula_by_hand_for_three_segments():
    # Welch 1967: var/mean^2 = (1/K)[1 + 2 sum_j (1 - j/K) rho(j)]
    w = signal.windows.hann(100, sym=False)
    e = np.sum(w**2)
    rho1 = (np.dot(w[:50], w[50:]) / e) ** 2
    expected = (1 + 2 * ((1 - 1 / 3) * rho1)) / 3  # rho(2) = 0 (no overlap at 2 steps)
    assert welch.welch_relative_variance("hann", 100, 50, 3) == pytest.approx(expected, rel=1e-12)


def test_segment_plan_meets_the_requested_rbw():
    for name in welch.SUPPORTED_WINDOWS:
        plan = welch.plan_segments(2e6, 10e3, 50, window=name)
        assert plan.rbw_hz <= 10e3 * (1 + 1e-12)
        assert plan.rbw_hz > 0.9 * 10e3
        assert plan.enbw_hz == pytest.approx(welch.enbw_bins(name, plan.length) * 2e6 / plan.length)
        assert plan.samples == plan.length + 49 * plan.step


def test_unknown_window_is_one_clear_error():
    with pytest.raises(InputError, match="window: unknown or unsupported window 'kaiser'"):
        welch.plan_segments(1e6, 1e3, 1, window="kaiser")


def _simulated_relative_variance(name, length, step, segments, seeds, complex_samples, rng):
    plan = welch.SegmentPlan(name, 1.0, length, step, segments)
    n = plan.samples
    if complex_samples:
        x = (rng.standard_normal((seeds, n)) + 1j * rng.standard_normal((seeds, n))) / math.sqrt(2)
    else:
        x = rng.standard_normal((seeds, n))
    _, psd = signal.welch(
        x,
        fs=1.0,
        window=name,
        nperseg=length,
        noverlap=length - step,
        detrend=False,
        return_onesided=not complex_samples,
        scaling="density",
        axis=-1,
    )
    # keep bins far from DC / Nyquist (real: those bins are chi-square with 1 degree of
    # freedom) and every 8th bin so the kept bins are independent of each other
    bins = np.arange(8, psd.shape[1] - 8, 8)
    values = psd[:, bins]
    rel = values.var(axis=0, ddof=1) / values.mean(axis=0) ** 2
    return float(rel.mean()), values.size


@pytest.mark.parametrize("name", welch.SUPPORTED_WINDOWS)
@pytest.mark.parametrize("overlap", [None, 0.75])
def test_equivalent_samples_against_simulation(name, overlap):
    # reference: Welch 1967 formula vs a direct simulation over seeds (fixed seed)
    plan = welch.plan_segments(
        1.0, 1.0 / 128 * welch.b3_bins(name), 12, window=name, overlap=overlap
    )
    predicted = welch.welch_relative_variance(name, plan.length, plan.step, plan.segments)
    rng = np.random.default_rng(16)
    seeds = 600
    observed, count = _simulated_relative_variance(
        name, plan.length, plan.step, plan.segments, seeds, True, rng
    )
    # sampling error of a relative variance of gamma(a) data, a = 1 / predicted, averaged over
    # `count / seeds` independent bins of `seeds` values: Var(s^2)/sigma^4 ~ (2 + 6/a)/seeds
    a = 1.0 / predicted
    sigma = predicted * math.sqrt((2.0 + 6.0 / a) / seeds / (count / seeds))
    assert abs(observed - predicted) < 5 * sigma, (observed, predicted, sigma)
    # and the overlap really costs something the formula sees: more than K / (1 + small)
    assert predicted > 1.0 / plan.segments


def test_equivalent_samples_real_samples_against_simulation():
    name = "hann"
    plan = welch.SegmentPlan(name, 1.0, 256, 128, 20)
    predicted = welch.welch_relative_variance(name, 256, 128, 20)
    observed, count = _simulated_relative_variance(
        name, 256, 128, 20, 500, False, np.random.default_rng(7)
    )
    a = 1.0 / predicted
    sigma = predicted * math.sqrt((2.0 + 6.0 / a) / count)
    assert abs(observed - predicted) < 5 * sigma, (observed, predicted, sigma)
    assert plan.equivalent_samples == pytest.approx(1.0 / predicted)


def test_density_of_white_noise_is_its_variance_over_fs():
    # scipy.signal.welch(scaling="density") normalises by fs sum(w^2): white noise of mean
    # square s2 reads s2 / fs per Hz (complex, two-sided) and 2 s2 / fs (real, one-sided)
    rng = np.random.default_rng(3)
    fs = 1e6
    plan = welch.plan_segments(fs, 2e3, 400)
    x = (rng.standard_normal(plan.samples) + 1j * rng.standard_normal(plan.samples)) * 0.1
    _, psd, used = welch.welch_density(x, plan)
    assert used == 400
    u = 1 / math.sqrt(plan.equivalent_samples * psd.size / 2)  # neighbours correlate: /2
    assert np.mean(psd) == pytest.approx(0.02 / fs, rel=5 * u)
    xr = x.real
    _, psd_r, _ = welch.welch_density(xr, plan)
    assert np.mean(psd_r[5:-5]) == pytest.approx(2 * 0.01 / fs, rel=5 * u * math.sqrt(2))

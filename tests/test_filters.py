"""RBW filter shapes: ENBW, statistical bandwidth, point correlation, spur-skirt width.

Reference values are recomputed by numerical integration (scipy.integrate.quad) of the power
response, or from scipy.signal windows, rather than pasted.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.signal import get_window

from noisebench.errors import InputError
from noisebench.science.filters import (
    GAUSSIAN,
    FilterKind,
    RbwFilter,
    correlation_bw_ratio,
    frequency_power_correlation,
    gaussian_enbw_ratio,
    response_halfwidth_ratio,
    synchronous_enbw_ratio,
    synchronous_stat_bw_ratio,
    time_power_correlation,
    window_enbw_bins,
)

SYNC4 = RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=4)
HANN = RbwFilter(kind=FilterKind.FFT, window="hann")
ALL_SHAPES = [
    GAUSSIAN,
    SYNC4,
    RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=5),
    HANN,
    RbwFilter(kind=FilterKind.FFT, window="flattop"),
]


def _integral(fun, half_span: float = np.inf) -> float:
    return quad(fun, -half_span, half_span, limit=400, epsabs=1e-13, epsrel=1e-11)[0]


def test_gaussian_enbw_and_stat_bw_by_integration():
    # reference: docs/references.md §6a (ENBW = sqrt(pi/(4 ln2)) B3) and §7 (B_stat = (int G)^2/int
    # G^2)
    resp = lambda f: float(GAUSSIAN.power_response(np.array([f]), 1.0)[0])  # noqa: E731
    enbw = _integral(resp)
    bstat = enbw**2 / _integral(lambda f: resp(f) ** 2)
    assert enbw == pytest.approx(math.sqrt(math.pi / (4 * math.log(2))), rel=1e-10)
    assert GAUSSIAN.enbw_ratio == pytest.approx(enbw, rel=1e-10)
    assert gaussian_enbw_ratio() == pytest.approx(enbw, rel=1e-10)
    assert GAUSSIAN.stat_bw_ratio == pytest.approx(bstat, rel=1e-10)
    assert bstat == pytest.approx(math.sqrt(2) * enbw, rel=1e-10)  # docs/references.md §6a table
    # reference: docs/references.md §4, 1 MHz Gaussian RBW -> ENBW 60.2713 dB-Hz
    assert 10 * math.log10(GAUSSIAN.enbw_hz(1e6)) == pytest.approx(60.2713, abs=5e-5)


@pytest.mark.parametrize("poles", [1, 2, 3, 4, 5, 8])
def test_synchronous_filters_by_integration(poles):
    # reference: docs/references.md §6a, n synchronously tuned stages (narrow-band model), by quad
    f = RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=poles)
    resp = lambda x: float(f.power_response(np.array([x]), 1.0)[0])  # noqa: E731
    assert resp(0.5) == pytest.approx(0.5, rel=1e-12)  # -3 dB at +/- B3/2 by construction
    enbw = _integral(resp)
    bstat = enbw**2 / _integral(lambda x: resp(x) ** 2)
    assert synchronous_enbw_ratio(poles) == pytest.approx(enbw, rel=1e-8)
    assert synchronous_stat_bw_ratio(poles) == pytest.approx(bstat, rel=1e-8)


def test_synchronous_table_values():
    # reference: docs/references.md §6a table (computed there with numpy/scipy)
    table = {
        1: (1.570796, 3.1416),
        2: (1.220331, 1.9525),
        3: (1.155395, 1.7606),
        4: (1.128499, 1.6835),
        5: (1.113845, 1.6421),
        8: (1.093716, 1.5859),
    }
    for n, (enbw, bstat) in table.items():
        assert synchronous_enbw_ratio(n) == pytest.approx(enbw, abs=1e-6)
        assert synchronous_stat_bw_ratio(n) == pytest.approx(bstat, abs=1e-4)
    # many poles tend to the Gaussian (central limit theorem on the stage responses), from
    # above and with a deviation falling as 1/n: 8x more poles, ~8x closer
    dev8, dev64 = (synchronous_enbw_ratio(n) - gaussian_enbw_ratio() for n in (8, 64))
    assert dev8 > dev64 > 0
    assert dev8 / dev64 == pytest.approx(8.0, rel=0.1)


@pytest.mark.parametrize(
    "window, expected_bins",
    [("boxcar", 1.0), ("hann", 1.5), ("blackmanharris", 2.0044), ("flattop", 3.7702)],
)
def test_fft_window_enbw_in_bins(window, expected_bins):
    # reference: Harris 1978, Proc. IEEE 66(1) (table of window ENBW); docs/references.md §8;
    # recomputed from scipy.signal.get_window as N sum(w^2) / sum(w)^2
    w = get_window(window, 4096, fftbins=True)
    direct = len(w) * np.sum(w**2) / np.sum(w) ** 2
    assert window_enbw_bins(window, 4096) == pytest.approx(direct, rel=1e-12)
    assert window_enbw_bins(window) == pytest.approx(expected_bins, abs=1e-4)


@pytest.mark.parametrize("window", ["hann", "blackmanharris", "flattop"])
def test_fft_filter_enbw_matches_integral_of_its_response(window):
    # Parseval: the integral of |W(f)|^2/|W(0)|^2 over bins equals N sum(w^2)/sum(w)^2
    f = RbwFilter(kind=FilterKind.FFT, window=window)
    x = np.linspace(-60, 60, 240_001)
    resp = f.power_response(x, 1.0)
    assert np.interp(0.5, x, resp) == pytest.approx(0.5, abs=2e-3)  # -3 dB at B3/2
    assert np.trapezoid(resp, x) == pytest.approx(f.enbw_ratio, rel=2e-3)


def test_frequency_correlation_gaussian_closed_form_and_integral():
    # zero-phase filter bank: rho(D) = (int |H(f)||H(f-D)| df / int |H|^2)^2, by quad
    amp = lambda f: math.exp(-2 * math.log(2) * f * f)  # |H| of a unit-B3 Gaussian  # noqa: E731
    norm = _integral(lambda f: amp(f) ** 2)
    for d in (0.0, 0.3, 1.0, 2.0):
        num = _integral(lambda f, d=d: amp(f) * amp(f - d))
        assert frequency_power_correlation(GAUSSIAN, np.array([d]), 1.0)[0] == pytest.approx(
            (num / norm) ** 2, rel=1e-9
        )
    # the correlation bandwidth of a Gaussian RBW equals its B_stat (docs/references.md §7)
    area = _integral(lambda d: float(frequency_power_correlation(GAUSSIAN, np.array([d]), 1.0)[0]))
    assert area == pytest.approx(GAUSSIAN.stat_bw_ratio, rel=1e-9)
    assert correlation_bw_ratio(GAUSSIAN) == pytest.approx(area, rel=1e-12)


@pytest.mark.parametrize("filt", ALL_SHAPES[1:])
def test_correlation_table_shapes(filt):
    # numerical table: 1 at zero offset, decreasing, and its integral is correlation_bw_ratio
    d = np.linspace(0, 20, 4001)
    rho = frequency_power_correlation(filt, d, 1.0)
    assert rho[0] == pytest.approx(1.0, abs=1e-12)
    assert np.all(np.diff(rho[d < 1.5]) < 0)
    assert 2 * np.trapezoid(rho, d) == pytest.approx(correlation_bw_ratio(filt), rel=5e-3)
    # scales with the RBW
    assert frequency_power_correlation(filt, np.array([3e4]), 1e5)[0] == pytest.approx(
        frequency_power_correlation(filt, np.array([0.3]), 1.0)[0], rel=1e-12
    )


@pytest.mark.parametrize("poles", [2, 4, 5])
def test_zero_phase_correlation_bounds_the_causal_filter(poles):
    # Triangle inequality: |int H H*(f-D)| <= int |H||H(f-D)|. For n causal single-pole stages
    # h(t) ~ t^(n-1) exp(-2 pi b B3 t), so |R(D)|^2 = (1 + (D / (2 b))^2)^-(2n-1) in closed form
    # (Fourier transform of |h|^2). The table must never be below it (never optimistic).
    f = RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=poles)
    b = 1 / (2 * math.sqrt(2 ** (1 / poles) - 1))
    d = np.linspace(0.05, 4, 80)
    causal = (1 + (d / (2 * b)) ** 2) ** (-(2 * poles - 1))
    assert np.all(frequency_power_correlation(f, d, 1.0) >= causal - 1e-9)


def test_fft_bin_correlation_bounds_the_exact_window_value():
    # exact correlation of FFT bins D bins apart: |sum w^2 exp(-j 2 pi n D/N)|^2 / (sum w^2)^2
    # (Hann, 1 bin: the coefficient of w^2 = 3/8 - cos/2 + cos(2)/8 gives (1/4 / 3/8)^2 = 4/9)
    w = get_window("hann", 1024, fftbins=True)
    n = np.arange(w.size)
    b3_bins = window_enbw_bins("hann") / HANN.enbw_ratio  # enbw_ratio = ENBW_bins / B3_bins
    for d_bins in (0.5, 1.0, 2.0):
        exact = (
            abs(np.sum(w**2 * np.exp(-2j * np.pi * n * d_bins / w.size))) ** 2 / np.sum(w**2) ** 2
        )
        ours = frequency_power_correlation(HANN, np.array([d_bins / b3_bins]), 1.0)[0]
        assert ours >= exact - 1e-4
        if d_bins == 1.0:
            assert exact == pytest.approx(4 / 9, rel=1e-9)
            assert ours == pytest.approx(exact, abs=0.02)  # sidelobe signs matter little


@pytest.mark.parametrize("filt", [GAUSSIAN, SYNC4, RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=2)])
def test_time_correlation_integrates_to_one_over_bstat(filt):
    # radiometer equation (Dicke 1946, from memory; docs/references.md §7): int |r(tau)|^2 =
    # 1/B_stat
    fun = lambda t: float(time_power_correlation(filt, np.array([t]), 1.0)[0])  # noqa: E731
    assert fun(0.0) == pytest.approx(1.0)
    area = 2 * quad(fun, 0, 40, limit=400, epsabs=1e-12)[0]
    assert area == pytest.approx(1.0 / filt.stat_bw_ratio, rel=1e-6)


def test_time_correlation_matches_fourier_transform_of_power_response():
    # r(tau) = int |H|^2 cos(2 pi f tau) df / int |H|^2 by quad, for the 4-pole filter
    resp = lambda f: float(SYNC4.power_response(np.array([f]), 1.0)[0])  # noqa: E731
    norm = _integral(resp)
    for tau in (0.2, 0.5, 1.0):
        r = 2 * quad(resp, 0, np.inf, weight="cos", wvar=2 * math.pi * tau)[0]
        assert time_power_correlation(SYNC4, np.array([tau]), 1.0)[0] == pytest.approx(
            (r / norm) ** 2, rel=1e-6, abs=1e-12
        )


@pytest.mark.parametrize("filt", ALL_SHAPES)
@pytest.mark.parametrize("level", [0.5, 1e-3, 1e-8])
def test_response_halfwidth(filt, level):
    x = response_halfwidth_ratio(filt, level)
    beyond = np.linspace(x * 1.0001 + 1e-3, x + 30, 20001)
    assert np.all(filt.power_response(beyond, 1.0) < level)  # nothing above level beyond it
    if filt.kind is not FilterKind.FFT:  # closed forms are exact
        assert filt.power_response(np.array([x]), 1.0)[0] == pytest.approx(level, rel=1e-9)
    else:
        assert filt.power_response(np.array([x * 0.99]), 1.0)[0] >= level * 0.9
    assert response_halfwidth_ratio(filt, 1.0) == 0.0


def test_bad_filter_inputs_name_the_field():
    with pytest.raises(Exception, match="filter.poles"):
        RbwFilter(kind=FilterKind.SYNCHRONOUS)
    with pytest.raises(Exception, match="filter.window"):
        RbwFilter(kind=FilterKind.FFT, window="no-such-window")
    with pytest.raises(InputError, match="rbw_filter"):
        time_power_correlation(HANN, np.array([0.1]), 1.0)
    with pytest.raises(InputError, match="level"):
        response_halfwidth_ratio(GAUSSIAN, 0.0)
    with pytest.raises(InputError, match="poles"):
        synchronous_enbw_ratio(0)

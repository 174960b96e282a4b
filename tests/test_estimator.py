"""Noise-density estimator on synthetic traces made here with numpy (noisebench.science.estimator).

The traces are built from first principles, independently of the library: complex white
Gaussian noise on a fine frequency grid is filtered by the RBW amplitude response at every trace
point (so neighbours closer than an RBW are correlated as a real filter bank makes them), then
detected (sample, RMS, or averaged on the log / voltage scale) and trace-averaged. CW spurs are
added as coherent tones seen through the same filter. Zero-span traces are filtered in the time
domain. Seeds are fixed; tolerances come from the statistics (5 standard errors, or two-sided
0.1 % chi-square quantiles for variance ratios).
"""

from __future__ import annotations

import math
import zlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal, special, stats

from noisebench.bench.acquisition import (
    AcquisitionSettings,
    AveragingScale,
    Detector,
    MarkerKind,
    MarkerReading,
    SweepMode,
    Trace,
    TraceUnit,
)
from noisebench.errors import InputError, MeasurementError
from noisebench.science.estimator import density_from_marker, estimate_densities, estimate_density
from noisebench.science.filters import GAUSSIAN, FilterKind, RbwFilter

D_TRUE = 1e-17  # W/Hz (about -140 dBm/Hz)
F0 = 1e9
Z = 5.0
LOG, VOLT, POW = AveragingScale.LOG_POWER, AveragingScale.VOLTAGE, AveragingScale.POWER
SYNC4 = RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=4)
HANN = RbwFilter(kind=FilterKind.FFT, window="hann")


# --- synthetic traces ------------------------------------------------------------------------


def _combine(x: np.ndarray, axis: int, scale: AveragingScale) -> np.ndarray:
    if scale is POW:
        return x.mean(axis)
    if scale is LOG:
        return np.exp(np.log(x).mean(axis))
    return np.sqrt(x).mean(axis) ** 2


def _detect(power: np.ndarray, detector: Detector, scale: AveragingScale) -> np.ndarray:
    """power: (..., averages, looks, points) -> trace values (..., points)."""
    if detector is Detector.SAMPLE:
        d = power[..., 0, :]
    elif detector is Detector.RMS:
        d = power.mean(-2)
    else:
        d = _combine(power, -2, scale)
    return _combine(d, -2, scale)


def synthetic_traces(
    seed: int,
    n_traces: int = 1,
    *,
    points: int = 401,
    span_hz: float = 8e6,
    rbw_hz: float = 1e5,
    filt: RbwFilter = GAUSSIAN,
    averages: int = 8,
    looks: int = 1,
    detector: Detector = Detector.RMS,
    scale: AveragingScale = POW,
    spurs=(),
    shape=None,
    report_samples: bool = True,
    unit: TraceUnit = TraceUnit.DBM,
) -> list[Trace]:
    """Swept-style traces of white noise of density D_TRUE (times ``shape(f)`` if given)."""
    rng = np.random.default_rng(seed)
    spacing = span_hz / (points - 1)
    sub = max(1, math.ceil(spacing / (rbw_hz / 8)))  # fine grid: <= RBW/8
    step = spacing / sub
    half = int(math.ceil(8 * rbw_hz / step))
    taps = np.sqrt(filt.power_response(np.arange(-half, half + 1) * step, rbw_hz))
    taps /= math.sqrt(np.sum(taps**2))  # E|y|^2 = 1 per point
    enbw = filt.enbw_hz(rbw_hz)
    freqs = F0 - span_hz / 2 + np.arange(points) * spacing
    n_grid = (points - 1) * sub + 1 + 2 * half
    size = (n_traces, averages, looks, n_grid)
    white = (rng.standard_normal(size) + 1j * rng.standard_normal(size)) * math.sqrt(0.5)
    full = signal.oaconvolve(white, taps[None, None, None, :], mode="valid", axes=-1)
    y = full[..., ::sub]  # one filter output per trace point
    density = D_TRUE * (shape(freqs) if shape is not None else 1.0)
    y *= np.sqrt(density * enbw)
    for f_line, p_line in spurs:  # CW line of power p_line (W), random phase per look
        amp = np.sqrt(p_line * filt.power_response(freqs - f_line, rbw_hz))
        phase = rng.uniform(0, 2 * np.pi, size=(n_traces, averages, looks, 1))
        y = y + amp * np.exp(1j * phase)
    values = _detect(np.abs(y) ** 2, detector, scale)
    settings = AcquisitionSettings(
        center_hz=F0,
        span_hz=span_hz,
        rbw_hz=rbw_hz,
        rbw_filter=filt,
        detector=detector,
        averaging_scale=scale,
        averages=averages,
        points=points,
        mode=SweepMode.FFT if filt.kind is FilterKind.FFT else SweepMode.SWEPT,
        detector_samples=(looks if report_samples and detector is not Detector.SAMPLE else None),
    )
    return [_make_trace(freqs, v, settings, unit) for v in values]


def _make_trace(freqs, power_w, settings, unit=TraceUnit.DBM) -> Trace:
    enbw = settings.enbw_hz
    values = {
        TraceUnit.DBM: 10 * np.log10(power_w / 1e-3),
        TraceUnit.WATT: power_w,
        TraceUnit.W_PER_HZ: power_w / enbw,
        TraceUnit.DBM_PER_HZ: 10 * np.log10(power_w / enbw / 1e-3),
    }[unit]
    return Trace(freq_hz=freqs, values=values, unit=unit, settings=settings)


def zero_span_traces(
    seed: int,
    n_traces: int,
    *,
    points: int = 400,
    rbw_hz: float = 1e5,
    dt_periods: float = 0.2,
    sub: int = 1,
    averages: int = 4,
    detector: Detector = Detector.SAMPLE,
) -> list[Trace]:
    """Zero-span traces: noise filtered in time, points ``dt_periods``/RBW apart; an RMS point
    averages its ``sub`` sub-samples. The reported sample count is computed from the generator's
    own correlation."""
    rng = np.random.default_rng(seed)
    dt = dt_periods / rbw_hz
    delta = dt / sub
    n_t = points * sub
    n_fft = 1 << int(math.ceil(math.log2(2 * n_t + 64)))
    amp = np.sqrt(GAUSSIAN.power_response(np.fft.fftfreq(n_fft, d=delta), rbw_hz))
    enbw = GAUSSIAN.enbw_hz(rbw_hz)
    values = []
    for _ in range(n_traces):
        size = (averages, n_fft)
        white = (rng.standard_normal(size) + 1j * rng.standard_normal(size)) * math.sqrt(0.5)
        x = np.fft.ifft(white * amp, axis=-1)[..., :n_t]
        x *= n_fft / math.sqrt(np.sum(amp**2))  # unit mean power (ifft carries 1/n_fft)
        power = (np.abs(x) ** 2).reshape(averages, points, sub) * D_TRUE * enbw
        per_point = power[..., 0] if detector is Detector.SAMPLE else power.mean(axis=-1)
        values.append(per_point.mean(axis=0))
    samples = None
    if detector is not Detector.SAMPLE:
        acf = np.fft.ifft(amp**2)  # complex autocorrelation of the generated noise
        rho = np.abs(acf[:sub] / acf[0]) ** 2
        lag = np.arange(sub)
        samples = sub**2 / float(sub + 2 * np.sum((sub - lag[1:]) * rho[1:]))
    settings = AcquisitionSettings(
        center_hz=F0,
        span_hz=0.0,
        rbw_hz=rbw_hz,
        detector=detector,
        averaging_scale=POW,
        averages=averages,
        points=points,
        sweep_time_s=points * dt,
        detector_samples=samples,
    )
    return [
        Trace(freq_hz=np.full(points, F0), values=10 * np.log10(v / 1e-3), settings=settings)
        for v in values
    ]


def _two_sided_chi2_bounds(dof: int, p: float = 1e-3) -> tuple[float, float]:
    return stats.chi2.ppf(p / 2, dof) / dof, stats.chi2.ppf(1 - p / 2, dof) / dof


def _gaussian_corr_sum(n: int, spacing_rbw: float) -> float:
    """sum_ij rho(|i-j| spacing) for the Gaussian RBW, rho = exp(-2 ln2 x^2) [docs/references.md
    §6a]."""
    lags = np.arange(n)
    rho = np.exp(-2 * math.log(2) * (lags * spacing_rbw) ** 2)
    return float(n * rho[0] + 2 * np.sum((n - lags[1:]) * rho[1:]))


# --- accuracy and uncertainty ------------------------------------------------------------------

CONFIGS = {
    "rms-power": dict(detector=Detector.RMS, scale=POW, looks=4),
    "sample-log": dict(detector=Detector.SAMPLE, scale=LOG),
    "rms-log": dict(detector=Detector.RMS, scale=LOG, looks=3),
    "average-voltage": dict(detector=Detector.AVERAGE, scale=VOLT, looks=3),
    "sample-voltage-sparse": dict(detector=Detector.SAMPLE, scale=VOLT, span_hz=40e6),
    "sync4-rms-power": dict(detector=Detector.RMS, scale=POW, looks=2, filt=SYNC4),
    "fft-hann-rms-log": dict(detector=Detector.RMS, scale=LOG, looks=2, filt=HANN),
    "single-sample": dict(detector=Detector.SAMPLE, scale=POW, averages=1),
}


@pytest.mark.parametrize("name", list(CONFIGS))
def test_single_trace_recovers_density_within_stated_uncertainty(name):
    # a fixed seed per case (str hash() changes with every interpreter: PYTHONHASHSEED)
    trace = synthetic_traces(seed=zlib.crc32(name.encode()) % 1000, **CONFIGS[name])[0]
    d = estimate_density(trace)
    assert abs(d.density_w_per_hz - D_TRUE) < Z * d.u_density_w_per_hz
    assert d.freq_hz == pytest.approx(F0)
    assert d.bins_used == 401 and d.excluded_freq_hz == []
    assert d.settings == trace.settings
    assert d.band_hz == pytest.approx(np.ptp(trace.freq_hz) + trace.settings.enbw_hz)
    assert 0.5 < d.scatter_ratio < 1.6
    assert d.relative_u == pytest.approx(1 / math.sqrt(d.independent_samples), rel=1e-9)


@pytest.mark.parametrize(
    "name",
    ["rms-power", "sample-log", "average-voltage", "sample-voltage-sparse", "sync4-rms-power"],
)
def test_stated_uncertainty_matches_scatter_over_seeds(name):
    m = 160
    traces = synthetic_traces(seed=1, n_traces=m, **CONFIGS[name])
    est = [estimate_density(t) for t in traces]
    v = np.array([d.density_w_per_hz for d in est])
    u2 = np.mean([d.u_density_w_per_hz**2 for d in est])
    # unbiased: the mean of m estimates within 5 standard errors of the truth
    assert abs(v.mean() - D_TRUE) < Z * math.sqrt(u2 / m)
    # the stated variance is the actual one: s^2/u^2 ~ chi2(m-1)/(m-1)
    lo, hi = _two_sided_chi2_bounds(m - 1)
    assert lo < np.var(v, ddof=1) / u2 < hi
    # the scatter ratio is 1 on average for clean noise (its own spread from the same runs)
    ratios = np.array([d.scatter_ratio for d in est])
    assert abs(ratios.mean() - 1) < Z * ratios.std(ddof=1) / math.sqrt(m) + 0.02  # 1/n_eff bias
    assert sum(bool(d.excluded_freq_hz) for d in est) <= 2  # 5-sigma false alarms are rare


def test_independent_samples_sparse_points_are_all_independent():
    # spacing 10 RBW: rho = exp(-2 ln2 100) ~ 0, so samples = averages x looks x points
    trace = synthetic_traces(seed=3, span_hz=400e6, points=41, looks=5, averages=6)[0]
    d = estimate_density(trace)
    assert d.independent_samples == pytest.approx(6 * 5 * 41, rel=1e-9)


def test_independent_samples_dense_points_follow_the_radiometer_equation():
    # 20 points per RBW over 100 RBW: independent bins -> band / B_stat (docs/references.md §7)
    trace = synthetic_traces(seed=4, span_hz=10e6, points=2001, looks=3, averages=4)[0]
    d = estimate_density(trace)
    spacing_rbw = 10e6 / 2000 / 1e5
    exact = 12 * 2001**2 / _gaussian_corr_sum(2001, spacing_rbw)
    assert d.independent_samples == pytest.approx(exact, rel=1e-6)
    radiometer = 12 * 10e6 / GAUSSIAN.stat_bw_hz(1e5)
    assert d.independent_samples == pytest.approx(radiometer, rel=0.03)  # band-edge effect


def test_bias_correction_reported():
    # log averaging of 8 single samples: E[G] = mu Gamma(1 + 1/8)^8 (scipy.special.gamma)
    d = estimate_density(synthetic_traces(seed=5, **CONFIGS["sample-log"])[0])
    assert d.bias_correction_db == pytest.approx(-10 * math.log10(special.gamma(1 + 1 / 8) ** 8))
    d = estimate_density(synthetic_traces(seed=5, **CONFIGS["rms-power"])[0])
    assert d.bias_correction_db == 0.0


def test_uncorrected_log_average_would_read_low():
    # the same trace read naively (power-scale settings) is biased by the log-average bias
    trace = synthetic_traces(seed=6, detector=Detector.SAMPLE, scale=LOG, averages=64)[0]
    naive = trace.model_copy(
        update={"settings": trace.settings.model_copy(update={"averaging_scale": POW})}
    )
    good, bad = estimate_density(trace), estimate_density(naive)
    ratio_db = 10 * math.log10(bad.density_w_per_hz / good.density_w_per_hz)
    assert ratio_db == pytest.approx(10 * math.log10(special.gamma(1 + 1 / 64) ** 64), abs=1e-9)
    assert ratio_db < -2.4  # docs/references.md §6b: ~ -2.5 dB


# --- zero span ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "detector, dt_periods, sub", [(Detector.SAMPLE, 0.2, 1), (Detector.RMS, 2.0, 8)]
)
def test_zero_span_uncertainty_matches_scatter(detector, dt_periods, sub):
    m = 120
    traces = zero_span_traces(seed=8, n_traces=m, dt_periods=dt_periods, sub=sub, detector=detector)
    est = [estimate_density(t) for t in traces]
    v = np.array([d.density_w_per_hz for d in est])
    u2 = np.mean([d.u_density_w_per_hz**2 for d in est])
    assert abs(v.mean() - D_TRUE) < Z * math.sqrt(u2 / m)
    lo, hi = _two_sided_chi2_bounds(m - 1)
    assert lo < np.var(v, ddof=1) / u2 < hi
    # radiometer equation (docs/references.md §7): independent samples ~ averages x T x B_stat
    s = traces[0].settings
    radiometer = s.averages * s.sweep_time_s * GAUSSIAN.stat_bw_hz(s.rbw_hz)
    assert est[0].independent_samples == pytest.approx(radiometer, rel=0.05)
    assert est[0].band_hz == pytest.approx(s.enbw_hz)


def test_zero_span_needs_its_sweep_time_and_a_swept_mode():
    trace = zero_span_traces(seed=9, n_traces=1)[0]
    no_time = trace.model_copy(
        update={"settings": trace.settings.model_copy(update={"sweep_time_s": None})}
    )
    with pytest.raises(InputError) as info:
        estimate_density(no_time)
    assert info.value.field == "trace.settings.sweep_time_s"
    fft = trace.model_copy(
        update={
            "settings": trace.settings.model_copy(
                update={"mode": SweepMode.FFT, "rbw_filter": HANN}
            )
        }
    )
    with pytest.raises(InputError, match="trace.settings.mode"):
        estimate_density(fft)
    with pytest.raises(InputError, match="freq_hz"):
        estimate_density(trace, freq_hz=F0 + 1e6)


# --- spurs -------------------------------------------------------------------------------------

SPURS = (
    (F0 - 2.1e6, 10 * D_TRUE * 1e5),
    (F0 + 0.52e6, 1e3 * D_TRUE * 1e5),
    (F0 + 2.63e6, 1e5 * D_TRUE * 1e5),
)  # 10, 30 and 50 dB above the noise in the RBW


def test_spurs_are_excluded_reported_and_leave_the_density_unbiased():
    m = 60
    kw = dict(detector=Detector.RMS, scale=LOG, looks=2, averages=16, points=801)
    traces = synthetic_traces(seed=10, n_traces=m, spurs=SPURS, **kw)
    est = [estimate_density(t) for t in traces]
    spacing = 8e6 / 800
    for d in est:
        assert len(d.excluded_freq_hz) == len(SPURS)
        for (f_line, _), f_found in zip(SPURS, d.excluded_freq_hz, strict=True):
            assert abs(f_found - f_line) <= spacing
        assert d.bins_used < 801
    v = np.array([d.density_w_per_hz for d in est])
    u2 = np.mean([d.u_density_w_per_hz**2 for d in est])
    assert abs(v.mean() - D_TRUE) < Z * math.sqrt(u2 / m)
    lo, hi = _two_sided_chi2_bounds(m - 1)
    assert lo < np.var(v, ddof=1) / u2 < hi
    # the stronger line needs the wider exclusion (its skirt reaches further)
    clean = synthetic_traces(seed=11, **kw)[0]
    assert estimate_density(clean).excluded_freq_hz == []
    # without rejection the lines dominate: the test above can fail
    raw = estimate_density(traces[0], reject_spurs=False)
    assert raw.density_w_per_hz > 100 * D_TRUE
    assert raw.scatter_ratio > 10 and raw.relative_u > 10 * est[0].relative_u


def test_spur_exclusion_grows_with_the_line_strength():
    kw = dict(detector=Detector.RMS, scale=POW, looks=4, averages=16, points=801)
    weak = estimate_density(synthetic_traces(seed=12, spurs=[(F0, 30 * D_TRUE * 1e5)], **kw)[0])
    strong = estimate_density(synthetic_traces(seed=12, spurs=[(F0, 1e6 * D_TRUE * 1e5)], **kw)[0])
    assert weak.excluded_freq_hz and strong.excluded_freq_hz
    assert strong.bins_used < weak.bins_used < 801
    # 60 dB line through a Gaussian RBW: its skirt is below the noise resolution within 3 RBW
    assert 801 - strong.bins_used < 2 * 3.5 * 1e5 / 1e4


def test_spurs_only_reported_for_bands_they_touch():
    trace = synthetic_traces(seed=13, spurs=[(F0 + 3e6, 1e4 * D_TRUE * 1e5)], looks=4, points=801)[
        0
    ]
    far, near = estimate_densities(trace, [F0 - 2e6, F0 + 3e6], 1e6)
    assert far.excluded_freq_hz == [] and far.bins_used == 101
    assert near.excluded_freq_hz and near.bins_used < 101
    assert abs(near.density_w_per_hz - D_TRUE) < Z * near.u_density_w_per_hz


def test_band_swamped_by_a_spur_is_a_measurement_error():
    trace = synthetic_traces(seed=14, spurs=[(F0, 1e9 * D_TRUE * 1e5)], looks=4, points=801)[0]
    with pytest.raises(MeasurementError, match="free of spurs"):
        estimate_density(trace, freq_hz=F0, band_hz=2e5)


# --- scatter cross-check -----------------------------------------------------------------------


def test_gain_slope_does_not_count_as_scatter():
    # density rising 20 % across the trace (DUT gain slope): the band mean is the centre value
    slope = lambda f: 1 + 0.2 * (f - F0) / 4e6  # noqa: E731
    m = 40
    est = [
        estimate_density(t)
        for t in synthetic_traces(seed=15, n_traces=m, shape=slope, **CONFIGS["rms-power"])
    ]
    ratios = np.array([d.scatter_ratio for d in est])
    assert abs(ratios.mean() - 1) < Z * ratios.std(ddof=1) / math.sqrt(m) + 0.02
    v = np.array([d.density_w_per_hz for d in est])
    assert abs(v.mean() - D_TRUE) < Z * est[0].u_density_w_per_hz / math.sqrt(m)


def test_excess_scatter_widens_the_uncertainty():
    # a broadband ripple (+/- 30 % over ~ 6 RBW) is not the noise statistics: widen to observed
    ripple = lambda f: 1 + 0.3 * np.sin(2 * np.pi * (f - F0) / 6e5)  # noqa: E731
    kw = CONFIGS["rms-power"]
    clean = estimate_density(synthetic_traces(seed=16, **kw)[0])
    rippled = estimate_density(synthetic_traces(seed=16, shape=ripple, **kw)[0])
    assert rippled.excluded_freq_hz == [] and rippled.bins_used == clean.bins_used
    # expected ratio: sqrt(1 + ripple variance / point variance), ripple variance 0.3^2 / 2
    assert rippled.scatter_ratio == pytest.approx(math.sqrt(1 + 0.045 * 32), rel=0.1)
    assert rippled.relative_u == pytest.approx(clean.relative_u * rippled.scatter_ratio, rel=1e-9)


def test_unknown_sample_count_on_power_scale_uses_the_observed_scatter():
    m = 100
    kw = dict(CONFIGS["rms-power"])
    known = [estimate_density(t) for t in synthetic_traces(seed=17, n_traces=m, **kw)]
    blind = [
        estimate_density(t)
        for t in synthetic_traces(seed=17, n_traces=m, report_samples=False, **kw)
    ]
    for k, b in zip(known, blind, strict=True):
        assert b.density_w_per_hz == pytest.approx(k.density_w_per_hz, rel=1e-12)
        assert b.scatter_ratio is None
        # the observed variance replaces the predicted one: u scales by the scatter ratio
        assert b.relative_u == pytest.approx(k.relative_u * k.scatter_ratio, rel=1e-9)
    v = np.array([d.density_w_per_hz for d in blind])
    u2 = np.mean([d.u_density_w_per_hz**2 for d in blind])
    lo, hi = _two_sided_chi2_bounds(m - 1)
    assert lo < np.var(v, ddof=1) / u2 < hi


# --- units, bands, many frequencies ------------------------------------------------------------


@pytest.mark.parametrize("unit", [TraceUnit.WATT, TraceUnit.W_PER_HZ, TraceUnit.DBM_PER_HZ])
def test_trace_units(unit):
    ref = estimate_density(synthetic_traces(seed=18, **CONFIGS["rms-log"])[0])
    other = estimate_density(synthetic_traces(seed=18, unit=unit, **CONFIGS["rms-log"])[0])
    # density traces are already per Hz (no ENBW division); all units give the same density
    assert other.density_w_per_hz == pytest.approx(ref.density_w_per_hz, rel=1e-9)
    assert other.relative_u == pytest.approx(ref.relative_u, rel=1e-9)


def test_estimate_densities_matches_single_band_estimates():
    spur = (F0 + 1e6, 1e4 * D_TRUE * 1e5)
    trace = synthetic_traces(seed=19, points=801, looks=2, spurs=[spur])[0]
    freqs = np.linspace(F0 - 3e6, F0 + 3e6, 25)
    many = estimate_densities(trace, freqs, 1e6)
    assert [d.freq_hz for d in many] == pytest.approx(list(freqs))
    for f, d in zip(freqs, many, strict=True):
        one = estimate_density(trace, freq_hz=f, band_hz=1e6)
        assert d.density_w_per_hz == pytest.approx(one.density_w_per_hz, rel=1e-12)
        assert d.u_density_w_per_hz == pytest.approx(one.u_density_w_per_hz, rel=1e-12)
        assert d.bins_used == one.bins_used
        if not d.excluded_freq_hz:  # the used points span the band, each seen through the ENBW
            assert d.band_hz == pytest.approx(1e6 + trace.settings.enbw_hz)
    bands = estimate_densities(trace, freqs[:3], [1e6, 2e6, 5e5])
    assert [d.bins_used for d in bands] == [101, 201, 51]


def test_band_selection_errors_name_the_field():
    trace = synthetic_traces(seed=20)[0]
    cases = [
        (dict(freq_hz=F0 + 3.9e6, band_hz=1e6), "band_hz"),  # beyond the trace
        (dict(freq_hz=F0, band_hz=1e3), "band_hz"),  # fewer than min_points
        (dict(freq_hz=F0, band_hz=-1.0), "band_hz"),
        (dict(freq_hz=2e9), "freq_hz"),
        (dict(freq_hz=float("nan")), "freq_hz"),
        (dict(spur_threshold_sigma=0.0), "spur_threshold_sigma"),
    ]
    for kw, field in cases:
        with pytest.raises(InputError) as info:
            estimate_density(trace, **kw)
        assert info.value.field == field, kw
    with pytest.raises(InputError, match="freqs_hz"):
        estimate_densities(trace, np.ones((2, 2)), 1e6)
    with pytest.raises(InputError, match="band_hz"):
        estimate_densities(trace, [F0, F0 + 1e6], [1e6, 1e6, 1e6])
    with pytest.raises(InputError) as info:
        estimate_densities(trace, [F0, F0 + 3.8e6], 1e6)
    assert info.value.context["index"] == 1  # which frequency point failed


def test_bad_trace_data_names_the_field():
    trace = synthetic_traces(seed=21, unit=TraceUnit.WATT)[0]
    for bad in (np.nan, -1e-12, 0.0):
        values = trace.values.copy()
        values[7] = bad
        with pytest.raises(InputError) as info:
            estimate_density(trace.model_copy(update={"values": values}))
        assert info.value.field == "trace.values" and "7" in str(info.value)
    freqs = trace.freq_hz.copy()
    freqs[100] += 0.5 * (freqs[1] - freqs[0])
    with pytest.raises(InputError, match="trace.freq_hz"):
        estimate_density(trace.model_copy(update={"freq_hz": freqs}))


def test_peak_detector_and_unknown_sample_count_refused():
    trace = synthetic_traces(seed=22)[0]
    for update, field in [
        ({"detector": Detector.PEAK}, "trace.settings.detector"),
        ({"detector": Detector.NEGATIVE_PEAK}, "trace.settings.detector"),
        ({"averaging_scale": LOG, "detector_samples": None}, "trace.settings.detector_samples"),
        (
            {"detector": Detector.AVERAGE, "averaging_scale": VOLT, "detector_samples": None},
            "trace.settings.detector_samples",
        ),
    ]:
        bad = trace.model_copy(update={"settings": trace.settings.model_copy(update=update)})
        with pytest.raises(InputError) as info:
            estimate_density(bad)
        assert info.value.field == field


# --- marker readings ---------------------------------------------------------------------------


def _marker_settings(**kw) -> AcquisitionSettings:
    base = dict(
        center_hz=F0,
        span_hz=10e6,
        rbw_hz=1e5,
        detector=Detector.RMS,
        averaging_scale=POW,
        averages=10,
        points=1001,
        detector_samples=4,
    )
    base.update(kw)
    return AcquisitionSettings(**base)


def _dbm(w: float) -> float:
    return 10 * math.log10(w / 1e-3)


def _gaussian_corr_matrix(n: int, spacing_rbw: float) -> np.ndarray:
    """rho(|i-j| spacing) for the Gaussian RBW, rho = exp(-2 ln2 x^2) [docs/references.md §6a]."""
    lags = np.subtract.outer(np.arange(n), np.arange(n))
    return np.exp(-2 * math.log(2) * (lags * spacing_rbw) ** 2)


def test_band_power_marker():
    s = _marker_settings()
    r = MarkerReading(
        freq_hz=F0,
        kind=MarkerKind.BAND_POWER,
        value_db=_dbm(D_TRUE * 1e6),
        band_hz=1e6,
        settings=s,
        acquisition_time_s=0.3,
    )
    d = density_from_marker(r)
    assert d.density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)  # integrated band: no ENBW
    assert d.bias_correction_db == 0.0 and d.band_hz == 1e6 and d.acquisition_time_s == 0.3
    # the band integrates exactly 1 MHz: 101 points 10 kHz apart, the two end points each
    # standing for half a spacing inside the band
    n = 101
    w = np.ones(n)
    w[[0, -1]] = 0.5
    rel_u = math.sqrt(w @ _gaussian_corr_matrix(n, 0.1) @ w / 40) / w.sum()
    assert d.bins_used == n and d.relative_u == pytest.approx(rel_u, rel=1e-6)
    # radiometer equation: averages x samples x band / B_stat (docs/references.md §7), edge effect
    assert d.independent_samples == pytest.approx(40 * 1e6 / GAUSSIAN.stat_bw_hz(1e5), rel=0.1)


def test_band_power_marker_off_the_grid_uses_the_points_the_band_touches():
    s = _marker_settings()
    f = F0 + 3.7e3  # band edges inside cells, 3.7 kHz off the grid
    r = MarkerReading(
        freq_hz=f,
        kind=MarkerKind.BAND_POWER,
        value_db=_dbm(D_TRUE * 55e3),
        band_hz=55e3,
        settings=s,
    )
    d = density_from_marker(r)
    assert d.density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    # cells [f_i - 5 kHz, f_i + 5 kHz] against the band f +/- 27.5 kHz: shares in 10 kHz units
    lo, hi = f - 27.5e3, f + 27.5e3
    grid = s.frequencies_hz()
    share = np.clip(np.minimum(grid + 5e3, hi) - np.maximum(grid - 5e3, lo), 0, None) / 1e4
    w = share[share > 0]
    assert d.bins_used == w.size == 6
    rel_u = math.sqrt(w @ _gaussian_corr_matrix(w.size, 0.1) @ w / 40) / w.sum()
    assert d.relative_u == pytest.approx(rel_u, rel=1e-6)


def test_band_power_marker_log_scale_bias():
    s = _marker_settings(
        detector=Detector.SAMPLE, averaging_scale=LOG, averages=20, detector_samples=None
    )
    ratio = special.gamma(1 + 1 / 20) ** 20  # what a log-averaged point reads, E[G]/mu
    raw = MarkerReading(
        freq_hz=F0,
        kind=MarkerKind.BAND_POWER,
        band_hz=2e6,
        settings=s,
        value_db=_dbm(D_TRUE * 2e6 * ratio),
    )
    assert density_from_marker(raw).density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    fixed = raw.model_copy(update={"instrument_corrected": True, "value_db": _dbm(D_TRUE * 2e6)})
    assert density_from_marker(fixed).density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    assert density_from_marker(fixed).bias_correction_db == 0.0


def test_noise_density_marker():
    s = _marker_settings(averages=25, detector_samples=2)
    enbw = s.enbw_hz
    corrected = MarkerReading(
        freq_hz=F0,
        kind=MarkerKind.NOISE_DENSITY,
        settings=s,
        value_db=_dbm(D_TRUE),
        instrument_corrected=True,
    )
    d = density_from_marker(corrected)
    assert d.density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    assert d.relative_u == pytest.approx(1 / math.sqrt(50), rel=1e-12)  # one point, N k = 50
    assert d.band_hz == pytest.approx(enbw) and d.bins_used == 1
    # uncorrected: point power in the RBW normalised by the nominal RBW -> x RBW / ENBW
    raw = corrected.model_copy(
        update={"instrument_corrected": False, "value_db": _dbm(D_TRUE * enbw / 1e5)}
    )
    assert density_from_marker(raw).density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    # uncorrected log-averaged sample detector: also the log-average bias
    s_log = _marker_settings(
        detector=Detector.SAMPLE, averaging_scale=LOG, averages=20, detector_samples=None
    )
    ratio = special.gamma(1 + 1 / 20) ** 20
    raw_log = MarkerReading(
        freq_hz=F0,
        kind=MarkerKind.NOISE_DENSITY,
        settings=s_log,
        value_db=_dbm(D_TRUE * enbw / 1e5 * ratio),
    )
    d_log = density_from_marker(raw_log)
    assert d_log.density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    assert d_log.bias_correction_db == pytest.approx(-10 * math.log10(ratio))


def test_marker_refusals_and_variance_bound():
    s = _marker_settings()
    with pytest.raises(InputError, match="reading.band_hz"):
        density_from_marker(
            MarkerReading(freq_hz=F0, kind=MarkerKind.BAND_POWER, value_db=-80.0, settings=s)
        )
    peak = _marker_settings(detector=Detector.PEAK)
    with pytest.raises(InputError) as info:
        density_from_marker(
            MarkerReading(
                freq_hz=F0,
                kind=MarkerKind.NOISE_DENSITY,
                value_db=-140.0,
                settings=peak,
                instrument_corrected=True,
            )
        )
    assert info.value.field == "reading.settings.detector"
    unknown = _marker_settings(averaging_scale=LOG, detector_samples=None)
    raw = MarkerReading(
        freq_hz=F0, kind=MarkerKind.NOISE_DENSITY, value_db=-140.0, settings=unknown
    )
    with pytest.raises(InputError, match="reading.settings.detector_samples"):
        density_from_marker(raw)
    # corrected by the instrument: no bias needed; variance bounded by single-sample values
    d = density_from_marker(raw.model_copy(update={"instrument_corrected": True}))
    g = special.gamma
    assert d.relative_u**2 == pytest.approx(g(1 + 2 / 10) ** 10 / g(1 + 1 / 10) ** 20 - 1, rel=1e-9)


def test_single_point_trace_uses_its_averages():
    # one point, N k samples: relative u = 1 / sqrt(N k) (docs/references.md §6c); no scatter check
    s = AcquisitionSettings(
        center_hz=F0,
        span_hz=0.0,
        rbw_hz=1e5,
        detector=Detector.RMS,
        averaging_scale=POW,
        averages=50,
        points=1,
        detector_samples=8,
    )
    trace = Trace(freq_hz=[F0], values=[_dbm(D_TRUE * s.enbw_hz)], settings=s)
    d = estimate_density(trace)
    assert d.density_w_per_hz == pytest.approx(D_TRUE, rel=1e-12)
    assert d.relative_u == pytest.approx(1 / math.sqrt(400), rel=1e-12)
    assert d.scatter_ratio is None and d.bins_used == 1


@given(offset_db=st.floats(-60, 60), scale=st.sampled_from([POW, LOG, VOLT]))
@settings(max_examples=25, deadline=None)
def test_estimate_scales_with_the_level(offset_db, scale):
    # a level offset of the whole trace scales density and uncertainty, nothing else
    trace = _LEVEL_TRACES[scale]
    shifted = trace.model_copy(update={"values": trace.values + offset_db})
    a, b = estimate_density(trace), estimate_density(shifted)
    factor = 10 ** (offset_db / 10)
    assert b.density_w_per_hz == pytest.approx(a.density_w_per_hz * factor, rel=1e-9)
    assert b.relative_u == pytest.approx(a.relative_u, rel=1e-9)
    assert b.excluded_freq_hz == a.excluded_freq_hz and b.bins_used == a.bins_used


_LEVEL_TRACES = {
    sc: synthetic_traces(seed=30, scale=sc, detector=Detector.SAMPLE)[0] for sc in (POW, LOG, VOLT)
}

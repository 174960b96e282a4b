"""Several traces combined as one long average: exact against a brute-force single average,
and unbiased after the model's correction for the total count (over seeds)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector, Trace
from noisebench.errors import InputError
from noisebench.science.detection import trace_average_model
from noisebench.science.filters import FilterKind, RbwFilter
from noisebench.science.trace_combine import combine_traces, split_averages

POINTS = 64


def _settings(scale: AveragingScale, averages: int) -> AcquisitionSettings:
    return AcquisitionSettings(
        center_hz=1e9,
        span_hz=10e6,
        rbw_hz=1e6,
        rbw_filter=RbwFilter(kind=FilterKind.GAUSSIAN),
        detector=Detector.SAMPLE,
        averaging_scale=scale,
        averages=averages,
        points=POINTS,
        detector_samples=1.0,
    )


def _instrument_statistic(samples: np.ndarray, scale: AveragingScale) -> np.ndarray:
    """What an equal-weight averaging analyzer reports (dBm) for samples (averages x points) of
    linear power in mW: the scale's mean over the averages."""
    if scale is AveragingScale.LOG_POWER:
        return np.mean(10 * np.log10(samples), axis=0)
    if scale is AveragingScale.VOLTAGE:
        return 10 * np.log10(np.mean(np.sqrt(samples), axis=0) ** 2)
    return 10 * np.log10(np.mean(samples, axis=0))


def _trace(samples: np.ndarray, scale: AveragingScale) -> Trace:
    return Trace(
        freq_hz=np.linspace(995e6, 1005e6, POINTS),
        values=_instrument_statistic(samples, scale),
        settings=_settings(scale, samples.shape[0]),
        acquisition_time_s=0.01 * samples.shape[0],
    )


@pytest.mark.parametrize("scale", list(AveragingScale))
def test_combined_traces_equal_one_long_average_exactly(scale):
    """Brute-force reference: the same 35 samples per point averaged at once."""
    rng = np.random.default_rng(7)
    samples = rng.exponential(1e-9, size=(35, POINTS))  # mW, one exponential sample each
    parts = [samples[:12], samples[12:24], samples[24:]]  # 12 + 12 + 11 averages
    combined = combine_traces([_trace(p, scale) for p in parts])
    reference = _trace(samples, scale)
    np.testing.assert_allclose(combined.values, reference.values, rtol=0, atol=1e-9)
    assert combined.settings.averages == 35
    assert combined.acquisition_time_s == pytest.approx(0.35)


def test_log_scale_mean_of_linear_powers_is_the_wrong_combination():
    """Averaging the per-trace powers keeps the bias of a 10-value geometric mean: over 4000
    points x seeds it reads 0.17 dB above the 20-value model (the derivation in the module
    doc), far outside the spread of the estimate; the dB mean is on the model."""
    rng = np.random.default_rng(11)
    n_points, n_k = 4000, 10
    samples = rng.exponential(1.0, size=(2 * n_k, n_points))
    traces = [samples[:n_k], samples[n_k:]]
    right = np.mean([np.mean(np.log(t), axis=0) for t in traces], axis=0)
    wrong = np.log(np.mean([np.exp(np.mean(np.log(t), axis=0)) for t in traces], axis=0))
    model = trace_average_model(AveragingScale.LOG_POWER, 2 * n_k)
    expected_db = model.bias_db  # 10 log10 Gamma(1 + 1/20)^20 = -2.332 dB
    sd_db = 10 / math.log(10) * math.sqrt(model.relative_variance() / n_points)
    right_db = 10 * math.log10(np.mean(np.exp(right)))
    wrong_db = 10 * math.log10(np.mean(np.exp(wrong)))
    assert expected_db == pytest.approx(-2.3324, abs=1e-3)  # closed form (detection.py)
    assert abs(right_db - expected_db) < 4 * sd_db
    assert wrong_db - expected_db == pytest.approx(0.1665, abs=4 * sd_db + 0.01)


@pytest.mark.parametrize("scale", list(AveragingScale))
def test_combined_trace_corrected_for_the_total_count_is_unbiased_over_seeds(scale):
    """3 traces of 4 averages; the model's count-12 correction makes the mean power unbiased
    (z within 4 sigma of the seed-to-seed spread, 40 seeds x 64 points)."""
    model = trace_average_model(scale, 12)
    estimates = []
    for seed in range(40):
        rng = np.random.default_rng(1000 + seed)
        samples = rng.exponential(1.0, size=(12, POINTS))
        combined = combine_traces([_trace(samples[i : i + 4], scale) for i in (0, 4, 8)])
        estimates.append(10 ** (combined.values / 10) / model.mean_ratio())
    values = np.concatenate(estimates)
    sd = math.sqrt(model.relative_variance() / values.size)
    assert abs(values.mean() - 1.0) < 4 * sd


def test_split_averages_fewest_traces_within_the_maximum():
    assert split_averages(30_000, 10_000) == [10_000, 10_000, 10_000]
    assert split_averages(15_360, 10_000) == [7680, 7680]
    assert split_averages(7, 3) == [3, 2, 2]
    assert split_averages(5, None) == [5]
    assert sum(split_averages(123_457, 10_000)) == 123_457


def test_combine_refuses_traces_with_other_settings():
    rng = np.random.default_rng(3)
    a = _trace(rng.exponential(1.0, size=(4, POINTS)), AveragingScale.POWER)
    b = _trace(rng.exponential(1.0, size=(4, POINTS)), AveragingScale.LOG_POWER)
    with pytest.raises(InputError, match="only the average count may differ"):
        combine_traces([a, b])

"""The sampled-data analyzer: densities vs the simulator's truth, artefacts, errors.

The simulated receiver (noisebench.sims.samples) draws its samples from the bench models in the
frequency domain, independently of the Welch code under test.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.constants import k as BOLTZMANN

from noisebench.bench.acquisition import AcquisitionRequest
from noisebench.errors import InputError, MeasurementError
from noisebench.sampled import (
    SampleBlock,
    SampledAnalyzer,
    SourceInfo,
    open_registered,
    register_source,
    unregister_source,
)
from noisebench.science.estimator import estimate_densities
from noisebench.sims.bench import Path, SimulatedBench
from noisebench.sims.samples import ReceiverSpec, SimSampleReceiver

F_HZ = 1.0e9


def _request(span=400e3, rbw=10e3, averages=400, center=F_HZ):
    return AcquisitionRequest(center_hz=center, span_hz=span, rbw_hz=rbw, averages=averages)


@pytest.fixture()
def sim_rx():
    sim = SimulatedBench.from_scenario("demo-lna", seed=3, ideal=True)
    return sim, SimSampleReceiver(sim, seed=3)


@pytest.mark.parametrize("path", [Path.THROUGH, Path.DUT, Path.TERMINATION])
def test_density_matches_the_bench_truth(sim_rx, path):
    sim, rx = sim_rx
    analyzer = SampledAnalyzer(rx)
    analyzer.configure(_request())
    sim.set_path(path)
    truth = sim.truth(F_HZ)
    states = (False,) if path is Path.TERMINATION else (False, True)
    for hot in states:
        sim.noise_source.set_hot(hot)
        sim.clock.advance(1.0)
        d = estimate_densities(analyzer.acquire_trace(), [F_HZ], 390e3)[0]
        name = "hot" if hot else "cold"
        expected = truth[f"density_{path.value}_{name}_w_per_hz"][0] + BOLTZMANN * rx.spec.te_k()
        z = (d.density_w_per_hz - expected) / d.u_density_w_per_hz
        assert abs(z) < 4.5, (path, hot, z)  # 4.5 sigma: 7e-6 two-sided per check


def test_settings_carry_welch_statistics(sim_rx):
    from noisebench.sampled.welch import equivalent_samples, plan_segments

    _, rx = sim_rx
    analyzer = SampledAnalyzer(rx, window="blackmanharris")
    s = analyzer.configure(_request(averages=50))
    plan = plan_segments(rx.spec.sample_rate_hz, 10e3, 50, window="blackmanharris")
    assert s.averages == 50
    assert s.detector_samples * 50 == pytest.approx(
        equivalent_samples("blackmanharris", plan.length, plan.step, 50), rel=1e-12
    )
    assert plan.step == round(plan.length / 3)  # 2/3 overlap for this window
    assert s.rbw_filter.window == "blackmanharris"
    assert s.rbw_hz == pytest.approx(plan.rbw_hz) and s.rbw_hz <= 10e3
    assert s.sweep_time_s == pytest.approx(plan.samples / rx.spec.sample_rate_hz)


def test_uncertainty_is_honest_over_seeds():
    # coverage of the stated u over independent captures (fixed seeds): the normalised errors
    # must have unit variance within the chi-square sampling limits
    sim = SimulatedBench.from_scenario("demo-lna", seed=5, ideal=True)
    rx = SimSampleReceiver(sim, seed=5)
    analyzer = SampledAnalyzer(rx)
    analyzer.configure(_request(averages=40))
    sim.set_path(Path.THROUGH)
    expected = sim.truth(F_HZ)["density_through_cold_w_per_hz"][0] + BOLTZMANN * rx.spec.te_k()
    z = []
    for _ in range(120):
        d = estimate_densities(analyzer.acquire_trace(), [F_HZ], 390e3)[0]
        z.append((d.density_w_per_hz - expected) / d.u_density_w_per_hz)
    z = np.asarray(z)
    from scipy import stats

    lo, hi = stats.chi2.ppf([1e-4, 1 - 1e-4], z.size) / z.size
    assert lo < np.mean(z**2) < hi, np.mean(z**2)
    assert abs(np.mean(z)) < 4.0 / math.sqrt(z.size)


class _Fixed:
    """A recording-like source: fixed centre, white noise plus a DC line and imbalance."""

    def __init__(self, dc=0.0, nu=0.0, level=0.01, complex_samples=True, seed=0):
        self.info = SourceInfo(
            identity="fixed",
            sample_rate_hz=1e6,
            tunable=False,
            complex_samples=complex_samples,
            scale_known=True,
        )
        self.rng = np.random.default_rng(seed)
        self.dc, self.nu, self.level = dc, nu, level
        self.center = 50e6

    def center_for(self, center_hz, span_hz):
        return self.center

    def capture(self, request):
        n = request.samples
        r = self.rng
        if self.info.complex_samples:
            s = (r.standard_normal(n) + 1j * r.standard_normal(n)) * math.sqrt(self.level / 2)
            x = s + self.nu * np.conj(s) + self.dc
        else:
            x = r.standard_normal(n) * math.sqrt(self.level)
        return SampleBlock(
            samples=x, sample_rate_hz=1e6, center_hz=self.center, scale_w_per_fs2=1.0
        )

    def close(self):
        pass


def test_lo_leakage_at_the_centre_is_excluded_and_reported():
    src = _Fixed(dc=0.0, level=1e-4, seed=1)
    analyzer = SampledAnalyzer(src)
    analyzer.configure(_request(span=300e3, rbw=5e3, averages=300, center=50e6))
    # LO leakage that is not constant (a slow wander), so subtracting the mean leaves a line
    inner = src.capture

    def wandering(request):
        block = inner(request)
        t = np.arange(block.samples.size) / 1e6
        block.samples = block.samples + 0.01 * np.exp(2j * np.pi * 200.0 * t)
        return block

    src.capture = wandering
    d = estimate_densities(analyzer.acquire_trace(), [50e6], 290e3)[0]
    assert 50e6 in [round(f, 3) for f in d.excluded_freq_hz] or any(
        abs(f - 50e6) < 2e3 for f in d.excluded_freq_hz
    )
    expected = 1e-4 / 1e6
    assert d.density_w_per_hz == pytest.approx(expected, rel=5 * d.relative_u)
    assert analyzer.log[-1].excluded_hz  # the guard is in the capture log
    assert analyzer.summary()["captures_with_lo_guard_in_band"] == 1


def test_iq_imbalance_is_estimated_and_corrected():
    nu = 0.02 * np.exp(0.4j)  # image rejection 20 log10(1/0.02) = 34 dB
    src = _Fixed(nu=nu, seed=2)
    analyzer = SampledAnalyzer(src)
    analyzer.configure(_request(span=300e3, rbw=5e3, averages=300, center=50e6))
    analyzer.acquire_trace()
    irr = analyzer.log[-1].image_rejection_db
    tol_db = 5 * 8.69 * math.sqrt(1 / analyzer.log[-1].samples) / (2 * abs(nu))
    assert irr == pytest.approx(-20 * math.log10(abs(nu)), abs=tol_db)
    assert analyzer.log[-1].iq_corrected


def test_iq_imbalance_of_the_simulated_receiver_is_found(sim_rx):
    sim, rx = sim_rx
    mu, nu = rx.spec.image_coefficients()
    analyzer = SampledAnalyzer(rx)
    analyzer.configure(_request(averages=8000))
    analyzer.acquire_trace()
    n = analyzer.log[-1].samples
    # the circularity of proper noise scatters by sqrt(1/N) rms along any direction; the image
    # estimate |c| = 2 beta then by that relative to 2 beta: 8.69 dB per unit in 20 log10
    beta = abs(nu) / abs(mu)
    tol_db = 5 * 8.69 * math.sqrt(1 / n) / (2 * beta)
    # reference: the rail model of sims.samples: IRR = |mu|^2 / |nu|^2
    assert analyzer.log[-1].image_rejection_db == pytest.approx(
        20 * math.log10(1 / beta), abs=tol_db
    )
    assert tol_db < 1.0


def test_balanced_noise_is_not_corrected():
    analyzer = SampledAnalyzer(_Fixed(seed=4))
    analyzer.configure(_request(span=300e3, rbw=5e3, averages=100, center=50e6))
    analyzer.acquire_trace()
    assert analyzer.log[-1].iq_corrected is False
    assert analyzer.log[-1].image_rejection_db is None


def test_clipped_capture_is_refused(sim_rx):
    sim, rx = sim_rx
    loud = SimSampleReceiver(sim, ReceiverSpec(full_scale_dbm=-100.0), seed=1)
    analyzer = SampledAnalyzer(loud)
    analyzer.configure(_request(averages=10))
    with pytest.raises(MeasurementError, match="at full scale .clipped."):
        analyzer.acquire_trace()


def test_band_beyond_the_antialias_passband_is_refused():
    analyzer = SampledAnalyzer(_Fixed())
    with pytest.raises(InputError, match="anti-alias roll-off"):
        analyzer.configure(_request(span=900e3, rbw=5e3, averages=10, center=50e6))


def test_real_samples_give_a_one_sided_density():
    src = _Fixed(complex_samples=False, level=1e-3, seed=6)
    analyzer = SampledAnalyzer(src)
    analyzer.configure(_request(span=300e3, rbw=5e3, averages=300, center=50e6))
    d = estimate_densities(analyzer.acquire_trace(), [50e6], 290e3)[0]
    # real white noise of mean square s2 has one-sided density 2 s2 / fs
    assert d.density_w_per_hz == pytest.approx(2e-3 / 1e6, rel=5 * d.relative_u)
    assert d.excluded_freq_hz == []


def test_registered_source_round_trip():
    register_source("test-white", lambda: _Fixed())
    try:
        src = open_registered("test-white")
        assert src.info.identity == "fixed"
    finally:
        unregister_source("test-white")
    with pytest.raises(InputError, match="no sample source registered as 'test-white'"):
        open_registered("test-white")
    register_source("test-bad", lambda: object())
    try:
        with pytest.raises(InputError, match="has no info / capture"):
            open_registered("test-bad")
    finally:
        unregister_source("test-bad")


def test_source_that_lies_about_its_rate_is_caught():
    src = _Fixed()
    inner = src.capture

    def wrong(request):
        block = inner(request)
        block.sample_rate_hz = 2e6
        return block

    src.capture = wrong
    analyzer = SampledAnalyzer(src)
    analyzer.configure(_request(span=300e3, rbw=5e3, averages=10, center=50e6))
    with pytest.raises(MeasurementError, match="returned 2e.06 samples/s, not the declared 1e.06"):
        analyzer.acquire_trace()


def test_block_with_nan_is_one_clear_error():
    with pytest.raises(InputError, match="samples: hold NaN"):
        SampleBlock(samples=np.array([1.0, np.nan]), sample_rate_hz=1e6, center_hz=1e6)


def test_estimator_leaves_out_points_the_instrument_marks():
    from noisebench.bench.acquisition import AcquisitionSettings, Detector, Trace, TraceUnit
    from noisebench.science.estimator import estimate_density

    settings = AcquisitionSettings(
        center_hz=1e6,
        span_hz=100e3,
        rbw_hz=1e3,
        detector=Detector.RMS,
        averaging_scale="power",
        averages=100,
        points=101,
    )
    f = settings.frequencies_hz()
    values = np.full(101, 1e-18)
    values[48:53] = 1e-15  # a line the instrument marked (no spur search)
    mask = np.zeros(101, bool)
    mask[48:53] = True
    trace = Trace(
        freq_hz=f, values=values, unit=TraceUnit.W_PER_HZ, settings=settings, excluded=mask
    )
    d = estimate_density(trace, reject_spurs=False)
    assert d.density_w_per_hz == pytest.approx(1e-18)
    assert d.bins_used == 96
    assert d.excluded_freq_hz == [pytest.approx(1e6)]
    with pytest.raises(ValueError, match="trace.excluded: has 3 flags for 101 points"):
        Trace(
            freq_hz=f,
            values=values,
            unit=TraceUnit.W_PER_HZ,
            settings=settings,
            excluded=[True, False, True],
        )


def test_module_factory_address(tmp_path, monkeypatch):
    (tmp_path / "lab_rx_for_test.py").write_text(
        "from noisebench.sampled import SourceInfo\n"
        "class Rx:\n"
        "    info = SourceInfo(identity='lab', sample_rate_hz=1e6, tunable=True)\n"
        "    def capture(self, request):\n"
        "        raise RuntimeError\n"
        "    def close(self):\n"
        "        pass\n"
    )
    monkeypatch.syspath_prepend(str(tmp_path))
    assert open_registered("lab_rx_for_test:Rx").info.identity == "lab"
    with pytest.raises(InputError, match="has no callable 'Nope'"):
        open_registered("lab_rx_for_test:Nope")
    with pytest.raises(InputError, match="cannot import 'no_such_module_xyz'"):
        open_registered("no_such_module_xyz:Rx")


def test_real_sampling_receiver_matches_the_bench_truth():
    sim = SimulatedBench.from_scenario("demo-lna", seed=3, ideal=True)
    rx = SimSampleReceiver(sim, ReceiverSpec(complex_samples=False, sample_rate_hz=4e6), seed=3)
    analyzer = SampledAnalyzer(rx)
    analyzer.configure(_request(averages=400))
    sim.set_path(Path.THROUGH)
    for hot in (False, True):
        sim.noise_source.set_hot(hot)
        sim.clock.advance(1.0)
        d = estimate_densities(analyzer.acquire_trace(), [F_HZ], 390e3)[0]
        name = "hot" if hot else "cold"
        expected = sim.truth(F_HZ)[f"density_through_{name}_w_per_hz"][0]
        expected += BOLTZMANN * rx.spec.te_k()
        assert abs(d.density_w_per_hz - expected) < 4.5 * d.u_density_w_per_hz
        assert d.excluded_freq_hz == []  # a real capture has no LO line in its band


def test_image_of_a_tone_is_removed_by_the_correction():
    # a tone at +100 kHz through a receiver with 26 dB image rejection: its image at -100 kHz
    # stands far above the noise before the correction and is gone after it
    rng = np.random.default_rng(9)
    fs, n = 1e6, 1 << 18
    t = np.arange(n) / fs
    nu = 0.05 * np.exp(0.3j)
    s = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(1e-4 / 2)
    s = s + 0.1 * np.exp(2j * np.pi * 100e3 * t)  # tone at -20 dBFS
    x = s + nu * np.conj(s)

    class Src(_Fixed):
        def capture(self, request):
            return SampleBlock(
                samples=x[: request.samples], sample_rate_hz=fs, center_hz=50e6, scale_w_per_fs2=1.0
            )

    image_hz = 50e6 - 100e3
    levels = {}
    for corrected in (False, True):
        analyzer = SampledAnalyzer(Src(), iq_correction=corrected)
        analyzer.configure(_request(span=500e3, rbw=2e3, averages=300, center=50e6))
        trace = analyzer.acquire_trace()
        k = int(np.argmin(np.abs(trace.freq_hz - image_hz)))
        floor = float(np.median(trace.values))
        levels[corrected] = trace.values[k - 2 : k + 3].max() / floor
    # the image line: |nu|^2 0.1^2 / (ENBW 1.5 bins * 1377 Hz) = 1.2e-8 /Hz over a floor of
    # 1e-4 / fs = 1e-10 /Hz: about 120x
    assert levels[False] > 60
    assert levels[True] < 2.0  # noise only (a bin's maximum of five stays below 2x the median)


def test_tone_scale_calibration_recovers_the_receiver_scale(sim_rx):
    from noisebench.sims.samples import calibrate_tone_scale

    _, rx = sim_rx
    cal = calibrate_tone_scale(rx, 1.5e9, -60.0, u_level_db=0.1)
    # the simulated receiver's true scale (its spec); the noise part of u is tiny at 58 dB SNR
    assert cal.scale_w_per_fs2 == pytest.approx(rx.spec.scale_w_per_fs2, rel=5 * cal.u_rel)
    assert cal.u_db == pytest.approx(math.hypot(4.3429 * cal.u_rel, 0.1), rel=1e-3)
    analyzer = SampledAnalyzer(rx, scale=cal)
    assert analyzer.level_uncertainty_db == cal.u_db
    assert analyzer.full_scale_dbm == pytest.approx(-45.0, abs=0.01)


def test_noise_pair_scale_calibration(sim_rx):
    from noisebench.sampled import scale_from_noise_pair
    from noisebench.sampled.source import CaptureRequest

    sim, rx = sim_rx
    sim.set_path(Path.THROUGH)
    truth = sim.truth(F_HZ)
    blocks = {}
    for hot in (False, True):
        sim.noise_source.set_hot(hot)
        sim.clock.advance(1.0)
        blocks[hot] = rx.capture(CaptureRequest(F_HZ, 0.0, rx.spec.sample_rate_hz, 1 << 20))
    t_hot = truth["density_through_hot_w_per_hz"][0] / BOLTZMANN
    t_cold = truth["density_through_cold_w_per_hz"][0] / BOLTZMANN
    cal = scale_from_noise_pair(blocks[True], blocks[False], t_hot, t_cold, usable_fraction=0.7)
    assert cal.scale_w_per_fs2 == pytest.approx(rx.spec.scale_w_per_fs2, rel=5 * cal.u_rel)
    assert cal.u_db is None  # the temperatures' uncertainty was not given: unknown, not zero


class _ClippedBelowFullScale(_Fixed):
    """Noise hard-limited at 0.15 on each rail while the block declares full scale 1.0 (a
    wrong full-scale in the metadata, or a limiter ahead of the converter)."""

    def capture(self, request):
        block = super().capture(request)
        x = block.samples
        limited = np.clip(x.real, -0.15, 0.15) + 1j * np.clip(x.imag, -0.15, 0.15)
        return SampleBlock(
            samples=limited, sample_rate_hz=1e6, center_hz=self.center, scale_w_per_fs2=1.0
        )


def test_a_capture_clipped_below_its_declared_full_scale_is_refused():
    # per-rail sigma sqrt(0.005) = 0.0707: the limit at 0.15 (2.1 sigma) clips ~3.4 % of the
    # samples on each rail and lowers the noise power by ~4 %, while nothing reaches 1.0
    analyzer = SampledAnalyzer(_ClippedBelowFullScale(level=0.01, seed=2))
    analyzer.configure(_request(span=300e3, rbw=5e3, averages=50, center=50e6))
    with pytest.raises(MeasurementError, match="clipped below the declared full scale"):
        analyzer.acquire_trace()


@pytest.mark.parametrize("seed", range(5))
def test_unclipped_noise_never_piles_up(seed):
    # Gaussian noise (float, and quantised to int16 codes at 2000 codes rms): its largest rail
    # magnitude occurs once or twice, never PILEUP_MIN_COUNT times
    from noisebench.sampled import artefacts

    r = np.random.default_rng(seed)
    x = r.standard_normal(400_000) + 1j * r.standard_normal(400_000)
    assert artefacts.rail_pileup_fraction(0.01 * x) == 0.0
    assert artefacts.rail_pileup_fraction(np.round(2000 * x) / 32768) == 0.0
    clipped = np.clip(x.real, -2.5, 2.5)
    assert artefacts.rail_pileup_fraction(clipped) == pytest.approx(
        np.mean(np.abs(x.real) >= 2.5), rel=1e-12
    )

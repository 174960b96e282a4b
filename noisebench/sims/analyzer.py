"""The simulated spectrum analyzer: rounds settings like an instrument, synthesises noise traces.

``SimAnalyzer`` implements :class:`noisebench.bench.instruments.Analyzer`. It asks its input (the
bench's signal chain, see :class:`AnalyzerInput`) what reaches its connector, adds its own noise
(:class:`~noisebench.sims.models.AnalyzerFrontEnd`: attenuation raises the floor, the preamp
lowers it), applies mixer compression, IF overload against the reference level and its absolute
amplitude error, then draws the averaged trace with
:func:`~noisebench.sims.noisegen.generate_trace`.

Timing (simulated clock): a swept trace takes ``ST = k * span / (RBW * min(RBW, VBW))`` with
``k = sweep_time_factor`` (2.5, common practice), at least ``min_sweep_time_s``; zero span takes
the requested sweep time; FFT mode takes one frame (``B3 in bins / RBW``) per segment of
``fft_segment_span_hz``. Each sweep adds ``sweep_overhead_s``; each acquisition starts with a
retune settle of ``retune_settle_rbw_periods / RBW``.

Detector samples per point (the instrument reports them): swept and zero span
``round(B_stat * ST / points)``, FFT ``round(spacing / B_stat)``, at least 1; SAMPLE takes 1.
A video bandwidth below the RBW smooths on the averaging scale over
``round(B_stat / (pi * VBW))`` samples (one-pole video filter, averaging time ``1/(pi VBW)``):
a SAMPLE point is then the average of those samples on the averaging scale, as for AVERAGE.

Markers (:func:`marker_from_trace`) integrate the trace over exactly their band (each point
weighted by the Hz of the band its cell covers). A noise marker also removes the detector bias of
the applied settings (the instrument knows its detector) and divides by the ENBW; it says so with
``instrument_corrected``.

Independence: the filter's ENBW, statistical bandwidth and response come from
:mod:`noisebench.sims.rbw_shapes`, the detector bias from :func:`detector_mean_ratio` and the
marker weights from :func:`cell_weights_hz`, all derived here for the simulator and never taken
from the estimator or ``science/`` (``tests/test_sim_independence.py``).

Size: one simulated instrument: setting rounding, timing, trace synthesis and the markers
computed from its own traces.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from typing import Any, Protocol

import numpy as np
from pydantic import ValidationError

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    FilterKind,
    MarkerKind,
    MarkerReading,
    RbwFilter,
    SweepMode,
    Trace,
    TraceUnit,
)
from noisebench.bench.capabilities import NoiseDriveOutput
from noisebench.bench.instruments import Analyzer
from noisebench.errors import InputError
from noisebench.sims import rbw_shapes
from noisebench.sims.clock import SimClock
from noisebench.sims.models import (
    BOLTZMANN_J_PER_K,
    AnalyzerFrontEnd,
    SpectrumAtInput,
    dbm_to_w,
    w_to_dbm,
)
from noisebench.sims.noisegen import Axis, TraceRecipe, field_kernel, generate_trace
from noisebench.sims.scenario import AnalyzerSpec
from noisebench.units import format_frequency, format_frequency_range

logger = logging.getLogger(__name__)

MAX_SWEEP_TIME_S = 10_000.0
MIN_ZERO_SPAN_TIME_PER_POINT_S = 1e-6
REF_LEVEL_RANGE_DBM = (-130.0, 30.0)
FLOOR_W = 1e-30  # a trace value never reads below -270 dBm
TONE_REACH_RBW = 30.0  # tones further than this many RBWs from every point are not drawn


class AnalyzerInput(Protocol):
    """What the analyzer's connector is attached to (implemented by the bench)."""

    def spectrum(self, freq_hz: np.ndarray) -> SpectrumAtInput:
        """Delivered noise temperatures and tones at ``freq_hz`` for the current connections."""

    def hot_fraction(self, t_s: np.ndarray) -> np.ndarray:
        """Noise-source state (0 cold .. 1 hot) at simulated times ``t_s``."""

    def steady_hot_fraction(self, t_start_s: float, t_stop_s: float) -> float | None:
        """The state if it does not change between the two times, else None."""


def make_filter(**fields: object) -> RbwFilter:
    """An :class:`RbwFilter`; a refused shape raises the validator's InputError, not pydantic's."""
    try:
        return RbwFilter.model_validate(fields)
    except ValidationError as exc:
        for err in exc.errors():
            inner = (err.get("ctx") or {}).get("error")
            if isinstance(inner, InputError):
                raise inner from None
        raise InputError("rbw_filter", str(exc), fix="check the filter shape") from None


def round_125(value: float, lo: float, hi: float) -> float:
    """Nearest value (in log) of the 1-2-3-5 x 10^n sequence, clipped to [lo, hi]."""
    value = min(max(float(value), lo), hi)
    decade = math.floor(math.log10(value))
    cands = [m * 10.0**e for e in (decade - 1, decade, decade + 1) for m in (1, 2, 3, 5)]
    cands = [c for c in cands if lo * (1 - 1e-12) <= c <= hi * (1 + 1e-12)] or [value]
    best = min(cands, key=lambda c: abs(math.log(c / value)))
    return float(f"{best:.6g}")


def round_step(value: float, step: float, lo: float, hi: float) -> float:
    """Nearest multiple of ``step`` (halves round up), clipped to [lo, hi]."""
    return float(min(max(math.floor(float(value) / step + 0.5) * step, lo), hi))


class SimAnalyzer(Analyzer, NoiseDriveOutput):
    """A spectrum analyzer on the simulated bench (see module docstring for the physics)."""

    # the power-on state (set by _apply_power_on_state, called from __init__)
    _filter_kind: FilterKind
    _filter_poles: int | None
    _fft_window: str
    _noise_drive: bool
    _request: AcquisitionRequest
    _settings: AcquisitionSettings | None

    def __init__(
        self,
        spec: AnalyzerSpec,
        front_end: AnalyzerFrontEnd,
        clock: SimClock,
        source: AnalyzerInput,
        rng: np.random.Generator,
        on_noise_drive: Callable[[bool], None] | None = None,
    ) -> None:
        super().__init__()
        self.spec = spec
        self.front_end = front_end
        self.clock = clock
        self.source = source
        self.rng = rng
        self.exact_statistics = False  # True: draw every look (slow, for validation)
        self._on_noise_drive = on_noise_drive
        self.overload_events: list[dict] = []
        self.last_trace: Trace | None = None
        self._closed = False
        self._apply_power_on_state()

    # ------------------------------------------------------------ identity / state ----------

    @property
    def identity(self) -> str:
        return self.spec.identity

    @property
    def max_input_power_dbm(self) -> float:
        return self.spec.max_input_power_dbm

    @property
    def max_averages_per_trace(self) -> int:
        """The scenario's ``max_averages``: more in one trace are clamped to it."""
        return int(self.spec.max_averages)

    @property
    def settings(self) -> AcquisitionSettings | None:
        return self._settings

    @property
    def request(self) -> AcquisitionRequest:
        """The request the current settings came from (what a SCPI layer edits field by field)."""
        return self._request

    @property
    def noise_drive_on(self) -> bool:
        """State of the analyzer's noise-source drive output."""
        return self._noise_drive

    def set_noise_drive(self, on: bool) -> None:
        """Switch the analyzer's noise-source drive output (the source follows on the clock)."""
        with self.lock:
            self._noise_drive = bool(on)
            if self._on_noise_drive is not None:
                self._on_noise_drive(self._noise_drive)

    @property
    def filter_poles(self) -> int | None:
        return self._filter_poles if self._filter_kind is FilterKind.SYNCHRONOUS else None

    @property
    def fft_window(self) -> str:
        return self._fft_window

    def set_filter_shape(self, kind: FilterKind | str, poles: int | None = None) -> None:
        """Choose the swept-mode RBW filter: Gaussian, or synchronous with ``poles`` stages."""
        kind = FilterKind(kind)
        if kind is FilterKind.FFT:
            raise InputError(
                "filter_kind",
                "FFT filtering is chosen with the sweep mode",
                fix="set mode=fft in the request, or use gaussian/synchronous",
            )
        if kind is FilterKind.SYNCHRONOUS:
            poles = int(poles or self._filter_poles or 4)
            make_filter(kind=kind, poles=poles)  # validates
            self._filter_poles = poles
        with self.lock:
            self._filter_kind = kind
            self.configure(self._request)

    def set_fft_window(self, window: str) -> None:
        """Window of FFT mode (a scipy.signal window name)."""
        make_filter(kind=FilterKind.FFT, window=window)  # validates the name
        with self.lock:
            self._fft_window = window
            self.configure(self._request)

    def default_request(self) -> AcquisitionRequest:
        """Power-on / reset settings."""
        return AcquisitionRequest(
            center_hz=1e9,
            span_hz=10e6,
            rbw_hz=1e6,
            detector=Detector.RMS,
            averaging_scale=AveragingScale.POWER,
            averages=1,
            points=1001,
            ref_level_dbm=0.0,
            attenuation_db=self.spec.default_attenuation_db,
            preamp=False,
        )

    def reset(self) -> None:
        """Back to the power-on state (settings, filter shape, noise drive off)."""
        with self.lock:
            self._apply_power_on_state()

    def _apply_power_on_state(self) -> None:
        self._filter_kind = FilterKind(self.spec.filter_kind)
        self._filter_poles = self.spec.filter_poles
        self._fft_window = self.spec.fft_window
        self._noise_drive = False
        if self._on_noise_drive is not None:
            self._on_noise_drive(False)
        self._settings = None
        self._request = self.default_request()
        self._settings = self._apply(self._request)

    def close(self) -> None:
        """Noise drive off (safe state). Idempotent; the simulated instrument stays usable."""
        with self.lock:
            if self._noise_drive:
                self.set_noise_drive(False)
            self._closed = True

    # ------------------------------------------------------------ configuration -------------

    def configure(self, request: AcquisitionRequest) -> AcquisitionSettings:
        """Apply ``request`` (rounded and clipped as an instrument would); return what applied."""
        with self.lock:
            settings = self._apply(request)
            self._request = request
            self._settings = settings
            logger.debug("configured %s", settings)
            return settings

    def _current(self, name: str, default: Any) -> Any:
        return getattr(self._settings, name) if self._settings is not None else default

    def _apply(self, req: AcquisitionRequest) -> AcquisitionSettings:
        sp = self.spec
        if not sp.min_freq_hz <= req.center_hz <= sp.max_freq_hz:
            raise InputError(
                "center_hz",
                f"{format_frequency(req.center_hz)} is outside the analyzer's "
                f"range {format_frequency_range(sp.min_freq_hz, sp.max_freq_hz)}",
                fix="choose a centre frequency inside the range",
            )
        half = min(
            req.span_hz / 2.0, req.center_hz - sp.min_freq_hz, sp.max_freq_hz - req.center_hz
        )
        span = 2.0 * half
        rbw = round_125(req.rbw_hz, sp.min_rbw_hz, sp.max_rbw_hz)
        vbw = rbw if req.vbw_hz is None else round_125(req.vbw_hz, 1.0, 10.0 * sp.max_rbw_hz)
        points = int(min(max(req.points, 1), sp.max_points))
        averages = int(min(max(req.averages, 1), sp.max_averages))
        mode = req.mode if span > 0 else SweepMode.SWEPT
        attenuation = round_step(
            self._current("attenuation_db", sp.default_attenuation_db)
            if req.attenuation_db is None
            else req.attenuation_db,
            sp.attenuation_step_db,
            0.0,
            sp.max_attenuation_db,
        )
        ref = (
            self._current("ref_level_dbm", 0.0) if req.ref_level_dbm is None else req.ref_level_dbm
        )
        ref = round(min(max(float(ref), REF_LEVEL_RANGE_DBM[0]), REF_LEVEL_RANGE_DBM[1]), 2)
        preamp = bool(self._current("preamp", False) if req.preamp is None else req.preamp)
        filt = self._filter(mode)
        sweep = self._sweep_time_s(mode, span, rbw, vbw, points, req.sweep_time_s, filt)
        samples = self._detector_samples(req.detector, mode, span, rbw, vbw, points, sweep, filt)
        return AcquisitionSettings(
            center_hz=req.center_hz,
            span_hz=span,
            rbw_hz=rbw,
            rbw_filter=filt,
            vbw_hz=vbw,
            detector=req.detector,
            averaging_scale=req.averaging_scale,
            averages=averages,
            points=points,
            ref_level_dbm=ref,
            attenuation_db=attenuation,
            preamp=preamp,
            mode=mode,
            sweep_time_s=sweep,
            detector_samples=float(samples),
        )

    def _filter(self, mode: SweepMode) -> RbwFilter:
        if mode is SweepMode.FFT:
            return RbwFilter(kind=FilterKind.FFT, window=self._fft_window)
        if self._filter_kind is FilterKind.SYNCHRONOUS:
            return RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=self._filter_poles)
        return RbwFilter(kind=FilterKind.GAUSSIAN)

    def _sweep_time_s(
        self,
        mode: SweepMode,
        span: float,
        rbw: float,
        vbw: float,
        points: int,
        requested: float | None,
        filt: RbwFilter,
    ) -> float:
        sp = self.spec
        if mode is SweepMode.FFT:
            segments = max(1, math.ceil(span / sp.fft_segment_span_hz))
            frame_s = rbw_shapes.window_b3_bins(str(filt.window)) / rbw  # one frame: N / fs
            return segments * frame_s
        if span == 0:
            minimum = MIN_ZERO_SPAN_TIME_PER_POINT_S * points
            value = max(sp.min_sweep_time_s, minimum) if requested is None else requested
            return float(min(max(value, minimum), MAX_SWEEP_TIME_S))
        auto = max(sp.min_sweep_time_s, sp.sweep_time_factor * span / (rbw * min(rbw, vbw)))
        value = auto if requested is None else max(requested, auto)
        return float(min(value, MAX_SWEEP_TIME_S))

    def _detector_samples(
        self,
        detector: Detector,
        mode: SweepMode,
        span: float,
        rbw: float,
        vbw: float,
        points: int,
        sweep_s: float,
        filt: RbwFilter,
    ) -> int:
        bstat = rbw_shapes.stat_bw_hz(filt, rbw)
        video = max(1, round(bstat / (math.pi * vbw))) if vbw < rbw else 1
        if detector is Detector.SAMPLE:
            return video
        if mode is SweepMode.FFT:
            spacing = span / (points - 1) if points > 1 else span
            det = max(1, round(spacing / bstat))
        else:
            det = max(1, round(bstat * sweep_s / points))
        return max(det, video)

    # ------------------------------------------------------------ timing --------------------

    def _applied(self) -> AcquisitionSettings:
        """The applied settings (the power-on state applies some, so never None)."""
        assert self._settings is not None
        return self._settings

    @staticmethod
    def _sweep_s(s: AcquisitionSettings) -> float:
        """Sweep time of settings this analyzer applied, s (it always sets one)."""
        assert s.sweep_time_s is not None
        return s.sweep_time_s

    @staticmethod
    def _attenuation_db(s: AcquisitionSettings) -> float:
        """Input attenuation of settings this analyzer applied, dB (it always sets one)."""
        assert s.attenuation_db is not None
        return s.attenuation_db

    def _settle_s(self, s: AcquisitionSettings) -> float:
        return self.spec.retune_settle_rbw_periods / s.rbw_hz

    def expected_acquisition_time_s(self) -> float:
        """Instrument time of one averaged acquisition with the applied settings, seconds."""
        s = self._applied()
        return self._settle_s(s) + s.averages * (self._sweep_s(s) + self.spec.sweep_overhead_s)

    # ------------------------------------------------------------ acquisition ---------------

    def acquire_trace(self) -> Trace:
        """One complete averaged acquisition on the simulated clock; values in dBm per point."""
        with self.lock:
            s = self._applied()
            freq = s.frequencies_hz()
            period = self._sweep_s(s) + self.spec.sweep_overhead_s
            duration = self._settle_s(s) + s.averages * period
            t0 = self.clock.now_s + self._settle_s(s)
            t_end = t0 + s.averages * period
            spectrum = self.source.spectrum(freq)
            hot = self._hot_fraction(s, t0, period, t_end)
            noise_w, gain = self._displayed_noise_w(s, freq, spectrum, hot)
            drift = self.gain_drift_factor(0.5 * (t0 + t_end)) * self._step_factor(t0, t_end)
            if drift != 1.0:
                noise_w, gain = noise_w * drift, gain * drift
            tone_w = self._tone_power_w(s, freq, spectrum.tones)
            tone_scale = None
            if tone_w is not None:
                if np.ndim(gain) == 0:
                    tone_w = tone_w * float(gain)
                else:
                    tone_scale = np.asarray(gain)
            power_w = generate_trace(
                self.rng, self._recipe(s), noise_w, tone_w, tone_scale, exact=self.exact_statistics
            )
            values = w_to_dbm(np.maximum(power_w, FLOOR_W))
            # a clock that counts wall time may already be past t_end when the computation was
            # slow: time then only stops moving for the rest of the acquisition
            self.clock.advance(max(t_end - self.clock.now_s, 0.0))
            trace = Trace(
                freq_hz=freq,
                values=values,
                unit=TraceUnit.DBM,
                settings=s,
                acquisition_time_s=duration,
                instrument=self.identity,
            )
            self.last_trace = trace
            return trace

    def gain_drift_factor(self, t_s: float) -> float:
        """Receiver gain drift (linear factor) at simulated time ``t_s``; for the slow drifts
        modelled, the mean over one acquisition is its value at the middle."""
        db = self.spec.gain_drift_db_per_s * t_s + self.spec.gain_drift_db_per_s2 * t_s**2
        return float(10.0 ** (db / 10.0))

    def _step_factor(self, t0_s: float, t_end_s: float) -> float:
        """Mean factor of the receiver gain step over [t0_s, t_end_s]: the share of the
        acquisition after the step sees the stepped gain (power averages are linear in it)."""
        step_db = self.spec.gain_step_db
        if step_db == 0.0:
            return 1.0
        at = self.spec.gain_step_at_s
        if t_end_s <= t0_s:
            after = 1.0 if t0_s >= at else 0.0
        else:
            after = min(max((t_end_s - at) / (t_end_s - t0_s), 0.0), 1.0)
        return 1.0 + (10.0 ** (step_db / 10.0) - 1.0) * after

    def _recipe(self, s: AcquisitionSettings) -> TraceRecipe:
        kernel = None
        if s.points > 1:
            if s.span_hz > 0:
                spacing = s.span_hz / (s.points - 1) / s.rbw_hz
                kernel = field_kernel(s.rbw_filter, spacing, Axis.FREQUENCY)
            else:
                spacing = self._sweep_s(s) / (s.points - 1) * s.rbw_hz
                kernel = field_kernel(s.rbw_filter, spacing, Axis.TIME)
        assert s.ref_level_dbm is not None  # this analyzer always applies a reference level
        full_scale = float(dbm_to_w(s.ref_level_dbm + self.spec.if_headroom_db))
        return TraceRecipe(
            n_traces=s.averages,
            n_points=s.points,
            looks=int(s.detector_samples or 1),
            detector=s.detector,
            averaging_scale=s.averaging_scale,
            kernel=kernel,
            full_scale_w=full_scale,
        )

    def _hot_fraction(
        self, s: AcquisitionSettings, t0: float, period: float, t_end: float
    ) -> np.ndarray | float:
        steady = self.source.steady_hot_fraction(t0, t_end)
        if steady is not None:
            return steady
        n, p = s.averages, s.points
        starts = t0 + period * np.arange(n)
        if n * p <= 4_000_000:
            within = self._sweep_s(s) * (np.arange(p) + 0.5) / p
            return self.source.hot_fraction(starts[:, None] + within[None, :])
        return self.source.hot_fraction(starts + 0.5 * self._sweep_s(s))[:, None]

    def _displayed_noise_w(
        self,
        s: AcquisitionSettings,
        freq: np.ndarray,
        spectrum: SpectrumAtInput,
        hot: np.ndarray | float,
    ) -> tuple[np.ndarray, np.ndarray | float]:
        """Mean noise power per point (W in the RBW) and the per-trace compression gain."""
        own_k = self.front_end.te_k(freq, self._attenuation_db(s), bool(s.preamp))
        temp_k = spectrum.temperature_k(hot) + own_k
        gain = self._level_gain(s, spectrum, hot)
        scale: np.ndarray | float
        if np.ndim(gain):
            scale = np.asarray(gain)[:, None]
        else:
            scale = gain
        enbw = rbw_shapes.enbw_hz(s.rbw_filter, s.rbw_hz)
        noise = BOLTZMANN_J_PER_K * temp_k * enbw * scale
        if noise.ndim == 2 and noise.shape[1] == 1:
            noise = np.broadcast_to(noise, (noise.shape[0], freq.size))
        return noise, gain

    def _level_gain(
        self, s: AcquisitionSettings, spectrum: SpectrumAtInput, hot: np.ndarray | float
    ) -> np.ndarray | float:
        """Amplitude error times mixer compression (per trace when the source is changing)."""
        amp = float(10.0 ** (self.spec.amplitude_error_db / 10.0))
        hot_per_trace = np.atleast_1d(np.asarray(hot, dtype=float))
        if hot_per_trace.ndim == 2:
            hot_per_trace = hot_per_trace.mean(axis=1)
        totals = [spectrum.total_power_w(float(h)) for h in hot_per_trace]
        self._check_input_power(max(totals))
        factors = np.array(
            [
                self.front_end.mixer_gain_factor(p, self._attenuation_db(s), bool(s.preamp))
                for p in totals
            ]
        )
        if np.ndim(hot) == 0:
            return amp * float(factors[0])
        return amp * factors

    def _check_input_power(self, total_w: float) -> None:
        total_dbm = float(w_to_dbm(max(total_w, FLOOR_W)))
        if total_dbm > self.spec.max_input_power_dbm:
            event = {"time_s": self.clock.now_s, "input_power_dbm": total_dbm}
            self.overload_events.append(event)
            logger.error(
                "analyzer input %.1f dBm exceeds its rated maximum %.1f dBm",
                total_dbm,
                self.spec.max_input_power_dbm,
            )

    def _tone_power_w(
        self, s: AcquisitionSettings, freq: np.ndarray, tones: list[tuple[float, float]]
    ) -> np.ndarray | None:
        """Each tone's power at each point (T, P) before level errors, W; None without tones."""
        if not tones:
            return None
        reach = TONE_REACH_RBW * s.rbw_hz
        lo, hi = float(freq.min()) - reach, float(freq.max()) + reach
        near = [(f, p) for f, p in tones if lo <= f <= hi and p > 0]
        if not near:
            return None
        out = np.zeros((len(near), freq.size))
        ascending = freq.size < 2 or bool(freq[-1] >= freq[0])
        for row, (f, p) in enumerate(near):
            # only the points within the filter's reach: the response is zero beyond it
            if ascending:
                lo_i = int(np.searchsorted(freq, f - reach, side="left"))
                hi_i = int(np.searchsorted(freq, f + reach, side="right"))
            else:
                lo_i, hi_i = 0, freq.size
            if hi_i > lo_i:
                offset = (freq[lo_i:hi_i] - f) / s.rbw_hz
                out[row, lo_i:hi_i] = p * rbw_shapes.power_response(s.rbw_filter, offset)
        return out

    # ------------------------------------------------------------ markers -------------------

    def read_marker(
        self, freq_hz: float, kind: MarkerKind, band_hz: float | None = None
    ) -> MarkerReading:
        """Acquire a trace and read a band-power (dBm) or noise-density (dBm/Hz) marker."""
        with self.lock:
            trace = self.acquire_trace()
            return marker_from_trace(trace, freq_hz, MarkerKind(kind), band_hz)


def _unbiased_power(s: AcquisitionSettings) -> bool:
    """True when trace values average power (the detector and averaging are power based)."""
    if s.averages > 1 and s.averaging_scale is not AveragingScale.POWER:
        return False
    if s.detector is Detector.RMS:
        return True
    if s.detector in (Detector.SAMPLE, Detector.AVERAGE):
        return (s.detector_samples or 1) <= 1 or s.averaging_scale is AveragingScale.POWER
    return False


def marker_from_trace(
    trace: Trace, freq_hz: float, kind: MarkerKind, band_hz: float | None = None
) -> MarkerReading:
    """Marker value computed from an existing trace (what ``CALC:MARK:Y?`` reports).

    Both functions integrate the displayed trace over exactly ``band_hz`` around ``freq_hz``:
    ``B = sum(w_i P_i) / ENBW`` with each point weighted by the Hz of the band its cell covers
    (:func:`cell_weights_hz`); in zero span ``B = mean(P) * band / ENBW``.
    The band must lie inside the trace; the automatic band (BAND_POWER 5 RBW, NOISE_DENSITY the
    larger of one RBW and 5 point spacings) shrinks near an edge and stays centred.

    * BAND_POWER reports ``B`` (dBm). It integrates whatever is in the band, tones included, so
      it applies no noise-only detector correction: ``instrument_corrected`` only when the
      trace carries no detector bias (RMS detector or power averaging).
    * NOISE_DENSITY reports ``B / band`` divided by the detector bias of the applied settings
      (dBm/Hz, normalised by the ENBW), flagged ``instrument_corrected``. For a detector whose
      noise statistics are unknown (peak) it reports the uncorrected form instead, the mean
      point power over the band divided by the nominal RBW, not flagged.
    """
    s = trace.settings
    kind = MarkerKind(kind)
    if not freq_hz > 0:
        raise InputError("marker.freq_hz", "must be > 0", value=freq_hz)
    if band_hz is not None and not band_hz > 0:
        raise InputError("marker.band_hz", "must be > 0", value=band_hz)
    power_w = dbm_to_w(trace.values)
    enbw = rbw_shapes.enbw_hz(s.rbw_filter, s.rbw_hz)
    if s.span_hz == 0 or s.points == 1:
        band = (
            band_hz
            if band_hz is not None
            else (5.0 * s.rbw_hz if kind is MarkerKind.BAND_POWER else s.rbw_hz)
        )
        band_power_w = float(np.mean(power_w)) * band / enbw
    else:
        spacing = s.span_hz / (s.points - 1)
        band = _marker_band(s, freq_hz, kind, band_hz, spacing)
        weights = cell_weights_hz(trace.freq_hz, freq_hz, band)
        band_power_w = float(weights @ power_w) / enbw
    if kind is MarkerKind.BAND_POWER:
        value_w, corrected = band_power_w, _unbiased_power(s)
    else:
        value_w, corrected = _noise_marker_w(s, band_power_w / band)
    return MarkerReading(
        freq_hz=freq_hz,
        kind=kind,
        value_db=float(w_to_dbm(max(value_w, FLOOR_W))),
        band_hz=band,
        settings=s,
        acquisition_time_s=trace.acquisition_time_s,
        instrument=trace.instrument,
        instrument_corrected=corrected,
    )


def _marker_band(
    s: AcquisitionSettings, freq_hz: float, kind: MarkerKind, band_hz: float | None, spacing: float
) -> float:
    """The marker's band, Hz: inside the trace's cells (start - spacing/2 .. stop + spacing/2)."""
    lo, hi = s.start_hz - spacing / 2.0, s.stop_hz + spacing / 2.0
    if not lo <= freq_hz <= hi:
        raise InputError(
            "marker.freq_hz",
            f"{format_frequency(freq_hz)} is outside the trace "
            f"{format_frequency_range(s.start_hz, s.stop_hz)}",
            fix="move the marker inside the span or retune the analyzer",
        )
    room = 2.0 * min(freq_hz - lo, hi - freq_hz)  # widest band centred on the marker
    if band_hz is None:
        default = 5.0 * s.rbw_hz if kind is MarkerKind.BAND_POWER else max(s.rbw_hz, 5.0 * spacing)
        if room <= 0.0:
            raise InputError(
                "marker.freq_hz",
                f"{format_frequency(freq_hz)} is on the edge of the trace, so no band fits around "
                "it",
                fix="move the marker inside the span",
            )
        return min(default, room)
    if band_hz > room * (1.0 + 1e-9) + 1e-9 * spacing:
        raise InputError(
            "marker.band_hz",
            f"{format_frequency(freq_hz)} +/- {format_frequency(band_hz / 2)} extends "
            f"beyond the trace ({format_frequency_range(lo, hi)})",
            fix="narrow the band, move the marker or widen the span",
        )
    return float(band_hz)


def cell_weights_hz(freq_hz: np.ndarray, center_hz: float, band_hz: float) -> np.ndarray:
    """Hz of the band ``center_hz +/- band_hz/2`` that each trace point's cell covers.

    A point's cell reaches half-way to its neighbours (the end points' cells are as wide as the
    inner ones); the weights sum to the part of the band inside the trace.
    """
    f = np.asarray(freq_hz, dtype=float)
    order = np.argsort(f)
    fs = f[order]
    mid = 0.5 * (fs[1:] + fs[:-1])
    first = fs[0] - (mid[0] - fs[0]) if fs.size > 1 else fs[0]
    last = fs[-1] + (fs[-1] - mid[-1]) if fs.size > 1 else fs[-1]
    edges = np.concatenate(([first], mid, [last]))
    lo, hi = center_hz - band_hz / 2.0, center_hz + band_hz / 2.0
    covered = np.clip(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0, None)
    weights = np.empty_like(covered)
    weights[order] = covered
    return weights


def detector_mean_ratio(s: AcquisitionSettings) -> float | None:
    """E[trace value] / true mean noise power for the applied settings; None for a peak detector.

    Worked out for the simulator from the way it draws a point (``noisegen``): each trace holds
    the detector's combination of ``k = detector_samples`` unit-mean exponential looks, and ``N``
    traces are averaged on the averaging scale. Power scale (and the RMS detector averaged on
    it): unbiased. Log scale: the point is ``exp(mean of ln D)`` over the ``N`` traces, so
    ``E = E[D^(1/N)]^N``, with ``E[D^s] = Gamma(k + s) / (Gamma(k) k^s)`` for the power mean of
    ``k`` looks (RMS) and ``Gamma(1 + s/k)^k`` for ``k`` looks averaged on the log scale
    (AVERAGE, or SAMPLE behind a video filter). Voltage scale: the point is the square of a mean
    of ``M`` values ``v``, so ``E = E[v]^2 + Var(v) / M``.
    """
    if s.detector in (Detector.PEAK, Detector.NEGATIVE_PEAK):
        return None
    k = float(s.detector_samples or 1)
    n = float(s.averages)
    scale = s.averaging_scale
    if scale is AveragingScale.POWER:
        return 1.0
    power_mean = s.detector is Detector.RMS or k == 1.0
    if scale is AveragingScale.LOG_POWER:
        if power_mean:
            moment = math.lgamma(k + 1.0 / n) - math.lgamma(k) - math.log(k) / n
            return math.exp(n * moment)
        return math.exp(n * k * math.lgamma(1.0 + 1.0 / (n * k)))
    if power_mean:  # v = sqrt of a power mean of k looks, averaged over N traces
        mean_v = math.exp(math.lgamma(k + 0.5) - math.lgamma(k) - 0.5 * math.log(k))
        return mean_v**2 + (1.0 - mean_v**2) / n
    mean_v = math.sqrt(math.pi) / 2.0  # v = sqrt of one exponential look, N k of them averaged
    return mean_v**2 + (1.0 - mean_v**2) / (n * k)


def _noise_marker_w(s: AcquisitionSettings, displayed_w_per_hz: float) -> tuple[float, bool]:
    """(noise-marker density in W/Hz, corrected?) from the displayed band power per Hz."""
    ratio = detector_mean_ratio(s)
    if ratio is None:  # peak detectors: no known noise statistics, so no correction
        return displayed_w_per_hz * rbw_shapes.enbw_hz(s.rbw_filter, s.rbw_hz) / s.rbw_hz, False
    return displayed_w_per_hz / ratio, True

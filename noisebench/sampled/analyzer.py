"""The sampled-data analyzer: sample blocks -> Welch density traces behind the Analyzer ABC.

Every method, correction, budget, plan, report and database feature works unchanged on it,
because it returns what a spectrum analyzer in FFT mode returns: a trace in W/Hz with the
settings it applied. What the estimator needs is in those settings:

* ``rbw_hz`` = the -3 dB width of one bin and ``rbw_filter`` = the FFT window (the estimator
  takes the window's ENBW and bin-to-bin correlation from it);
* ``averages`` = Welch segments, ``detector = rms``, power scale, and ``detector_samples`` =
  ``K_eff / K``: the independent exponential samples per segment after the loss of
  independence from segment overlap (Welch 1967, :mod:`noisebench.sampled.welch`), so a point
  has relative variance ``1 / K_eff``;
* ``sweep_time_s`` = the capture length.

Per capture (:meth:`SampledAnalyzer.acquire_trace`): refuse clipped captures, subtract the DC
offset and correct IQ imbalance (complex), Welch, scale to W/Hz, mark the bins around the
centre of a complex capture (LO leakage) as excluded, so the estimator leaves them out and
reports them like a spur. What was found is kept per capture in :attr:`SampledAnalyzer.log`.

The absolute scale (W per full-scale unit squared) comes from the receiver's scale calibration
(:mod:`noisebench.sampled.scale`) or from the source; without one the trace is on an arbitrary
scale (0 dBFS read as 0 dBm): the Y-factor method needs only ratios, the gain method needs the
absolute scale, and refuses to run without it (:attr:`SampledAnalyzer.absolute_level`).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any, Protocol, runtime_checkable

import numpy as np

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    MarkerKind,
    MarkerReading,
    SweepMode,
    Trace,
    TraceUnit,
)
from noisebench.bench.instruments import Analyzer
from noisebench.errors import InputError, MeasurementError
from noisebench.sampled import artefacts
from noisebench.sampled.scale import ScaleCalibration
from noisebench.sampled.source import CaptureRequest, RecordingsExhausted, SampleBlock, SampleSource
from noisebench.sampled.welch import DEFAULT_WINDOW, SegmentPlan, plan_segments, welch_density
from noisebench.science.filters import response_halfwidth_ratio
from noisebench.units import format_frequency, format_frequency_range

logger = logging.getLogger(__name__)

ARBITRARY_SCALE_W_PER_FS2 = 1e-3
"""Used when no scale is known: 0 dBFS is read as 0 dBm. Ratios (Y-factor) are right, absolute
levels are not; the run says so."""
LEAKAGE_LEVEL = 1e-4
"""Minimum guard around the centre of a complex capture: where the window's response to a line
at the centre has fallen to 1e-4 (-40 dB)."""
TUNING_MARGIN_BINS = 2
MAX_CAPTURE_SAMPLES = 1 << 22
"""Longest capture taken at once (64 MiB of complex samples); more segments are taken as
several captures and their Welch averages combined."""
LEVEL_NOTE = (
    "The Y-factor method needs only ratios of densities read with one receiver scale; the gain "
    "method needs the receiver's absolute scale (a scale calibration with a known tone or two "
    "known noise levels)."
)


@runtime_checkable
class FixedTuning(Protocol):
    """A source that cannot retune (recordings) says where a capture for a band would be."""

    def center_for(self, center_hz: float, span_hz: float) -> float: ...


@dataclass(frozen=True)
class _Geometry:
    """Where the trace sits in a capture: tuned centre, selected bins, excluded bins."""

    plan: SegmentPlan
    capture_center_hz: float
    complex_capture: bool
    index: np.ndarray  # indices into the (shifted) Welch output
    freq_hz: np.ndarray  # RF frequency of each selected bin
    excluded: np.ndarray  # bool per selected bin (LO leakage guard)
    guard_hz: float


@dataclass
class CaptureLog:
    """What one capture showed: artefacts found, corrected and excluded."""

    capture_center_hz: float
    samples: int
    segments: int
    equivalent_samples: float
    dc_offset_dbfs: float | None
    image_rejection_db: float | None
    iq_corrected: bool
    clipped_fraction: float
    excluded_hz: list[tuple[float, float]] = field(default_factory=list)
    label: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {
            "capture_center_hz": self.capture_center_hz,
            "samples": self.samples,
            "segments": self.segments,
            "equivalent_samples": round(self.equivalent_samples, 3),
            "dc_offset_dbfs": self.dc_offset_dbfs,
            "image_rejection_db": self.image_rejection_db,
            "iq_corrected": self.iq_corrected,
            "clipped_fraction": self.clipped_fraction,
            "excluded_hz": [list(r) for r in self.excluded_hz],
            "label": self.label,
        }


class SampledAnalyzer(Analyzer):
    """An :class:`~noisebench.bench.instruments.Analyzer` built on a sample source.

    ``window``: one of :data:`noisebench.sampled.welch.SUPPORTED_WINDOWS`; ``overlap``: segment
    overlap fraction (None: the window's default); ``iq_correction``: remove IQ imbalance
    blindly (complex captures); ``scale``: the receiver's scale calibration (overrides any scale
    the source reports).
    """

    def __init__(
        self,
        source: SampleSource,
        *,
        window: str = DEFAULT_WINDOW,
        overlap: float | None = None,
        iq_correction: bool = True,
        scale: ScaleCalibration | None = None,
        max_input_power_dbm: float | None = None,
        resource: str = "",
    ) -> None:
        super().__init__()
        if not isinstance(source, SampleSource):
            raise InputError(
                "source",
                f"{type(source).__name__} is not a sample source",
                fix="give an object with an info attribute and a capture(request) method",
            )
        info = source.info
        if not (math.isfinite(info.sample_rate_hz) and info.sample_rate_hz > 0):
            raise InputError(
                "source.info.sample_rate_hz",
                "is not declared",
                fix="declare the sample rate in the source's SourceInfo",
            )
        if not info.tunable and not isinstance(source, FixedTuning):
            raise InputError(
                "source",
                f"{info.identity!r} is not tunable and has no center_for(center_hz, span_hz)",
                fix="declare tunable=True or implement center_for",
            )
        plan_segments(float(info.sample_rate_hz), float(info.sample_rate_hz) / 64, 1, window=window)
        self.source = source
        self.window = window
        self.overlap = overlap
        self.iq_correction = bool(iq_correction)
        self.scale = scale
        self.resource = resource
        self._max_input_dbm = max_input_power_dbm
        self._settings: AcquisitionSettings | None = None
        self._geometry: _Geometry | None = None
        self._request: AcquisitionRequest | None = None
        self.log: list[CaptureLog] = []

    # ------------------------------------------------------------------ declared capabilities

    @property
    def identity(self) -> str:
        return f"noisebench,sampled analyzer,{self.source.info.identity},{self.window}"

    @property
    def absolute_level(self) -> bool:
        """True when traces are in absolute W/Hz (a scale calibration or a source that knows)."""
        return self.scale is not None or self.source.info.scale_known

    def run_notes(self) -> dict:
        return {"sampled_receiver": {**self.summary(), "level_note": LEVEL_NOTE}}

    @property
    def level_uncertainty_db(self) -> float | None:
        """The scale calibration's standard uncertainty, dB (None without one)."""
        return self.scale.u_db if self.scale is not None else None

    @property
    def replays_recordings(self) -> bool:
        """True for recorded samples: nothing is switched and no input can be overdriven."""
        return self.source.info.finite

    @property
    def scale_status(self) -> str:
        if self.scale is not None:
            return f"calibrated ({self.scale.describe()})"
        if self.source.info.scale_known:
            return "given by the source"
        return "arbitrary (0 dBFS read as 0 dBm): ratios only"

    @property
    def max_input_power_dbm(self) -> float | None:
        return self._max_input_dbm

    @property
    def full_scale_dbm(self) -> float | None:
        """Power of a tone at the converter's full scale (mean |x|^2 = 1), dBm, when the scale
        is known."""
        if self.scale is not None:
            return self.scale.full_scale_dbm
        return self.source.info.full_scale_dbm

    @property
    def settings(self) -> AcquisitionSettings | None:
        return self._settings

    def close(self) -> None:
        self.source.close()

    # ------------------------------------------------------------------ configuration

    def configure(self, request: AcquisitionRequest) -> AcquisitionSettings:
        if request.span_hz <= 0:
            raise InputError(
                "acquisition.span_hz",
                "a sampled analyzer needs a band (span > 0); zero span is not available",
                fix="set span_hz to the band integrated around each point",
            )
        info = self.source.info
        plan = plan_segments(
            float(info.sample_rate_hz),
            request.rbw_hz,
            request.averages,
            window=self.window,
            overlap=self.overlap,
        )
        geometry = self._geometry_for(plan, request)
        self._geometry = geometry
        self._request = request
        self._settings = self._settings_for(geometry, plan.segments)
        return self._settings

    def _guard_hz(self, plan: SegmentPlan) -> float:
        lobe = response_halfwidth_ratio(plan.rbw_filter, LEAKAGE_LEVEL) * plan.rbw_hz
        return max(float(self.source.info.dc_guard_hz), lobe + plan.bin_hz / 2)

    def _geometry_for(self, plan: SegmentPlan, request: AcquisitionRequest) -> _Geometry:
        info = self.source.info
        fs = plan.sample_rate_hz
        complex_capture = info.complex_samples
        lo_use, hi_use = artefacts.usable_offsets_hz(fs, info.usable_fraction, complex_capture)
        guard = self._guard_hz(plan) if complex_capture else 0.0
        span = request.span_hz
        if info.tunable:
            margin = TUNING_MARGIN_BINS * plan.bin_hz
            if complex_capture and span + guard + margin <= hi_use:
                # offset tuning: the whole band sits above the LO, clear of its leakage
                cc = request.center_hz - span / 2 - guard - margin
            else:
                cc = request.center_hz
        else:
            cc = float(self.source.center_for(request.center_hz, span))  # type: ignore[attr-defined]
        if complex_capture:
            offsets = np.fft.fftshift(np.fft.fftfreq(plan.length, 1.0 / fs))
            rf: np.ndarray = cc + offsets
        else:
            offsets = np.fft.rfftfreq(plan.length, 1.0 / fs) - fs / 4.0
            rf = cc + offsets
        lo_band = request.center_hz - span / 2
        hi_band = request.center_hz + span / 2
        if lo_band < cc + lo_use - 1e-9 * fs or hi_band > cc + hi_use + 1e-9 * fs:
            raise InputError(
                "acquisition.span_hz",
                f"the band {format_frequency_range(lo_band, hi_band, 9)} reaches beyond the "
                "usable passband "
                f"{format_frequency_range(cc + lo_use, cc + hi_use, 9)} of the capture at "
                f"{format_frequency(cc, 9)} "
                f"({info.usable_fraction:g} of {fs:g} samples/s; the edges are the anti-alias "
                "roll-off)",
                fix="narrow span_hz, or capture at a higher sample rate / closer centre",
            )
        half_bin = plan.bin_hz / 2
        inside = (
            (rf >= lo_band - half_bin)
            & (rf <= hi_band + half_bin)
            & (offsets >= lo_use)
            & (offsets <= hi_use)
        )
        index = np.flatnonzero(inside)
        if index.size < 3:
            raise InputError(
                "acquisition.rbw_hz",
                f"the band holds {index.size} bins at {format_frequency(plan.bin_hz)} per bin",
                fix="lower rbw_hz or widen span_hz",
            )
        excluded = (
            np.abs(offsets[index]) <= guard if complex_capture else np.zeros(index.size, bool)
        )
        return _Geometry(plan, cc, complex_capture, index, rf[index], excluded, guard)

    def _settings_for(
        self, g: _Geometry, segments: int, k_eff: float | None = None
    ) -> AcquisitionSettings:
        """Applied settings for ``segments`` segments holding ``k_eff`` independent samples
        per bin (None: one capture, Welch's value)."""
        plan = g.plan.with_segments(segments)
        if k_eff is None:
            k_eff = plan.equivalent_samples
        f = g.freq_hz
        return AcquisitionSettings(
            center_hz=float(0.5 * (f[0] + f[-1])),
            span_hz=float(f[-1] - f[0]),
            rbw_hz=plan.rbw_hz,
            rbw_filter=plan.rbw_filter,
            vbw_hz=None,
            detector=Detector.RMS,
            averaging_scale=AveragingScale.POWER,
            averages=segments,
            points=int(f.size),
            mode=SweepMode.FFT,
            sweep_time_s=plan.duration_s,
            detector_samples=k_eff / segments,
        )

    def expected_acquisition_time_s(self) -> float:
        if self._geometry is None:
            return 0.0
        return self._geometry.plan.duration_s

    # ------------------------------------------------------------------ acquisition

    def _capture(self, g: _Geometry, segments: int) -> SampleBlock:
        assert self._request is not None
        request = CaptureRequest(
            center_hz=g.capture_center_hz,
            span_hz=self._request.span_hz,
            sample_rate_hz=g.plan.sample_rate_hz,
            samples=g.plan.with_segments(segments).samples,
        )
        try:
            block = self.source.capture(request)
        except RecordingsExhausted as exc:
            raise MeasurementError(
                f"the recording has {exc.left} samples left, fewer than one segment of "
                f"{g.plan.length} at {format_frequency(g.capture_center_hz, 9)}",
                fix="record longer (at least time_limit_s per state), or lower max_averages / "
                "raise target_u_nf_db",
            ) from None
        self._check_block(block, g)
        return block

    def _check_block(self, block: SampleBlock, g: _Geometry) -> None:
        fs = g.plan.sample_rate_hz
        if abs(block.sample_rate_hz - fs) > 1e-9 * fs:
            raise MeasurementError(
                f"the source returned {block.sample_rate_hz:g} samples/s, not the declared {fs:g}",
                source=self.source.info.identity,
            )
        if abs(block.center_hz - g.capture_center_hz) > 1e-6 * fs:
            raise MeasurementError(
                f"the source returned a capture at {format_frequency(block.center_hz, 9)}, not "
                f"{format_frequency(g.capture_center_hz, 9)}",
                source=self.source.info.identity,
            )
        if block.is_complex != g.complex_capture:
            kind = "complex" if block.is_complex else "real"
            raise MeasurementError(
                f"the source returned {kind} samples but declared the other kind",
                source=self.source.info.identity,
            )

    def acquire_trace(self) -> Trace:
        """One trace of the configured segments; captures longer than
        :data:`MAX_CAPTURE_SAMPLES` are taken as several captures whose Welch averages are
        combined by their segment counts (independent captures: their K_eff add)."""
        g = self._geometry
        if g is None or self._request is None:
            raise InputError("analyzer", "acquire before configure", fix="call configure first")
        with self.lock:
            per_capture = max(1, g.plan.segments_in(MAX_CAPTURE_SAMPLES))
            wanted = g.plan.segments
            total = np.zeros(g.index.size)
            segments = 0
            k_eff = 0.0
            seconds = 0.0
            while segments < wanted:
                block = self._capture(g, min(per_capture, wanted - segments))
                psd, used = self._process(g, block)
                total += psd[g.index] * used * self._scale_w_per_fs2(block)
                segments += used
                k_eff += g.plan.with_segments(used).equivalent_samples
                seconds += block.duration_s
                if used < min(per_capture, wanted - segments + used):
                    break  # a finite source ran short: the trace says what it holds
            settings = self._settings_for(g, segments, k_eff)
            excluded = g.excluded if np.any(g.excluded) else None
            return Trace(
                freq_hz=g.freq_hz,
                values=np.maximum(total / segments, np.finfo(float).tiny),
                unit=TraceUnit.W_PER_HZ,
                settings=settings,
                acquisition_time_s=seconds,
                instrument=self.identity,
                excluded=excluded,
            )

    def _process(self, g: _Geometry, block: SampleBlock) -> tuple[np.ndarray, int]:
        """Artefact checks and corrections, then Welch: (density full-scale^2/Hz, segments)."""
        x = block.samples
        clipped = artefacts.clipped_fraction(x, block.full_scale)
        if clipped > artefacts.MAX_CLIPPED_FRACTION:
            raise MeasurementError(
                f"{clipped:.2e} of the samples are at full scale (clipped) in the capture "
                f"at {format_frequency(g.capture_center_hz, 9)}",
                fix="lower the receiver gain or add attenuation, then recalibrate the scale",
            )
        piled = artefacts.rail_pileup_fraction(x)
        if piled > artefacts.MAX_CLIPPED_FRACTION:
            raise MeasurementError(
                f"{piled:.2e} of the samples sit at one extreme rail value in the capture at "
                f"{format_frequency(g.capture_center_hz, 9)}: clipped below the declared full "
                f"scale ({block.full_scale:g}); noise never piles up at its largest value",
                fix="check the source's full scale (metadata) and any limiter/AGC stage; lower "
                "the receiver gain or add attenuation, then recalibrate the scale",
            )
        dc_dbfs = None
        estimate = artefacts.ImageEstimate(0j)
        corrected = False
        if g.complex_capture:
            x, dc = artefacts.remove_dc(x)
            dc_dbfs = 10 * math.log10(max(abs(dc) ** 2, 1e-30) / block.full_scale**2)
            estimate = artefacts.image_ratio(x)
            if (
                self.iq_correction
                and estimate.significant
                and estimate.image_rejection_db < artefacts.IQ_CORRECTION_ABOVE_DB
            ):
                x = artefacts.correct_image(x, estimate)
                corrected = True
        _, psd, used = welch_density(x, g.plan)
        guarded = bool(np.any(g.excluded))
        self.log.append(
            CaptureLog(
                capture_center_hz=g.capture_center_hz,
                samples=int(x.size),
                segments=used,
                equivalent_samples=g.plan.with_segments(used).equivalent_samples,
                dc_offset_dbfs=None if dc_dbfs is None else round(dc_dbfs, 2),
                image_rejection_db=(
                    round(estimate.image_rejection_db, 2) if estimate.significant else None
                ),
                iq_corrected=corrected,
                clipped_fraction=clipped,
                excluded_hz=(
                    [(g.capture_center_hz - g.guard_hz, g.capture_center_hz + g.guard_hz)]
                    if guarded
                    else []
                ),
                label=block.label,
            )
        )
        return psd, used

    def _scale_w_per_fs2(self, block: SampleBlock) -> float:
        if self.scale is not None:
            return self.scale.scale_w_per_fs2
        if block.scale_w_per_fs2 is not None:
            return float(block.scale_w_per_fs2)
        return ARBITRARY_SCALE_W_PER_FS2

    def read_marker(
        self, freq_hz: float, kind: MarkerKind, band_hz: float | None = None
    ) -> MarkerReading:
        """Band power (integrated density over ``band_hz``) or mean density, from one trace.

        The trace is already an unbiased density, so the reading is ``instrument_corrected``.
        """
        from noisebench.science.estimator import band_weights_hz

        trace = self.acquire_trace()
        f, d = trace.freq_hz, trace.values
        if kind is MarkerKind.BAND_POWER:
            if band_hz is None:
                raise InputError("band_hz", "a band-power marker needs its band")
            w = band_weights_hz(f, freq_hz, band_hz)
            value_w = float(np.sum(w * d))
        else:
            band = band_hz if band_hz is not None else trace.settings.enbw_hz
            w = band_weights_hz(f, freq_hz, band)
            value_w = float(np.sum(w * d) / max(np.sum(w), 1e-300))
        return MarkerReading(
            freq_hz=freq_hz,
            kind=kind,
            value_db=10.0 * math.log10(max(value_w, 1e-300) / 1e-3),
            band_hz=band_hz,
            settings=trace.settings,
            acquisition_time_s=trace.acquisition_time_s,
            instrument=self.identity,
            instrument_corrected=True,
        )

    def summary(self) -> dict[str, Any]:
        """What the captures showed, for the run's notes and the report."""
        logs = self.log
        irr = [e.image_rejection_db for e in logs if e.image_rejection_db is not None]
        dc = [e.dc_offset_dbfs for e in logs if e.dc_offset_dbfs is not None]
        return {
            "source": self.source.info.identity,
            "window": self.window,
            "scale": self.scale_status,
            "absolute_scale": self.absolute_level,
            "captures": len(logs),
            "samples": int(sum(e.samples for e in logs)),
            "worst_image_rejection_db": min(irr) if irr else None,
            "iq_corrected_captures": sum(1 for e in logs if e.iq_corrected),
            "largest_dc_offset_dbfs": max(dc) if dc else None,
            "largest_clipped_fraction": max((e.clipped_fraction for e in logs), default=0.0),
            "lo_guard_hz": self._geometry.guard_hz if self._geometry is not None else None,
            "captures_with_lo_guard_in_band": sum(1 for e in logs if e.excluded_hz),
        }

"""Groups of frequency points that one analyzer trace covers, and the trace settings for each."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from noisebench.bench.acquisition import AcquisitionRequest
from noisebench.running.plan import AcquisitionPolicy, FrequencyPoint
from noisebench.units import format_frequency, format_frequency_range

AUTO_POINTS_PER_RBW = 4
"""Trace points per RBW when the plan does not set ``trace_points``: bins closer than the RBW
are correlated (no more information), but a few per RBW let the estimator find and cut spurs."""


MIN_AUTO_POINTS = 21


ZERO_SPAN_POINTS = 101


BAND_EDGE_MARGIN = 0.02
"""Each trace is 2 % wider than its bands so an instrument's rounding of the span never puts a
band edge outside the trace."""


@dataclass(frozen=True)
class PointGroup:
    """Points acquired from the same traces (one trace covers all of them)."""

    index: int
    freqs_hz: tuple[float, ...]
    policy: AcquisitionPolicy
    center_hz: float
    span_hz: float
    band_hz: float | None  # band integrated around each point; None: whole (zero-span) trace
    trace_points: int
    lo_hz: float | None = None  # a converter's LO for this group (one LO per trace)
    rf_hz: tuple[float, ...] | None = None  # a converter's RF of each point (freqs_hz: IF)

    def rf_of(self, freq_hz: float) -> float:
        """The RF of the point read at ``freq_hz`` (a converter), else ``freq_hz`` itself."""
        if self.rf_hz is None:
            return freq_hz
        return self.rf_hz[self.freqs_hz.index(freq_hz)]

    def request(self, averages: int) -> AcquisitionRequest:
        p = self.policy
        return AcquisitionRequest(
            center_hz=self.center_hz,
            span_hz=self.span_hz,
            rbw_hz=p.rbw_hz,
            vbw_hz=p.vbw_hz,
            detector=p.detector,
            averaging_scale=p.averaging_scale,
            averages=int(averages),
            points=self.trace_points,
            ref_level_dbm=p.ref_level_dbm,
            attenuation_db=p.attenuation_db,
            preamp=p.preamp,
            mode=p.mode,
            sweep_time_s=p.sweep_time_s,
        )

    def describe(self) -> str:
        """The group's frequencies as a person reads them (``3.3 GHz``, ``1 GHz to 2 GHz``)."""
        text = format_frequency_range(self.freqs_hz[0], self.freqs_hz[-1])
        if self.rf_hz is not None:
            rf = format_frequency_range(min(self.rf_hz), max(self.rf_hz))
            text = f"RF {rf} (IF {text}, LO {format_frequency(self.lo_hz)})"
        return text


def auto_points(span_hz: float, rbw_hz: float) -> int:
    return min(
        100_001, max(MIN_AUTO_POINTS, int(math.ceil(AUTO_POINTS_PER_RBW * span_hz / rbw_hz)) + 1)
    )


def _union_length(freqs: Sequence[float], band: float) -> float:
    total, last_end = 0.0, -math.inf
    for f in freqs:
        start, end = f - band / 2, f + band / 2
        total += end - max(start, last_end)
        last_end = end
    return total


def _fits(freqs: Sequence[float], policy: AcquisitionPolicy) -> bool:
    band = policy.span_hz
    span = (freqs[-1] - freqs[0]) + band
    if band == 0 or span > policy.max_trace_span_hz:
        return False
    return _union_length(freqs, band) / span >= policy.min_band_fill


def plan_groups(points: Sequence[FrequencyPoint]) -> list[PointGroup]:
    """Group consecutive points with equal settings that one trace can cover.

    A shared trace spans ``max - min + span_hz`` and may not exceed ``max_trace_span_hz``; at
    least ``min_band_fill`` of it must lie inside the points' bands (a swept trace spends time
    in proportion to its span, so gaps between bands are wasted instrument time).
    """
    ordered = sorted(points, key=lambda p: (p.lo_hz or 0.0, p.freq_hz))
    runs: list[list[FrequencyPoint]] = []
    for point in ordered:
        if (
            runs
            and runs[-1][-1].policy == point.policy
            and runs[-1][-1].lo_hz == point.lo_hz  # a converter: one LO per trace
            and runs[-1][-1].freq_hz != point.freq_hz
            and _fits([p.freq_hz for p in runs[-1]] + [point.freq_hz], point.policy)
        ):
            runs[-1].append(point)
        else:
            runs.append([point])
    return [_make_group(i, run) for i, run in enumerate(runs)]


def _make_group(index: int, run: list[FrequencyPoint]) -> PointGroup:
    policy = run[0].policy
    freqs = tuple(p.freq_hz for p in run)
    band = policy.span_hz
    lo = run[0].lo_hz
    rf = tuple(p.report_hz for p in run) if lo is not None else None
    if band == 0:
        points = policy.trace_points or ZERO_SPAN_POINTS
        return PointGroup(index, freqs, policy, freqs[0], 0.0, None, points, lo, rf)
    span = (freqs[-1] - freqs[0]) + band * (1.0 + BAND_EDGE_MARGIN)
    points = policy.trace_points or auto_points(span, policy.rbw_hz)
    return PointGroup(index, freqs, policy, (freqs[0] + freqs[-1]) / 2, span, band, points, lo, rf)

"""Adaptive averaging: combine repeated readings of one density, test their scatter, plan more.

Readings of the same noise density (several traces, e.g. the two hot traces of each
hot-cold-cold-hot round) are combined as a weighted mean in linear power with weights
``(N/u)^2``, i.e. by their independent-sample count, which keeps the mean unbiased because the
weights do not depend on the level read. Its standard uncertainty is ``sqrt(sum w^2 u^2)/sum w``.

Within-reading scatter: each reading's ``scatter_ratio`` (observed over predicted scatter of
its trace points) is pooled as the root mean square over the readings, the ratio of pooled
variances, whose own sampling spread shrinks as readings are added.

Between-reading scatter: the readings' normalised residuals give ``chi2`` with ``n - 1`` degrees
of freedom. When it exceeds the ``1 - alpha`` quantile of the chi-square distribution
(``alpha = 1e-3``: a one-in-a-thousand false alarm), the readings disagree by more than their
own statistics allow (drift, gain instability, intermittent interference): the combined
uncertainty is widened by ``sqrt(chi2/dof)`` (the Birge ratio) and the density is marked.

Planning: the statistical uncertainty of a point falls as ``1/sqrt(averages)`` (radiometer
equation) for the part that more averages reduce; a part that they cannot reduce (the stored
calibration) stays. :func:`averages_for_target` solves for the averages that reach a target.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from scipy import stats

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.errors import InputError
from noisebench.science.density import NoiseDensity
from noisebench.units import format_frequency

SCATTER_ALPHA = 1e-3
"""False-alarm probability of the between-reading scatter test."""

PLANNING_MARGIN = 1.1
"""Averages planned = needed x 1.1: the estimate of ``u`` itself scatters by a few percent, and
a 10 % margin avoids a last, tiny round most of the time for 5 % more averaging."""


@dataclass(frozen=True)
class CombinedDensity:
    """A combined density and the outcome of the scatter test across its readings."""

    density: NoiseDensity
    readings: int
    averages: int
    chi2: float | None
    birge_ratio: float
    excess_scatter: bool


def _weight(d: NoiseDensity) -> float:
    if d.u_density_w_per_hz > 0:
        return (d.density_w_per_hz / d.u_density_w_per_hz) ** 2
    return float(d.settings.averages if d.settings is not None else 1)


def combine_densities(
    parts: Sequence[NoiseDensity], *, alpha: float = SCATTER_ALPHA
) -> CombinedDensity:
    """Combine readings of one density (same frequency) into one, with the scatter test."""
    if not parts:
        raise InputError("parts", "no readings to combine", fix="acquire at least one trace")
    f0 = parts[0].freq_hz
    for d in parts[1:]:
        if not math.isclose(d.freq_hz, f0, rel_tol=1e-9):
            raise InputError(
                "parts.freq_hz",
                f"readings at {format_frequency(d.freq_hz, 9)} and "
                f"{format_frequency(f0, 9)} cannot be combined",
                fix="combine readings of one frequency",
            )
    weights = [_weight(d) for d in parts]
    pairs = list(zip(weights, parts, strict=True))
    total_w = sum(weights)
    mean = sum(w * d.density_w_per_hz for w, d in pairs) / total_w
    u = math.sqrt(sum((w * d.u_density_w_per_hz) ** 2 for w, d in pairs)) / total_w
    chi2, birge, excess = _scatter_test(parts, mean, alpha)
    if excess:
        u *= birge
    averages = sum(d.settings.averages if d.settings is not None else 1 for d in parts)
    density = _merged(parts, weights, mean, u, birge if excess else None, averages)
    return CombinedDensity(density, len(parts), averages, chi2, birge, excess)


def _scatter_test(
    parts: Sequence[NoiseDensity], mean: float, alpha: float
) -> tuple[float | None, float, bool]:
    usable = [d for d in parts if d.u_density_w_per_hz > 0]
    dof = len(usable) - 1
    if dof < 1:
        return None, 1.0, False
    chi2 = sum(((d.density_w_per_hz - mean) / d.u_density_w_per_hz) ** 2 for d in usable)
    birge = math.sqrt(chi2 / dof)
    return chi2, birge, bool(chi2 > _chi2_isf(alpha, dof))


@functools.lru_cache(maxsize=1024)
def _chi2_isf(alpha: float, dof: int) -> float:
    """The chi-square upper quantile (scipy; a handful of (alpha, dof) pairs per run, each
    called for every combined reading, so it is kept)."""
    return float(stats.chi2.isf(alpha, dof))


_LAST_COPY: list[Any] = [None, 0, None]  # (settings, averages, copy) of the latest call


def _with_averages(settings: AcquisitionSettings, averages: int) -> AcquisitionSettings:
    """``settings`` with ``averages``; the points of one group share one copy (the settings
    are frozen), so a long sweep's calibration holds one settings object per group, not one
    per point and reading."""
    source, count, copy = _LAST_COPY
    if source is settings and count == averages:
        return copy
    copy = settings.model_copy(update={"averages": averages})
    _LAST_COPY[:] = [settings, averages, copy]
    return copy


def _merged(
    parts: Sequence[NoiseDensity],
    weights: Sequence[float],
    mean: float,
    u: float,
    birge: float | None,
    averages: int,
) -> NoiseDensity:
    first = parts[0]
    total_w = sum(weights)
    ratios = [d.scatter_ratio for d in parts if d.scatter_ratio is not None]
    pooled = math.sqrt(sum(r * r for r in ratios) / len(ratios)) if ratios else None
    if birge is not None:
        pooled = max(pooled or 0.0, birge)
    samples = [d.independent_samples for d in parts]
    times = [d.acquisition_time_s for d in parts]
    excluded = sorted({f for d in parts for f in d.excluded_freq_hz})
    settings = _with_averages(first.settings, averages) if first.settings is not None else None
    return NoiseDensity(
        freq_hz=first.freq_hz,
        density_w_per_hz=mean,
        u_density_w_per_hz=u,
        independent_samples=(
            None
            if any(s is None for s in samples)
            else float(sum(s for s in samples if s is not None))
        ),
        band_hz=first.band_hz,
        bins_used=first.bins_used,
        excluded_freq_hz=excluded,
        scatter_ratio=pooled,
        bias_correction_db=sum(
            w * d.bias_correction_db for w, d in zip(weights, parts, strict=True)
        )
        / total_w,
        settings=settings,
        acquisition_time_s=(
            None if any(t is None for t in times) else float(sum(t for t in times if t is not None))
        ),
    )


class DensitySeries:
    """All readings of one density of one point, in acquisition order."""

    def __init__(self) -> None:
        self.parts: list[NoiseDensity] = []
        self._combined: tuple[tuple[int, ...], CombinedDensity] | None = None

    def add(self, density: NoiseDensity) -> None:
        self.parts.append(density)

    def __len__(self) -> int:
        return len(self.parts)

    @property
    def averages(self) -> int:
        """Trace averages behind the readings so far."""
        return sum(d.settings.averages if d.settings is not None else 1 for d in self.parts)

    def combined(self) -> CombinedDensity:
        """:func:`combine_densities` of the parts; kept until the parts change (a sweep asks
        for the same combination at every decision, entry and summary of a round)."""
        key = tuple(map(id, self.parts))  # the list holds the parts: ids stay theirs
        if self._combined is None or self._combined[0] != key:
            self._combined = (key, combine_densities(self.parts))
        return self._combined[1]


def averages_at_target(
    averages: int, u_reducible: float, u_fixed: float, target: float
) -> float | None:
    """The averages that would have given exactly ``target`` (may be below ``averages``)."""
    room = target**2 - u_fixed**2
    if room <= 0 or averages < 1:
        return None
    return averages * u_reducible**2 / room


def averages_for_target(
    averages: int,
    u_reducible: float,
    u_fixed: float,
    target: float,
    *,
    margin: float = PLANNING_MARGIN,
) -> int | None:
    """Total averages for the point's statistical uncertainty to reach ``target``.

    ``u_reducible`` is the part that falls as 1/sqrt(averages) (measured with ``averages`` so
    far), ``u_fixed`` the part that does not (calibration). Returns None when ``u_fixed``
    alone reaches the target (more averages cannot help).
    """
    if averages < 1:
        raise InputError("averages", f"must be >= 1 (got {averages})")
    if target <= 0:
        raise InputError("target", f"must be > 0 (got {target!r})")
    room = target**2 - u_fixed**2
    if room <= 0:
        return None
    needed = averages * u_reducible**2 / room * margin
    return max(averages, int(math.ceil(needed)))


class TimeBudget:
    """Instrument time of one group of points (s): used so far, the limit, the rate per trace
    average measured so far, and how many averages still fit."""

    def __init__(self, limit_s: float) -> None:
        self.limit_s = limit_s
        self.used_s = 0.0
        self._trace_s = 0.0
        self._trace_averages = 0

    def charge(self, seconds: float) -> None:
        self.used_s += max(0.0, seconds)

    def charge_trace(self, seconds: float, averages: int) -> None:
        self.charge(seconds)
        self._trace_s += max(0.0, seconds)
        self._trace_averages += averages

    @property
    def left_s(self) -> float:
        return self.limit_s - self.used_s

    def seconds_per_average(self, fallback_s: float) -> float:
        if self._trace_averages:
            return self._trace_s / self._trace_averages
        return fallback_s

    def averages_that_fit(self, traces: int, overhead_s: float, fallback_s: float) -> int:
        """Largest per-trace average count of a round of ``traces`` traces that still fits."""
        per = self.seconds_per_average(fallback_s)
        room = self.left_s - overhead_s
        if per <= 0:
            return 1_000_000 if room > 0 else 0
        return max(0, int(room / (traces * per)))

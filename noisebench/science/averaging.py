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
from array import array
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

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
    columns = _Columns()
    for d in parts:
        columns.add(d)
    return _combine(columns, alpha)


class _First(NamedTuple):
    """What the combined density takes from the first reading."""

    freq_hz: float
    band_hz: float | None
    bins_used: int | None
    settings: AcquisitionSettings | None


class _Columns:
    """What combining needs of each reading, kept as numbers in acquisition order (about 70
    bytes a reading instead of a 1.5 kB model: a sweep-level schedule holds every point's
    readings until the sweep ends). The sums below run over the same floats in the same
    order as over the models, so the combined density is the same to the bit."""

    def __init__(self) -> None:
        self.first: _First | None = None
        self.freqs_hz = array("d")
        self.values = array("d")  # density_w_per_hz
        self.u = array("d")  # u_density_w_per_hz
        self.weights = array("d")
        self.bias_db = array("d")
        self.averages = array("q")
        self.ratios = array("d")  # the scatter ratios given, in order
        self.samples = array("d")  # the independent-sample counts given, in order
        self.times_s = array("d")  # the acquisition times given, in order
        self.samples_missing = False
        self.times_missing = False
        self.excluded_hz: set[float] = set()

    def __len__(self) -> int:
        return len(self.values)

    def add(self, d: NoiseDensity) -> None:
        if self.first is None:
            self.first = _First(d.freq_hz, d.band_hz, d.bins_used, d.settings)
        self.freqs_hz.append(d.freq_hz)
        self.values.append(d.density_w_per_hz)
        self.u.append(d.u_density_w_per_hz)
        self.weights.append(_weight(d))
        self.bias_db.append(d.bias_correction_db)
        self.averages.append(d.settings.averages if d.settings is not None else 1)
        if d.scatter_ratio is not None:
            self.ratios.append(d.scatter_ratio)
        if d.independent_samples is None:
            self.samples_missing = True
        else:
            self.samples.append(d.independent_samples)
        if d.acquisition_time_s is None:
            self.times_missing = True
        else:
            self.times_s.append(d.acquisition_time_s)
        self.excluded_hz.update(d.excluded_freq_hz)


def _combine(c: _Columns, alpha: float) -> CombinedDensity:
    f0 = c.freqs_hz[0]
    for f in c.freqs_hz[1:]:
        if not math.isclose(f, f0, rel_tol=1e-9):
            raise InputError(
                "parts.freq_hz",
                f"readings at {format_frequency(f, 9)} and {format_frequency(f0, 9)} cannot "
                "be combined",
                fix="combine readings of one frequency",
            )
    weights = list(c.weights)
    total_w = sum(weights)
    mean = sum(w * x for w, x in zip(weights, c.values, strict=True)) / total_w
    u = math.sqrt(sum((w * ux) ** 2 for w, ux in zip(weights, c.u, strict=True))) / total_w
    chi2, birge, excess = _scatter_test(c, mean, alpha)
    if excess:
        u *= birge
    averages = sum(c.averages)
    density = _merged(c, weights, mean, u, birge if excess else None, averages)
    return CombinedDensity(density, len(c), averages, chi2, birge, excess)


def _scatter_test(c: _Columns, mean: float, alpha: float) -> tuple[float | None, float, bool]:
    usable = [(x, ux) for x, ux in zip(c.values, c.u, strict=True) if ux > 0]
    dof = len(usable) - 1
    if dof < 1:
        return None, 1.0, False
    chi2 = sum(((x - mean) / ux) ** 2 for x, ux in usable)
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
    c: _Columns,
    weights: Sequence[float],
    mean: float,
    u: float,
    birge: float | None,
    averages: int,
) -> NoiseDensity:
    first = c.first
    assert first is not None  # _combine is called with readings
    total_w = sum(weights)
    ratios = c.ratios
    pooled = math.sqrt(sum(r * r for r in ratios) / len(ratios)) if ratios else None
    if birge is not None:
        pooled = max(pooled or 0.0, birge)
    settings = _with_averages(first.settings, averages) if first.settings is not None else None
    return NoiseDensity(
        freq_hz=first.freq_hz,
        density_w_per_hz=mean,
        u_density_w_per_hz=u,
        independent_samples=None if c.samples_missing else float(sum(c.samples)),
        band_hz=first.band_hz,
        bins_used=first.bins_used,
        excluded_freq_hz=sorted(c.excluded_hz),
        scatter_ratio=pooled,
        bias_correction_db=sum(w * b for w, b in zip(weights, c.bias_db, strict=True)) / total_w,
        settings=settings,
        acquisition_time_s=None if c.times_missing else float(sum(c.times_s)),
    )


class DensitySeries:
    """All readings of one density of one point, in acquisition order (kept as the numbers
    combining needs, see ``_Columns``)."""

    def __init__(self, columns: _Columns | None = None) -> None:
        self._columns = columns if columns is not None else _Columns()
        self._combined: tuple[int, CombinedDensity] | None = None

    def add(self, density: NoiseDensity) -> None:
        self._columns.add(density)

    def __len__(self) -> int:
        return len(self._columns)

    @property
    def averages(self) -> int:
        """Trace averages behind the readings so far."""
        return sum(self._columns.averages)

    def combined(self) -> CombinedDensity:
        """:func:`combine_densities` of the readings; kept until a reading is added (a sweep
        asks for the same combination at every decision, entry and summary of a round)."""
        count = len(self._columns)
        if not count:
            raise InputError("parts", "no readings to combine", fix="acquire at least one trace")
        if self._combined is None or self._combined[0] != count:
            self._combined = (count, _combine(self._columns, SCATTER_ALPHA))
        return self._combined[1]


_ROW = 9  # numbers per frequency and reading in ReadingTable
_NONE = math.nan  # an optional field not given (the fields it stands for are never NaN)


class PackedReading:
    """One reading (a density per frequency of one trace) as :class:`ReadingTable` stores it:
    9 numbers per frequency plus band, bins and settings (about 100 bytes a frequency instead
    of a 1.5 kB model). A sweep-level pass holds every group's new reading until the step's
    error check accepts them all, so they are packed as they are read; adding the packed
    reading to a table stores the same floats in the same order as adding the densities."""

    __slots__ = ("bands", "bins", "excluded", "rows", "settings")

    def __init__(self, densities: Sequence[NoiseDensity]) -> None:
        self.rows = array("d")
        self.bands = array("d")
        self.bins = array("q")
        self.settings: list[AcquisitionSettings | None] = []
        self.excluded: dict[int, list[float]] = {}
        for i, d in enumerate(densities):
            self.rows.extend(
                (
                    d.freq_hz,
                    d.density_w_per_hz,
                    d.u_density_w_per_hz,
                    _weight(d),
                    d.bias_correction_db,
                    d.settings.averages if d.settings is not None else 1,
                    _NONE if d.scatter_ratio is None else d.scatter_ratio,
                    _NONE if d.independent_samples is None else d.independent_samples,
                    _NONE if d.acquisition_time_s is None else d.acquisition_time_s,
                )
            )
            self.bands.append(_NONE if d.band_hz is None else d.band_hz)
            self.bins.append(-1 if d.bins_used is None else d.bins_used)
            self.settings.append(d.settings)
            if d.excluded_freq_hz:
                self.excluded[i] = list(d.excluded_freq_hz)

    def __len__(self) -> int:
        return len(self.rows) // _ROW

    def densities_w_per_hz(self) -> list[float]:
        """Each frequency's density (the same floats as the densities packed)."""
        return list(self.rows[1::_ROW])


class ReadingTable:
    """Every reading of one density (e.g. ``hot``) at each frequency one trace serves, in
    acquisition order, as 9 numbers per frequency and reading (72 bytes) in one array, plus
    what the first reading gives the combined density (band, bins, settings): a sweep-level
    schedule holds all its groups' readings at once, and a :class:`DensitySeries` per
    frequency (its own arrays, first reading and cached combination) costs about 2.5 kB.
    :meth:`series` rebuilds frequency ``i``'s series from the same floats in the same order,
    so its combination is the same to the bit."""

    __slots__ = ("_bands", "_bins", "_excluded", "_rows", "_settings", "width")

    def __init__(self, width: int) -> None:
        self.width = width  # frequencies per reading
        self._rows = array("d")
        self._bands = array("d")
        self._bins = array("q")
        self._settings: list[AcquisitionSettings | None] = []
        self._excluded: dict[int, set[float]] = {}

    def __len__(self) -> int:
        """Readings so far."""
        return len(self._rows) // (_ROW * self.width) if self.width else 0

    def add(self, densities: Sequence[NoiseDensity] | PackedReading) -> None:
        """Append one reading: a density per frequency, or the same already packed."""
        packed = densities if isinstance(densities, PackedReading) else PackedReading(densities)
        if len(packed) != self.width:
            raise ValueError(f"{len(packed)} densities for {self.width} frequencies")
        if not self._rows:
            self._bands.extend(packed.bands)
            self._bins.extend(packed.bins)
            self._settings.extend(packed.settings)
        self._rows.extend(packed.rows)
        for i, excluded in packed.excluded.items():
            self._excluded.setdefault(i, set()).update(excluded)

    def averages(self, i: int) -> int:
        """Trace averages behind frequency ``i``'s readings."""
        rows = self._rows
        step = _ROW * self.width
        return sum(int(rows[k]) for k in range(_ROW * i + 5, len(rows), step))

    def series(self, i: int) -> DensitySeries:
        """Frequency ``i``'s readings as a :class:`DensitySeries` (made on each call)."""
        c = _Columns()
        rows = self._rows
        step = _ROW * self.width
        for k in range(_ROW * i, len(rows), step):
            f, x, u, w, b, n, ratio, samples, seconds = rows[k : k + _ROW]
            c.freqs_hz.append(f)
            c.values.append(x)
            c.u.append(u)
            c.weights.append(w)
            c.bias_db.append(b)
            c.averages.append(int(n))
            if not math.isnan(ratio):
                c.ratios.append(ratio)
            if math.isnan(samples):
                c.samples_missing = True
            else:
                c.samples.append(samples)
            if math.isnan(seconds):
                c.times_missing = True
            else:
                c.times_s.append(seconds)
        if len(c):
            band = self._bands[i]
            bins = self._bins[i]
            c.first = _First(
                c.freqs_hz[0],
                None if math.isnan(band) else band,
                None if bins < 0 else bins,
                self._settings[i],
            )
            c.excluded_hz = set(self._excluded.get(i, ()))
        return DensitySeries(c)


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

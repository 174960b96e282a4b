"""The sequencer's state and its bench steps: configure the analyzer, acquire densities, switch
the noise source behind the power guard, record skipped groups."""

from __future__ import annotations

import itertools
import logging
import time
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from noisebench.bench.acquisition import AcquisitionRequest, AcquisitionSettings, Trace
from noisebench.bench.registry import BenchSession, Connection
from noisebench.errors import InputError, MeasurementError, NoisebenchError, UnverifiedStep
from noisebench.running.calibration import (
    CalibrationStore,
)
from noisebench.running.corrections import Corrections
from noisebench.running.groups import PointGroup, auto_points
from noisebench.running.plan import Plan
from noisebench.running.progress import NullProgress, RunProgress
from noisebench.running.safety import (
    PowerCheck,
    PowerGuard,
)
from noisebench.science.averaging import (
    DensitySeries,
    PackedReading,
    ReadingTable,
    TimeBudget,
)
from noisebench.science.density import NoiseDensity
from noisebench.science.point import PointResult
from noisebench.science.trace_combine import combine_traces, split_averages

logger = logging.getLogger(__name__)


PointHook = Callable[[PointResult], None]

STEP_RETRIES = 2
"""A step whose error-queue read was lost to a reconnect (:class:`UnverifiedStep`) is read
again at most this many times (the drivers' own retries per operation: 2)."""

Commit = Callable[[], None]


@dataclass
class _GroupOutcome:
    points: list[PointResult]
    settings: AcquisitionSettings | None
    time_s: float


class _Readings:
    """Per-frequency readings of each name (``hot``/``cold`` or ``dut``/``floor``) of one group,
    one :class:`ReadingTable` per name (a few dozen bytes per frequency and reading). A series
    asked for is made from the table; the latest combinations are kept in a small cache shared
    by all groups (``_COMBINED``), so a group's decision, entry and summary combine each
    series once, and a sweep that holds every group's readings keeps no combination per
    point."""

    _tokens = itertools.count()

    def __init__(self, names: tuple[str, ...], freqs_hz: Sequence[float]) -> None:
        self.names = names
        self.freqs_hz = tuple(freqs_hz)
        self._token = next(self._tokens)
        self._tables: dict[str, ReadingTable] = {}
        self._index: dict[float, int] | None = None

    def add(self, name: str, densities: Sequence[NoiseDensity] | PackedReading) -> None:
        if len(densities) != len(self.freqs_hz):
            raise ValueError(f"{len(densities)} densities for {len(self.freqs_hz)} frequencies")
        table = self._tables.get(name)
        if table is None:
            table = self._tables[name] = ReadingTable(len(self.freqs_hz))
        table.add(densities)

    def get(self, f: float, name: str) -> DensitySeries:
        if self._index is None:
            self._index = {}
            for k, freq in enumerate(self.freqs_hz):
                self._index.setdefault(freq, k)
        i = self._index.get(f)
        table = self._tables.get(name)
        if i is None or table is None:
            return DensitySeries()
        key = (self._token, name, i, len(table))
        series = _COMBINED.get(key)
        if series is None:
            series = _COMBINED[key] = table.series(i)
            if len(_COMBINED) > COMBINED_KEPT:
                _COMBINED.popitem(last=False)
        else:
            _COMBINED.move_to_end(key)
        return series

    def averages(self, name: str) -> int:
        table = self._tables.get(name)
        return table.averages(0) if table is not None and self.freqs_hz else 0

    def release(self) -> None:
        """Forget every reading (a finished group: its points are stored)."""
        self._tables = {}


COMBINED_KEPT = 512
"""Series (and their combinations) kept by ``_Readings.get``: a group's frequencies times its
reading names, with room (a combination costs about 1.3 kB)."""

_COMBINED: OrderedDict[tuple[int, str, int, int], DensitySeries] = OrderedDict()


REQUESTS_KEPT = 4096
"""Predicted requests kept by ``SequencerCore._request`` (a sweep's groups times their few
average counts; cleared when full, so a long sweep's memory stays flat)."""


class SequencerCore:
    """State shared by the sequencer's steps and the bench operations they all use."""

    def __init__(
        self,
        plan: Plan,
        session: BenchSession,
        *,
        calibrations: CalibrationStore | None = None,
        progress: RunProgress | None = None,
        on_point: PointHook | None = None,
    ) -> None:
        self.plan = plan
        self.session = session
        self.calibrations = calibrations if calibrations is not None else CalibrationStore()
        self.progress = progress or NullProgress()
        self.on_point = on_point
        self.corrections: Corrections | None = None
        self.guard: PowerGuard | None = None
        self._last_request: AcquisitionRequest | None = None
        # (group, averages, analyzer) ids -> (group, analyzer, predicted request): _request
        self._requests: dict[tuple[int, int, int], tuple[Any, Any, AcquisitionRequest]] = {}
        self._applied: list[dict[str, Any]] = []
        self._applied_by_key: dict[tuple, dict[str, Any]] = {}  # settings values -> entry
        self._measured_gain: dict[float, tuple[float, float]] = {}
        self._prior: dict[str, int] = {}  # averages per reading the last group needed
        self._unmeasurable: set[int] = set()
        self._rate_s: float | None = None  # instrument seconds per trace average, last group
        self.skipped: list[dict[str, Any]] = []  # points the physics refused, with the reason
        self.calibrations_measured = 0
        self.lo: Any = None  # conversion.LoControl of a frequency-converting DUT
        self.image_rejection: Any = None  # conversion.ImageRejection

    def _with_context(self, group: PointGroup, work: Callable[[], Any]) -> Any:
        try:
            return work()
        except NoisebenchError as exc:
            raise exc.add_context(freq_hz=group.freqs_hz[0], group=group.describe()) from None

    def _skip(self, group: PointGroup, exc: MeasurementError, stage: str, writer) -> None:
        """The physics refuses this group's points: record why and go on with the others."""
        self._unmeasurable.add(group.index)
        for f in group.freqs_hz:
            entry = {"freq_hz": group.rf_of(f), "stage": stage, "reason": exc.message}
            if group.lo_hz is not None:
                entry.update(if_hz=f, lo_hz=group.lo_hz)
            self.skipped.append(entry)
        logger.warning("%s not measured (%s): %s", group.describe(), stage, exc.message)
        self.progress.step_done(len(group.freqs_hz))  # the phase's bar still reaches its end
        writer.update_info(notes={**writer.info.notes, "skipped_points": self.skipped})

    def _checked_step(self, read: Callable[[], list[Commit]]) -> None:
        """Run ``read`` (acquisitions; it returns what accepting each reading does, nothing
        accepted yet) as one step of the analyzer (``Analyzer.begin_step``/``end_step``),
        then accept the readings once the step's error check came back clean. An error
        discards them all and propagates as before; a check lost to a reconnect
        (:class:`UnverifiedStep`) reads the step again, at most ``STEP_RETRIES`` times. The
        instrument time spent stays charged (it was spent)."""
        analyzer = self.session.bench.analyzer
        for attempt in range(STEP_RETRIES + 1):
            analyzer.begin_step()
            try:
                commits = read()
                analyzer.end_step()
            except UnverifiedStep as exc:
                if attempt == STEP_RETRIES:
                    raise
                logger.warning(
                    "%s; reading the step again (%d of %d)", exc, attempt + 1, STEP_RETRIES
                )
                continue
            except BaseException:
                analyzer.end_step(check=False)
                raise
            for commit in commits:
                commit()
            return

    def _corr(self) -> Corrections:
        """The run's corrections (resolved when the run starts)."""
        if self.corrections is None:  # pragma: no cover - _prepare runs first
            raise MeasurementError("the corrections are not resolved")
        return self.corrections

    def _guard(self) -> PowerGuard:
        if self.guard is None:  # pragma: no cover - _prepare runs first
            raise MeasurementError("the power checks are not set up")
        return self.guard

    def _request(self, group: PointGroup, averages: int) -> AcquisitionRequest:
        """The group's request as the analyzer will apply it (its profile's rounding): an RBW
        it rounds also sets the automatic trace length, so the points per RBW stay as planned.
        Kept per (group, averages, analyzer): a switched sweep asks for the same few requests
        at every pass, and each costs model validation and the profile's rounding (the same
        request object every time, nobody changes it: ``_configure`` compares identity first)."""
        analyzer = self.session.bench.analyzer
        key = (id(group), int(averages), id(analyzer))
        kept = self._requests.get(key)
        if kept is not None and kept[0] is group and kept[1] is analyzer:
            return kept[2]
        request = self._new_request(group, averages)
        if len(self._requests) >= REQUESTS_KEPT:
            self._requests.clear()
        self._requests[key] = (group, analyzer, request)  # the objects keep their ids taken
        return request

    def _new_request(self, group: PointGroup, averages: int) -> AcquisitionRequest:
        analyzer = self.session.bench.analyzer
        request = analyzer.predict(group.request(averages))
        if (
            group.policy.trace_points is None
            and request.span_hz > 0
            and request.rbw_hz != group.policy.rbw_hz
        ):
            points = auto_points(request.span_hz, request.rbw_hz)
            request = analyzer.predict(request.model_copy(update={"points": points}))
        return request

    def _configure(self, group: PointGroup, averages: int) -> AcquisitionSettings:
        request = self._request(group, averages)
        analyzer = self.session.bench.analyzer
        if (
            request is not self._last_request and request != self._last_request
        ) or analyzer.settings is None:
            analyzer.configure(request)
            self._last_request = request
        return analyzer.settings  # type: ignore[return-value]

    def _acquire(self, group: PointGroup, averages: int, budget: TimeBudget) -> list[NoiseDensity]:
        from noisebench.science.estimator import estimate_densities, estimate_density

        analyzer = self.session.bench.analyzer
        traces: list[Trace] = []
        for count in split_averages(averages, analyzer.max_averages_per_trace):
            self._configure(group, count)
            started = self._now_s()
            part: Trace = analyzer.acquire_trace()
            seconds = part.acquisition_time_s
            if seconds is None:
                seconds = self._now_s() - started
            budget.charge_trace(seconds, part.settings.averages)
            traces.append(part)
        # more averages than one trace can hold: combined on the averaging scale, exactly as
        # one longer average (noisebench.science.trace_combine)
        trace = combine_traces(traces)
        lines = self._known_lines_hz(group)
        if group.band_hz is None:
            density = estimate_density(trace, known_lines_hz=lines)
            return [density.model_copy(update={"freq_hz": group.freqs_hz[0]})]
        return list(
            estimate_densities(trace, list(group.freqs_hz), group.band_hz, known_lines_hz=lines)
        )

    def _now_s(self) -> float:
        """Instrument time: the bench's own clock when it keeps one (a simulated bench, so a
        seeded run repeats exactly), else the wall clock."""
        clock = self.session.instrument_time_s()
        return time.monotonic() if clock is None else clock

    def _known_lines_hz(self, group: PointGroup) -> list[float]:
        """Lines known to be in the trace: a converter's LO leakage and its harmonics."""
        conv = self.plan.conversion
        if conv is None or group.lo_hz is None:
            return []
        from noisebench.running.conversion import leakage_lines_hz

        return leakage_lines_hz(group.lo_hz, conv.lo_harmonics)

    def _set_lo(self, group: PointGroup, budget: TimeBudget) -> None:
        """Tune a converter's LO for this group (level and settling from the plan)."""
        if self.lo is None or group.lo_hz is None:
            return
        budget.charge(self.lo.set(group.lo_hz))

    def _set_hot(
        self, hot: bool, budget: TimeBudget, connection: Connection, group: PointGroup
    ) -> PowerCheck | None:
        source = self.session.bench.noise_source
        if source is None:
            raise InputError("bench.noise_source", "this step needs a noise source")
        if source.is_hot == hot:
            return None
        check = None
        if hot and not self.session.bench.analyzer.replays_recordings:
            settings = self.session.bench.analyzer.settings
            check = self._guard().before_hot(
                through=connection is Connection.THROUGH,
                attenuation_db=settings.attenuation_db if settings else None,
                preamp=settings.preamp if settings else None,
                freq_hz=group.freqs_hz[0],
            )
        source.set_hot(hot)
        budget.charge(source.settle_time_s)
        return check

    def _set_source_cold(self, budget: TimeBudget) -> None:
        source = self.session.bench.noise_source
        if source is not None and source.is_hot:
            source.set_hot(False)
            budget.charge(source.settle_time_s)

    def _settle_s(self) -> float:
        source = self.session.bench.noise_source
        return source.settle_time_s if source is not None else 0.0

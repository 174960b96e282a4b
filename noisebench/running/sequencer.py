"""The measurement sequencer: a validated plan in, calibrated and stored point results out.

Order of a run (each step only when needed):

1. **Calibration** with the DUT out, for every group of points, unless a stored calibration
   with the same settings is still valid (:mod:`noisebench.running.calibration`):
   gain method: the analyzer floor on a matched termination (``TERMINATION``);
   Y-factor: the system (noise source straight into the analyzer, ``THROUGH``), hot and cold.
2. **DUT gain** with the generator (gain method, ``[gain] source = "measure"``).
3. **Measurement** with the DUT in (``DUT``), group by group. A group is a set of points one
   trace covers (same settings, bands close enough that the trace is mostly useful band).

Adaptive averaging per group: a first round with ``min_averages`` (or, after the first group,
with what the previous group needed: neighbouring frequencies need similar averaging); then the
averages that reach ``target_u_nf_db`` are planned from the radiometer scaling
``u ~ 1/sqrt(averages)`` of the part of the point's uncertainty that averaging reduces (the
calibration's part does not fall), and acquired; the estimate is checked again (estimator
uncertainty widened by the measured between-trace scatter, :mod:`noisebench.science.averaging`)
until
the target is met, ``max_averages`` is reached, or the group's instrument time
(``time_limit_s`` per point, settling included) would run out: then the point is flagged
``time_limit``. Y-factor readings run as hot-cold-cold-hot rounds, so a linear drift of the
system gain cancels in Y. Calibrations are averaged the same way, to a design target (see
:mod:`noisebench.running.calibration`). A point the physics refuses (``MeasurementError``, e.g. a
system calibration whose hot reading is not above the cold one) is skipped with its reason in
``info.notes["skipped_points"]`` and the run goes on.

Safety (:mod:`noisebench.running.safety`): the expected total noise power into the analyzer is
checked
before the noise source goes hot, the tone power before the generator output goes on; a refusal
is a :class:`~noisebench.errors.SafetyError` before anything is switched. Ctrl-C
(KeyboardInterrupt) puts the bench in its safe state (source off, generator off), keeps every
finished point and ends the run as ``interrupted``; it can be continued with ``resume``.
Instrument faults travel up with the frequency they happened at.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from noisebench.bench.acquisition import AcquisitionRequest, AcquisitionSettings, Trace
from noisebench.bench.registry import BenchSession, Connection
from noisebench.errors import InputError, MeasurementError, NoisebenchError
from noisebench.running.calibration import (
    DEFAULT_DESIGN_GAIN_DB,
    CalibrationEntry,
    CalibrationKind,
    CalibrationStore,
    floor_design_u_db,
    system_design_u_db,
)
from noisebench.running.corrections import Corrections, resolve_corrections
from noisebench.running.plan import AcquisitionPolicy, FrequencyPoint, Plan
from noisebench.running.progress import NullProgress, RunProgress
from noisebench.running.safety import (
    DEFAULT_COMPRESSION_DBM,
    DEFAULT_MAX_INPUT_DBM,
    InputLimits,
    PowerCheck,
    PowerGuard,
    check_generator_level,
)
from noisebench.science.averaging import (
    DensitySeries,
    TimeBudget,
    averages_at_target,
    averages_for_target,
)
from noisebench.science.density import NoiseDensity
from noisebench.science.point import Method, PointFlag, PointResult

logger = logging.getLogger(__name__)

AUTO_POINTS_PER_RBW = 4
"""Trace points per RBW when the plan does not set ``trace_points``: bins closer than the RBW
are correlated (no more information), but a few per RBW let the estimator find and cut spurs."""
MIN_AUTO_POINTS = 21
ZERO_SPAN_POINTS = 101
PILOT_FRACTION = 0.5
"""Gain method: a group's first round takes half the averages the previous group needed; one
well-planned top-up round usually follows, and a point that needs much less wastes at most
that half."""
PILOT_FRACTION_SWITCHED = 1.1
"""Y-factor: every extra hot-cold-cold-hot round costs two noise-source settling times, so the
first round takes what the previous group needed plus the planning margin, and usually ends
the point in one round."""
MAX_ROUND_GROWTH = 16
"""A round may at most multiply the averages so far by 16: the first estimate of u from few
averages scatters, and a cap keeps one noisy estimate from buying far too many averages."""
BAND_EDGE_MARGIN = 0.02
"""Each trace is 2 % wider than its bands so an instrument's rounding of the span never puts a
band edge outside the trace."""


# --------------------------------------------------------------------------- groups


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
        lo, hi = self.freqs_hz[0], self.freqs_hz[-1]
        return f"{lo:.6g} Hz" if lo == hi else f"{lo:.6g}..{hi:.6g} Hz"


def _auto_points(span_hz: float, rbw_hz: float) -> int:
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
    ordered = sorted(points, key=lambda p: p.freq_hz)
    runs: list[list[FrequencyPoint]] = []
    for point in ordered:
        if (
            runs
            and runs[-1][-1].policy == point.policy
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
    if band == 0:
        points = policy.trace_points or ZERO_SPAN_POINTS
        return PointGroup(index, freqs, policy, freqs[0], 0.0, None, points)
    span = (freqs[-1] - freqs[0]) + band * (1.0 + BAND_EDGE_MARGIN)
    points = policy.trace_points or _auto_points(span, policy.rbw_hz)
    return PointGroup(index, freqs, policy, (freqs[0] + freqs[-1]) / 2, span, band, points)


def power_guard_for(plan: Plan, session: BenchSession, corrections: Corrections) -> PowerGuard:
    """The pre-switch power checks for this plan and bench (rated input: plan, else driver)."""
    s, a = plan.safety, plan.bench.analyzer
    rated = (
        a.max_input_dbm
        if a.max_input_dbm is not None
        else session.bench.analyzer.max_input_power_dbm
    )
    limits = InputLimits(
        max_input_dbm=DEFAULT_MAX_INPUT_DBM if rated is None else rated,
        compression_dbm=DEFAULT_COMPRESSION_DBM if a.compression_dbm is None else a.compression_dbm,
        compression_backoff_db=s.compression_backoff_db,
        caution_backoff_db=s.caution_backoff_db,
    )
    return PowerGuard(
        limits,
        bandwidth_hz=s.dut_bandwidth_hz or 2.0 * max(p.freq_hz for p in plan.points()),
        declared_gain_db=s.dut_max_gain_db,
        enr_db=corrections.max_enr_db(),
        cold_temperature_k=corrections.source_temperature_k,
        t0_k=corrections.t0_k,
        declared_nf_db=plan.expect.dut_nf_db,
    )


# --------------------------------------------------------------------------- the sequencer


PointHook = Callable[[PointResult], None]


@dataclass
class _GroupOutcome:
    points: list[PointResult]
    settings: AcquisitionSettings | None
    time_s: float


@dataclass
class _Readings:
    """Per-frequency series of each reading (``hot``/``cold`` or ``dut``/``floor``)."""

    names: tuple[str, ...]
    freqs_hz: tuple[float, ...]
    series: dict[tuple[float, str], DensitySeries] = field(default_factory=dict)

    def add(self, name: str, densities: Sequence[NoiseDensity]) -> None:
        for f, d in zip(self.freqs_hz, densities, strict=True):
            self.series.setdefault((f, name), DensitySeries()).add(d)

    def get(self, f: float, name: str) -> DensitySeries:
        return self.series.setdefault((f, name), DensitySeries())

    def averages(self, name: str) -> int:
        return self.get(self.freqs_hz[0], name).averages


class Sequencer:
    """Runs a plan on an opened bench; see the module docstring for the order of work.

    ``calibrations`` is shared between runs on the same bench (pass the same store to reuse
    valid calibrations). ``progress`` shows points done, time left and the last NF.
    ``on_point`` is called after each point is stored (hooks, tests; an exception there ends
    the run like one from the bench, KeyboardInterrupt as Ctrl-C). Operator prompts belong to
    the session (:func:`noisebench.bench.registry.open_bench`).
    """

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
        self._applied: list[dict[str, Any]] = []
        self._measured_gain: dict[float, tuple[float, float]] = {}
        self._prior: dict[str, int] = {}  # averages per reading the last group needed
        self._unmeasurable: set[int] = set()
        self._rate_s: float | None = None  # instrument seconds per trace average, last group
        self.skipped: list[dict[str, Any]] = []  # points the physics refused, with the reason
        self.calibrations_measured = 0

    # ----------------------------------------------------------------- entry points

    def run(self, folder: Path | None = None, *, resume: bool = False):
        """Measure the plan into ``folder`` (new run) or continue the run in it (``resume``).

        Returns the :class:`~noisebench.results.store.RunRecord`; ``record.info.status`` is
        ``complete``, or ``interrupted`` after Ctrl-C. Other errors end the run as ``failed``
        and propagate (with the frequency point in their context).
        """
        from noisebench.results.store import RunWriter

        if resume:
            if folder is None:
                raise InputError("resume", "needs the folder of the interrupted run")
            from noisebench.results.store import load_run

            self._check_resumable(load_run(Path(folder)).info.plan)  # before touching it
            writer = RunWriter.resume(Path(folder))
            if writer.info.identities == self.session.bench.identities():
                stored = CalibrationStore.from_dict(writer.info.calibration)
                self.calibrations.entries[:0] = stored.entries
            else:
                logger.warning("instruments differ from the interrupted run's: calibrating again")
        else:
            writer = RunWriter.create(
                Path(folder) if folder else self.default_folder(), self._run_info()
            )
        return self._run_with(writer)

    def default_folder(self) -> Path:
        """``<output.folder>/<UTC time>_<dut id>_<method>`` under the plan's folder."""
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        dut = "".join(
            ch if ch.isalnum() or ch in "-_." else "_" for ch in (self.plan.dut.id or "dut")
        )
        return (
            self.plan.resolve_path(self.plan.output.folder)
            / f"{stamp}_{dut}_{self.plan.method.value}"
        )

    # ----------------------------------------------------------------- run skeleton

    def _run_info(self):
        from noisebench.results.store import RunInfo, collect_versions, new_run_id

        plan = self.plan
        return RunInfo(
            run_id=new_run_id(),
            method=plan.method,
            dut_id=plan.dut.id,
            operator=plan.operator,
            station=plan.station,
            plan=plan.to_dict(),
            identities=self.session.bench.identities(),
            versions=collect_versions(),
            ambient_k=self.session.bench.ambient_k,
            notes={"resources": self.session.resources, "bench_kind": self.session.kind},
        )

    def _check_resumable(self, stored: dict[str, Any]) -> None:
        now = self.plan.to_dict()
        for key in ("method", "sweep", "acquisition", "corrections", "enr", "gain"):
            if stored.get(key) != now.get(key):
                raise InputError(
                    key,
                    "differs from the plan of the interrupted run",
                    fix="resume with the same plan, or start a new run",
                )

    def _run_with(self, writer):
        todo = [p for p in self.plan.points() if p.freq_hz not in writer.done_freqs_hz]
        total = len(self.plan.points())
        self.progress.start(
            total,
            done_points=total - len(todo),
            label=f"{self.plan.method.value} {self.plan.dut.id or ''}".strip(),
        )
        try:
            self._prepare(writer)
            self._measure(todo, writer)
        except KeyboardInterrupt:
            self._safe()
            logger.warning("interrupted: %d of %d points kept", len(writer.done_freqs_hz), total)
            return self._finish(writer, "interrupted")
        except BaseException:
            self._safe()
            try:
                self._finish(writer, "failed")
            except Exception:  # noqa: BLE001 - keep the original error
                logger.exception("could not finish the failed run")
            raise
        finally:
            self.progress.stop()
        self._safe()
        return self._finish(writer, "complete")

    def _prepare(self, writer) -> None:
        self.corrections = resolve_corrections(self.plan, self.session)
        self.guard = power_guard_for(self.plan, self.session, self.corrections)
        writer.update_info(
            cold_temperature_k=self.corrections.source_temperature_k,
            identities=self.session.bench.identities(),
        )

    def _finish(self, writer, status: str):
        if self._applied:  # the frequencies each set of settings served, complete
            writer.update_info(applied_settings=self._applied)
        try:
            verdict = self._verdict(writer)
        except NoisebenchError as exc:  # a verdict problem must not lose the run
            logger.error("no verdict: %s", exc)
            verdict = None
        return writer.finish(status, verdict=verdict)

    def _safe(self) -> None:
        self.session.bench.safe_state()

    def _guard(self) -> PowerGuard:
        if self.guard is None:  # pragma: no cover - _prepare runs first
            raise MeasurementError("the power checks are not set up")
        return self.guard

    # ----------------------------------------------------------------- the work

    def _measure(self, todo: list[FrequencyPoint], writer) -> None:
        groups = plan_groups(todo)
        if not groups:
            return
        self._calibrate_all(groups, writer)
        if self.plan.method is Method.GAIN and self.corrections.gain is None:  # type: ignore
            self._measure_gain(groups, writer)
        self.session.connect(Connection.DUT)
        for group in groups:
            if group.index in self._unmeasurable:
                continue
            try:
                outcome = self._with_context(group, lambda g=group: self._measure_group(g))
            except MeasurementError as exc:
                self._skip(group, exc, "measurement", writer)
                continue
            self._record_settings(outcome.settings, group, writer)
            for point in outcome.points:
                writer.add_point(point, self._budget(point))
                self.progress.point_done(point)
                if self.on_point is not None:
                    self.on_point(point)

    def _record_settings(
        self, settings: AcquisitionSettings | None, group: PointGroup, writer
    ) -> None:
        """Keep each distinct set of applied settings once (centre and averages vary per
        group), with the frequencies it served; ``run.json`` is rewritten only when a new set
        appears."""
        if settings is None:
            return
        dump = settings.model_dump(mode="json", exclude={"center_hz", "averages"})
        for entry in self._applied:
            if entry["settings"] == dump:
                entry["freqs_hz"].extend(group.freqs_hz)
                return
        self._applied.append({"settings": dump, "freqs_hz": list(group.freqs_hz)})
        writer.update_info(applied_settings=self._applied)

    def _with_context(self, group: PointGroup, work: Callable[[], Any]) -> Any:
        try:
            return work()
        except NoisebenchError as exc:
            raise exc.add_context(freq_hz=group.freqs_hz[0], group=group.describe()) from None

    # ----------------------------------------------------------------- acquisition

    def _configure(self, group: PointGroup, averages: int) -> AcquisitionSettings:
        request = group.request(averages)
        analyzer = self.session.bench.analyzer
        if request != self._last_request or analyzer.settings is None:
            analyzer.configure(request)
            self._last_request = request
        return analyzer.settings  # type: ignore[return-value]

    def _acquire(self, group: PointGroup, averages: int, budget: TimeBudget) -> list[NoiseDensity]:
        from noisebench.science.estimator import estimate_densities, estimate_density

        self._configure(group, averages)
        started = time.monotonic()
        trace: Trace = self.session.bench.analyzer.acquire_trace()
        seconds = trace.acquisition_time_s
        if seconds is None:
            seconds = time.monotonic() - started
        budget.charge_trace(seconds, trace.settings.averages)
        if group.band_hz is None:
            density = estimate_density(trace)
            return [density.model_copy(update={"freq_hz": group.freqs_hz[0]})]
        return list(estimate_densities(trace, list(group.freqs_hz), group.band_hz))

    def _set_hot(
        self, hot: bool, budget: TimeBudget, connection: Connection, group: PointGroup
    ) -> PowerCheck | None:
        source = self.session.bench.noise_source
        if source is None:
            raise InputError("bench.noise_source", "this step needs a noise source")
        if source.is_hot == hot:
            return None
        check = None
        if hot:
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

    # ----------------------------------------------------------------- calibration

    def _calibration_kind(self) -> CalibrationKind:
        return CalibrationKind.FLOOR if self.plan.method is Method.GAIN else CalibrationKind.SYSTEM

    def _calibrate_all(self, groups: list[PointGroup], writer) -> None:
        kind = self._calibration_kind()
        needed = []
        for group in groups:
            settings = self._configure(group, group.policy.min_averages)
            if (
                self.calibrations.find(
                    kind, settings, group.freqs_hz, max_age_s=self.plan.calibration.max_age_s
                )
                is None
            ):
                needed.append(group)
        if not needed:
            logger.info("stored %s calibration still valid: reused", kind.value)
            return
        connection = Connection.TERMINATION if kind is CalibrationKind.FLOOR else Connection.THROUGH
        self.session.connect(connection)
        for group in needed:
            try:
                entry = self._with_context(group, lambda g=group: self._calibrate_group(g, kind))
            except MeasurementError as exc:
                self._set_source_cold(TimeBudget(0.0))
                self._skip(group, exc, "calibration", writer)
                continue
            self.calibrations.add(entry)
            self.calibrations_measured += 1
        writer.save_calibration(self.calibrations.to_dict())

    def _skip(self, group: PointGroup, exc: MeasurementError, stage: str, writer) -> None:
        """The physics refuses this group's points: record why and go on with the others."""
        self._unmeasurable.add(group.index)
        for f in group.freqs_hz:
            self.skipped.append({"freq_hz": f, "stage": stage, "reason": exc.message})
        logger.warning("%s not measured (%s): %s", group.describe(), stage, exc.message)
        writer.update_info(notes={**writer.info.notes, "skipped_points": self.skipped})

    def _calibrate_group(self, group: PointGroup, kind: CalibrationKind) -> CalibrationEntry:
        policy = group.policy
        budget = TimeBudget(policy.time_limit_s * len(group.freqs_hz))
        names = ("floor",) if kind is CalibrationKind.FLOOR else ("hot", "cold")
        readings = _Readings(names, group.freqs_hz)
        connection = Connection.TERMINATION if kind is CalibrationKind.FLOOR else Connection.THROUGH
        target = self.plan.calibration.target_ratio * policy.target_u_nf_db
        per_trace = self._first_round_averages(
            policy, len(names), self._prior.get(kind.value), budget
        )
        stopped_by = "target"
        while True:
            self._round(group, readings, per_trace, budget, connection)
            u_worst, settings = self._calibration_u(group, kind, readings)
            if u_worst <= target:
                break
            done = readings.averages(names[0])
            need = (
                averages_for_target(done, u_worst, 0.0, target)
                if math.isfinite(u_worst)
                else 2 * done
            )
            per_trace = self._next_round_averages(policy, done, need, len(names), budget)
            if per_trace == 0:
                stopped_by = "max_averages" if done >= policy.max_averages else "time_limit"
                logger.warning(
                    "%s: calibration stopped by its %s at %d averages (u %.4f dB > "
                    "%.4f dB design target)",
                    group.describe(),
                    stopped_by.replace("_", " "),
                    done,
                    u_worst,
                    target,
                )
                break
        self._set_source_cold(budget)
        self._rate_s = budget.seconds_per_average(self._rate_s or 0.0)
        if stopped_by == "target" and math.isfinite(u_worst):
            done = readings.averages(names[0])
            self._prior[kind.value] = max(1, math.ceil(done * (u_worst / target) ** 2))
        return CalibrationEntry(
            kind=kind,
            settings=settings,
            freqs_hz=list(group.freqs_hz),
            densities={
                n: [readings.get(f, n).combined().density for f in group.freqs_hz] for n in names
            },
            cold_temperature_k=self.corrections.source_temperature_k,  # type: ignore[union-attr]
            instrument_time_s=budget.used_s,
            stopped_by=stopped_by,
            summary=self._calibration_summary(group, kind, readings),
        )

    def _set_source_cold(self, budget: TimeBudget) -> None:
        source = self.session.bench.noise_source
        if source is not None and source.is_hot:
            source.set_hot(False)
            budget.charge(source.settle_time_s)

    def _calibration_u(
        self, group: PointGroup, kind: CalibrationKind, readings: _Readings
    ) -> tuple[float, AcquisitionSettings]:
        """Worst contribution of the calibration to the NF of a design DUT, dB."""
        worst, settings = 0.0, None
        for f in group.freqs_hz:
            if kind is CalibrationKind.FLOOR:
                floor = readings.get(f, "floor").combined().density
                u = self._floor_design_u(f, floor)
                settings = floor.settings
            else:
                hot = readings.get(f, "hot").combined().density
                cold = readings.get(f, "cold").combined().density
                u = self._system_design_u(f, hot, cold)
                settings = hot.settings
            worst = max(worst, u)
        return worst, settings  # type: ignore[return-value]

    def _design_gain_db(self, freq_hz: float) -> float:
        corr = self.corrections
        if corr is not None and corr.gain is not None:
            return corr.gain(freq_hz)[0]
        expect = self.plan.expect.dut_gain_db
        return expect if expect is not None else DEFAULT_DESIGN_GAIN_DB

    def _floor_design_u(self, freq_hz: float, floor: NoiseDensity) -> float:
        corr = self.corrections
        path_gain_db = (
            self._design_gain_db(freq_hz) - corr.input_loss(freq_hz) - corr.output_loss(freq_hz)
        )
        return floor_design_u_db(
            floor, path_gain_db, source_temperature_k=corr.source_temperature_k, t0_k=corr.t0_k
        )

    def _system_design_u(self, freq_hz: float, hot: NoiseDensity, cold: NoiseDensity) -> float:
        corr = self.corrections
        return system_design_u_db(
            hot,
            cold,
            corr.enr_at(freq_hz)[0],
            cold_temperature_k=corr.source_temperature_k,
            design_gain_db=self._design_gain_db(freq_hz),
            t0_k=corr.t0_k,
        )

    def _calibration_summary(
        self, group: PointGroup, kind: CalibrationKind, readings: _Readings
    ) -> list[dict[str, Any]]:
        from noisebench.science.physics import BOLTZMANN_J_PER_K

        out = []
        for f in group.freqs_hz:
            if kind is CalibrationKind.FLOOR:
                floor = readings.get(f, "floor").combined().density
                te_sa = floor.density_w_per_hz / BOLTZMANN_J_PER_K
                out.append(
                    {
                        "freq_hz": f,
                        "floor_w_per_hz": floor.density_w_per_hz,
                        "floor_dbm_per_hz": floor.density_dbm_per_hz,
                        "averages": readings.averages("floor"),
                        "floor_noise_temperature_k": te_sa,
                    }
                )
            else:
                cal = self._system_point(
                    f,
                    readings.get(f, "hot").combined().density,
                    readings.get(f, "cold").combined().density,
                )
                out.append(
                    {
                        "freq_hz": f,
                        "system_nf_db": cal.nf_db,
                        "system_te_k": cal.te_k,
                        "u_system_te_k": cal.u_te_k,
                        "y_db": cal.y_db,
                        "enr_db": cal.enr_db,
                        "averages": readings.averages("hot"),
                    }
                )
        return out

    def _system_point(
        self,
        freq_hz: float,
        hot: NoiseDensity,
        cold: NoiseDensity,
        measured_at: datetime | None = None,
    ):
        from noisebench.science.methods.yfactor import calibrate_point

        corr = self.corrections
        enr_db, u_enr_db, extrapolated = corr.enr_at(freq_hz)
        return calibrate_point(
            hot,
            cold,
            enr_db,
            cold_temperature_k=corr.source_temperature_k,
            u_enr_db=u_enr_db,
            t0_k=corr.t0_k,
            enr_reference=corr.enr_reference,
            enr_extrapolated=extrapolated,
            calibrated_at=measured_at,
        )

    # ----------------------------------------------------------------- rounds

    def _first_round_averages(
        self,
        policy: AcquisitionPolicy,
        states: int,
        prior: int | None = None,
        budget: TimeBudget | None = None,
    ) -> int:
        """Per-trace averages of a group's first round: ``min_averages``, or a share of what
        the previous group needed (neighbouring frequencies need similar averaging), within
        the group's time budget at the previous group's rate."""
        traces_per_state = 2 if states == 2 else 1
        total = policy.min_averages
        if prior:
            fraction = PILOT_FRACTION_SWITCHED if states == 2 else PILOT_FRACTION
            total = max(total, min(int(fraction * prior), policy.max_averages))
        per_trace = max(1, math.ceil(total / traces_per_state))
        if budget is not None and self._rate_s is not None and per_trace > 1:
            settle = self._round_settle_s(states)
            fits = budget.averages_that_fit(traces_per_state * states, settle, self._rate_s)
            per_trace = max(1, min(per_trace, fits))
        return per_trace

    def _next_round_averages(
        self,
        policy: AcquisitionPolicy,
        done: int,
        need: int | None,
        states: int,
        budget: TimeBudget,
    ) -> int:
        """Per-trace averages of the next round (0: stop)."""
        if need is None or done >= policy.max_averages:
            return 0
        traces_per_state = 2 if states == 2 else 1
        want = min(need, policy.max_averages, MAX_ROUND_GROWTH * done) - done
        if want <= 0:
            return 0
        per_trace = max(1, math.ceil(want / traces_per_state))
        settle = self._round_settle_s(states)
        fits = budget.averages_that_fit(traces_per_state * states, settle, fallback_s=0.0)
        return min(per_trace, fits)

    def _round_settle_s(self, states: int) -> float:
        """Settling a hot-cold-cold-hot round costs: to hot (if cold now), hot to cold, cold to
        hot, and the final switch to cold should this be the last round."""
        if states != 2:
            return 0.0
        source = self.session.bench.noise_source
        switches = 3 + (0 if source is not None and source.is_hot else 1)
        return switches * self._settle_s()

    def _settle_s(self) -> float:
        source = self.session.bench.noise_source
        return source.settle_time_s if source is not None else 0.0

    def _round(
        self,
        group: PointGroup,
        readings: _Readings,
        per_trace: int,
        budget: TimeBudget,
        connection: Connection,
    ) -> list[PowerCheck]:
        """One round: ``floor``/``dut`` once, or hot-cold-cold-hot."""
        if readings.names in (("floor",), ("dut",)):
            readings.add(readings.names[0], self._acquire(group, per_trace, budget))
            return []
        checks = []
        for hot in (True, False, False, True):
            check = self._set_hot(hot, budget, connection, group)
            if check is not None:
                checks.append(check)
            densities = self._acquire(group, per_trace, budget)
            readings.add("hot" if hot else "cold", densities)
            if not hot and connection is Connection.DUT:
                self._guard().observe_cold([d.density_w_per_hz for d in densities])
        return checks

    # ----------------------------------------------------------------- measurement

    def _measure_group(self, group: PointGroup) -> _GroupOutcome:
        policy = group.policy
        budget = TimeBudget(policy.time_limit_s * len(group.freqs_hz))
        y_factor = self.plan.method is Method.Y_FACTOR
        names = ("hot", "cold") if y_factor else ("dut",)
        readings = _Readings(names, group.freqs_hz)
        calibration = self._calibration_for(group)
        checks: list[PowerCheck] = []
        if y_factor and self._guard().needs_cold_look:
            self._set_source_cold(budget)
            look = self._acquire(group, self._first_round_averages(policy, 2), budget)
            readings.add("cold", look)
            self._guard().observe_cold([d.density_w_per_hz for d in look])
        per_trace = self._first_round_averages(policy, len(names), self._prior.get("dut"), budget)
        while True:
            checks += self._round(group, readings, per_trace, budget, Connection.DUT)
            points = [self._point(f, readings, calibration) for f in group.freqs_hz]
            done = readings.averages(names[0])
            if all(p.u_nf_db <= policy.target_u_nf_db for p in points):
                stop = "target"
                break
            need = self._averages_needed(points, done, policy.target_u_nf_db)
            per_trace = self._next_round_averages(policy, done, need, len(names), budget)
            if per_trace == 0:
                stop = (
                    "calibration"
                    if need is None
                    else "max_averages"
                    if done >= policy.max_averages
                    else "time_limit"
                )
                break
        self._set_source_cold(budget)
        self._rate_s = budget.seconds_per_average(self._rate_s or 0.0)
        prior = self._averages_at_target(points, readings.averages(names[0]), policy.target_u_nf_db)
        if prior is not None:
            self._prior["dut"] = prior
        settings = self.session.bench.analyzer.settings
        points = [
            self._finish_point(p, readings, budget, group, checks, stop, calibration)
            for p in points
        ]
        return _GroupOutcome(points, settings, budget.used_s)

    def _calibration_for(self, group: PointGroup) -> CalibrationEntry:
        settings = self._configure(group, group.policy.min_averages)
        entry = self.calibrations.find(
            self._calibration_kind(),
            settings,
            group.freqs_hz,
            max_age_s=self.plan.calibration.max_age_s,
        )
        if entry is None:  # pragma: no cover - _calibrate_all ran first
            raise MeasurementError(f"no valid calibration for {group.describe()}")
        return entry

    @staticmethod
    def _averages_at_target(points: list[PointResult], done: int, target: float) -> int | None:
        """What the worst point would have needed exactly: the next group's prior."""
        exact = [averages_at_target(done, *_split_uncertainty(p), target) for p in points]
        known = [n for n in exact if n is not None]
        return max(1, math.ceil(max(known))) if known else None

    @staticmethod
    def _averages_needed(points: list[PointResult], done: int, target: float) -> int | None:
        """Averages (per reading) that bring every point to its goal; None: none can improve.

        The goal is the target; where the calibration's part alone exceeds it, the goal is to
        bring the reducible part down to the calibration's (beyond that, averaging gains
        little)."""
        needs = []
        for point in points:
            if point.u_nf_db <= target:
                continue
            u_red, u_fix = _split_uncertainty(point)
            need = averages_for_target(done, u_red, u_fix, target)
            if need is None and u_red > u_fix:
                need = averages_for_target(done, u_red, 0.0, u_fix)
            if need is not None:
                needs.append(need)
        return max(needs) if needs else None

    def _point(
        self, freq_hz: float, readings: _Readings, calibration: CalibrationEntry
    ) -> PointResult:
        corr = self.corrections
        assert corr is not None
        if self.plan.method is Method.Y_FACTOR:
            from noisebench.science.methods.yfactor import y_factor_point

            enr_db, u_enr_db, extrapolated = corr.enr_at(freq_hz)
            cal = self._system_point(
                freq_hz,
                calibration.reading("hot", freq_hz),
                calibration.reading("cold", freq_hz),
                calibration.measured_at,
            )
            return y_factor_point(
                readings.get(freq_hz, "hot").combined().density,
                readings.get(freq_hz, "cold").combined().density,
                enr_db,
                cold_temperature_k=corr.source_temperature_k,
                calibration=cal,
                u_enr_db=u_enr_db,
                t0_k=corr.t0_k,
                enr_reference=corr.enr_reference,
                enr_extrapolated=extrapolated,
                input_loss_db=corr.input_loss(freq_hz),
                input_loss_temperature_k=corr.input_loss_temperature_k,
                output_loss_db=corr.output_loss(freq_hz),
                output_loss_temperature_k=corr.output_loss_temperature_k,
            )
        from noisebench.science.methods.gain import gain_method_point

        gain_db, u_gain_db, holds_input_loss = self._stated_gain(freq_hz)
        loss_in, loss_out = corr.input_loss(freq_hz), corr.output_loss(freq_hz)
        return gain_method_point(
            readings.get(freq_hz, "dut").combined().density,
            gain_db,
            floor=calibration.reading("floor", freq_hz),
            u_gain_db=u_gain_db,
            source_temperature_k=corr.source_temperature_k,
            t0_k=corr.t0_k,
            input_loss_db=loss_in,
            input_loss_temperature_k=corr.input_loss_temperature_k,
            output_loss_db=loss_out,
            output_loss_temperature_k=corr.output_loss_temperature_k,
            floor_temperature_k=calibration.cold_temperature_k,
            gain_includes_losses=holds_input_loss,
            gain_includes_output_loss=False,
        )

    def _stated_gain(self, freq_hz: float) -> tuple[float, float, bool]:
        """The DUT gain as known, dB, its uncertainty, dB, and whether it holds the input loss.

        A file/constant gain is the DUT's own (neither loss). A measured gain is between the
        THROUGH planes (input loss and DUT, not the output loss). The gain method turns it into
        the path gain (source termination to analyzer) and records which losses it held, so
        that budgets move the path gain with a loss's error where the loss was subtracted."""
        corr = self.corrections
        assert corr is not None
        if corr.gain is not None:
            gain_db, u = corr.gain(freq_hz)
            return gain_db, u, False
        if freq_hz in self._measured_gain:
            gain_db, u = self._measured_gain[freq_hz]
            return gain_db, u, True
        raise MeasurementError(f"no DUT gain at {freq_hz:.6g} Hz")  # pragma: no cover

    def _finish_point(
        self,
        point: PointResult,
        readings: _Readings,
        budget: TimeBudget,
        group: PointGroup,
        checks: list[PowerCheck],
        stop: str,
        calibration: CalibrationEntry,
    ) -> PointResult:
        f = point.freq_hz
        flags = list(point.flags)
        combined = [readings.get(f, n).combined() for n in readings.names]
        if any(c.excess_scatter for c in combined) and PointFlag.EXCESS_SCATTER not in flags:
            flags.append(PointFlag.EXCESS_SCATTER)
        reached = point.u_nf_db <= group.policy.target_u_nf_db
        if not reached and (stop == "time_limit" or calibration.stopped_by == "time_limit"):
            flags.append(PointFlag.TIME_LIMIT)
        if any(c.caution for c in checks) and PointFlag.COMPRESSION_RISK not in flags:
            flags.append(PointFlag.COMPRESSION_RISK)
        share = len(group.freqs_hz)
        by_name = list(zip(readings.names, combined, strict=True))
        notes = dict(point.notes)
        notes.update(
            {
                "target_u_nf_db": group.policy.target_u_nf_db,
                "stopped_by": "target" if reached else stop,
                "group": group.index,
                "group_points": share,
                "readings": {n: c.readings for n, c in by_name},
                "averages_per_reading": {n: c.averages for n, c in by_name},
                "birge_ratio": {n: c.birge_ratio for n, c in by_name},
                "calibration_measured_at": calibration.measured_at.isoformat(),
                "calibration_time_s": (calibration.instrument_time_s or 0.0) / share,
            }
        )
        if checks:
            notes["hot_power_dbm"] = max(c.power_dbm for c in checks)
            notes["compression_backoff_db"] = min(c.backoff_db for c in checks)
        return point.model_copy(
            update={
                "flags": flags,
                "notes": notes,
                "averages": sum(c.averages for c in combined),
                "instrument_time_s": budget.used_s / share,
            }
        )

    # ----------------------------------------------------------------- DUT gain

    def _measure_gain(self, groups: list[PointGroup], writer) -> None:
        """DUT gain with the generator (substitution: THROUGH pass, then DUT pass)."""
        from noisebench.running.gain_measurement import (
            GainMeasurementPlan,
            choose_level_dbm,
            measure_gain,
        )

        spec, bench = self.plan.gain, self.session.bench
        if bench.generator is None:
            raise InputError("bench.generator", "measuring the DUT gain needs a generator")
        policy = groups[0].policy
        limits = self._guard().limits
        analyzer_max = min(
            limits.max_input_dbm,
            limits.compression_at(policy.attenuation_db, False) - limits.compression_backoff_db,
        )
        gm_plan = GainMeasurementPlan(
            freqs_hz=sorted(f for g in groups for f in g.freqs_hz),
            expected_gain_db=spec.max_gain_db,
            dut_p1db_out_dbm=spec.dut_p1db_out_dbm,
            analyzer_max_input_dbm=analyzer_max,
            rbw_hz=spec.rbw_hz,
            readings=spec.readings,
            averages=spec.averages,
            attenuation_db=policy.attenuation_db,
            preamp=False,
            generator_max_dbm=self.plan.bench.generator.max_level_dbm,
            linearity_u_db=spec.linearity_u_db,
        )
        level, _ = choose_level_dbm(gm_plan)
        check_generator_level(
            level,
            max_level_dbm=self.plan.bench.generator.max_level_dbm,
            dut_gain_db=spec.max_gain_db,
            limits=limits,
            dut_max_input_dbm=self.plan.safety.dut_max_input_dbm,
            attenuation_db=policy.attenuation_db,
            preamp=False,
        )
        self._last_request = None  # the gain procedure reconfigures the analyzer
        result = measure_gain(
            bench.analyzer,
            bench.generator,
            gm_plan,
            lambda stage: self.session.connect(Connection(stage.value)),
            noise_source=bench.noise_source,
        )
        self._last_request = None
        self._measured_gain = {p.freq_hz: (p.gain_db, p.u_gain_db) for p in result.points}
        writer.update_info(
            notes={**writer.info.notes, "gain_measurement": result.model_dump(mode="json")}
        )

    # ----------------------------------------------------------------- budgets and verdict

    def _budget(self, point: PointResult) -> dict | None:
        """The point's uncertainty budget when the plan has an [uncertainty] section."""
        inputs = self.plan.uncertainty
        if inputs is None or isinstance(inputs, dict):
            return None
        from noisebench.science.uncertainty import budget_for_point

        return budget_for_point(point, inputs, base_dir=self.plan.base_dir).to_dict()

    def _verdict(self, writer) -> dict | None:
        """Pass/fail against the plan's [limits] with the stored budgets' expanded U."""
        mask = self.plan.limits
        if mask is None or isinstance(mask, dict) or not writer.points:
            return None
        from noisebench.results.store import load_run
        from noisebench.science.limits import judge

        so_far = load_run(writer.folder)  # every point and budget journalled, incl. resumed
        budgets = {b["freq_hz"]: b for b in so_far.budgets}
        coverage = getattr(self.plan.uncertainty, "coverage_factor", 2.0)
        verdict = judge(so_far.points, budgets, mask, coverage_factor=coverage).to_dict()
        # A unit with points the plan asked for but the run could not measure never passes.
        done = {p.freq_hz for p in so_far.points}
        missing = [p.freq_hz for p in self.plan.points() if p.freq_hz not in done]
        if missing:
            verdict["notes"] = list(verdict.get("notes") or []) + [
                f"{len(missing)} of {len(self.plan.points())} planned points were not "
                "measured: the unit cannot pass"
            ]
            if verdict.get("unit") == "pass":
                verdict["unit"] = "indeterminate"
        return verdict


def _split_uncertainty(point: PointResult) -> tuple[float, float]:
    """(part more averages reduce, part they do not) of ``point.u_nf_db``, dB."""
    contributions = point.notes.get("u_nf_db_contributions") or {}
    fixed_names = ("hot_cal", "cold_cal", "n_floor", "floor")
    reducible_names = ("hot", "cold", "n_meas", "dut")
    u_fix = math.sqrt(sum(float(contributions[n]) ** 2 for n in fixed_names if n in contributions))
    u_red = math.sqrt(
        sum(float(contributions[n]) ** 2 for n in reducible_names if n in contributions)
    )
    if u_red == 0.0 and u_fix == 0.0:
        return point.u_nf_db, 0.0
    return u_red, u_fix


# --------------------------------------------------------------------------- convenience


def write_outputs(record, folder: Path, *, plots: bool = True, report: bool = True) -> list[Path]:
    """Plots and the HTML report of a stored run; returns the files written.

    ``plots=False`` draws nothing (matplotlib is not even imported): the report then has no
    figures. With ``plots=True`` the report embeds exactly the PNG files written.
    """
    folder = Path(folder)
    written: list[Path] = []
    images: list[Path] = []
    if plots:
        from noisebench.results.plots import plot_run

        images = list(plot_run(record, folder))
        written += images
    if report:
        from noisebench.results.report import write_report

        # a list, never None: None would make write_report draw the figures in memory
        written.append(write_report(record, folder / "report.html", plots=images))
    return written


def run_plan(
    plan: Plan,
    *,
    folder: Path | None = None,
    resume: bool = False,
    session: BenchSession | None = None,
    prompt: Callable[[str], Any] = input,
    progress: RunProgress | None = None,
    on_point: PointHook | None = None,
    calibrations: CalibrationStore | None = None,
    outputs: bool = True,
):
    """Open the plan's bench (unless ``session`` is given), run it, write plots and report.

    Returns ``(record, folder)``. The bench is closed afterwards when this function opened it.
    """
    from noisebench.bench.registry import open_bench

    own = session is None
    session = session or open_bench(plan.bench, prompt=prompt)
    try:
        seq = Sequencer(
            plan, session, calibrations=calibrations, progress=progress, on_point=on_point
        )
        target = Path(folder) if folder is not None else (None if resume else seq.default_folder())
        record = seq.run(target, resume=resume)
    finally:
        if own:
            session.close()
    out_folder = Path(folder) if folder is not None else target  # type: ignore[arg-type]
    if outputs and record.points:
        write_outputs(record, out_folder, plots=plan.output.plots, report=plan.output.report)
    return record, out_folder

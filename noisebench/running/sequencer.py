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

The :class:`Sequencer` is assembled from one class per job, each in its own module:
:mod:`~noisebench.running.sequencer_core` (state, analyzer set-up, acquisition, source switching),
:mod:`~noisebench.running.sequencer_rounds` (adaptive averaging),
:mod:`~noisebench.running.sequencer_calibration`, :mod:`~noisebench.running.sequencer_measurement`,
:mod:`~noisebench.running.sequencer_gain` (DUT gain with the generator) and
:mod:`~noisebench.running.sequencer_verdict` (budgets and verdict); this module holds the run's
life cycle (new run, resume, interruption, finish). Point groups: :mod:`noisebench.running.groups`.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from datetime import datetime, timezone
from functools import partial
from pathlib import Path
from typing import Any

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.bench.registry import BenchSession, Connection
from noisebench.errors import InputError, MeasurementError, NoisebenchError
from noisebench.running.calibration import (
    CalibrationStore,
)
from noisebench.running.corrections import Corrections, resolve_corrections
from noisebench.running.groups import PointGroup, plan_groups
from noisebench.running.plan import FrequencyPoint, Plan
from noisebench.running.progress import (
    CALIBRATION,
    DUT_GAIN,
    MEASUREMENT,
    RunProgress,
    WorkForecast,
)
from noisebench.running.safety import (
    DEFAULT_COMPRESSION_DBM,
    DEFAULT_MAX_INPUT_DBM,
    InputLimits,
    PowerGuard,
)
from noisebench.running.sequencer_core import PointHook
from noisebench.running.sequencer_gain import GainStep
from noisebench.running.sequencer_switched import SwitchedSweep
from noisebench.running.sequencer_verdict import VerdictStep
from noisebench.science.point import Method

logger = logging.getLogger(__name__)


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
        dut_lines_dbm=_lo_lines_dbm(plan),
    )


def _lo_lines_dbm(plan: Plan) -> float | None:
    """A converter's LO power at its IF port as the power guard counts it: the declared LO
    leakage, else the LO drive itself (no isolation assumed: the safe side), dBm."""
    conv = plan.conversion
    if conv is None:
        return None
    if conv.lo_leakage_dbm is not None:
        return conv.lo_leakage_dbm
    return conv.lo.level_dbm


# --------------------------------------------------------------------------- the sequencer


class Sequencer(SwitchedSweep, GainStep, VerdictStep):
    """Runs a plan on an opened bench; see the module docstring for the order of work.

    ``calibrations`` is shared between runs on the same bench (pass the same store to reuse
    valid calibrations). ``progress`` shows points done, time left and the last NF.
    ``on_point`` is called after each point is stored (hooks, tests; an exception there ends
    the run like one from the bench, KeyboardInterrupt as Ctrl-C). Operator prompts belong to
    the session (:func:`noisebench.bench.registry.open_bench`).
    """

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
        """``<output.folder>/<UTC time>_<dut id>_<method>`` under the plan's folder (the DUT id
        made safe as one file-name component: no ``/``, ``..`` or control characters)."""
        from noisebench.user_files import safe_path_component

        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        dut = safe_path_component(self.plan.dut.id, default="dut")
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
        todo = [p for p in self.plan.points() if p.report_hz not in writer.done_freqs_hz]
        total = len(self.plan.points())
        self.progress.start(
            total,
            done_points=total - len(todo),
            label=f"{self.plan.method.value} {self.plan.dut.id or ''}".strip(),
            forecast=lambda: self._work_forecast(todo),
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

    def _work_forecast(self, todo: list[FrequencyPoint]) -> WorkForecast | None:
        """What the progress display's first time-left estimate rests on: the plan's forecast
        (``running/forecast.py``) for the points still to do; None where the plan cannot be
        forecast (a real bench without ``[expect]`` priors, a frequency converter)."""
        from noisebench.running.forecast import forecast_plan

        if not todo:
            return None
        try:
            forecast = forecast_plan(self.plan)
        except Exception as exc:  # noqa: BLE001 - a display aid never stops a run
            logger.debug("no forecast for the progress display: %s", exc)
            return None
        for warning in forecast.warnings:  # e.g. calibrations the time limit will refuse
            logger.warning("forecast: %s", warning)
        wanted = {p.freq_hz for p in todo}
        points = [p for p in forecast.points if p.freq_hz in wanted]
        if not points:
            return None
        units = {CALIBRATION: len(points)}
        if (
            self.plan.method is Method.GAIN
            and self.plan.gain
            and self.plan.gain.source == "measure"
        ):
            units[DUT_GAIN] = 1
        units[MEASUREMENT] = len(points)
        return WorkForecast(
            units=units,
            seconds_per_unit={CALIBRATION: sum(p.calibration_time_s for p in points) / len(points)},
            point_s={p.freq_hz: p.time_s for p in points},
        )

    def _prepare(self, writer) -> None:
        analyzer = self.session.bench.analyzer
        if self.plan.method is Method.GAIN and not analyzer.absolute_level:
            raise InputError(
                "bench.analyzer",
                "the gain method reads absolute noise densities, but this receiver's scale is "
                "not calibrated (the Y-factor method needs only ratios)",
                fix="calibrate the receiver scale with a known tone or two known noise levels "
                "and name it with ?scale=<file> on the resource, or use the Y-factor method",
            )
        self.corrections = resolve_corrections(self.plan, self.session)
        self.guard = power_guard_for(self.plan, self.session, self.corrections)
        if self.plan.conversion is not None:
            self._prepare_conversion(writer)
        writer.update_info(
            cold_temperature_k=self.corrections.source_temperature_k,
            identities=self.session.bench.identities(),
        )

    def _prepare_conversion(self, writer) -> None:
        """The LO control and the image response of a frequency-converting DUT; the frequency
        plan goes into the run's notes (report, database)."""
        from noisebench.running.conversion import ImageRejection, LoControl

        conv = self.plan.conversion
        assert conv is not None
        self.lo = LoControl(conv.lo, self.session.bench.lo_generator, wait=self.session.settle)
        self.image_rejection = ImageRejection(conv, self.plan.resolve_path)
        fp = self.plan.frequency_plan()
        writer.update_info(
            notes={
                **writer.info.notes,
                "conversion": {
                    "mode": conv.mode,
                    "nf_type": conv.nf_type,
                    "lo_source": conv.lo.source,
                    "lo_level_dbm": conv.lo.level_dbm,
                    "image_rejection": self.image_rejection.description,
                    "u_image_rejection_db": conv.u_image_rejection_db,
                    "lo_harmonics_excluded": conv.lo_harmonics,
                    "points": [
                        {
                            "rf_hz": float(r),
                            "lo_hz": float(lo),
                            "if_hz": float(i),
                            "image_hz": float(im),
                            "sideband": sb.value,
                        }
                        for r, lo, i, im, sb in zip(
                            fp.rf_hz, fp.lo_hz, fp.if_hz, fp.image_hz, fp.sideband, strict=True
                        )
                    ],
                },
            }
        )

    def _finish(self, writer, status: str):
        if self._applied:  # the frequencies each set of settings served, complete
            writer.update_info(applied_settings=self._applied)
        instrument_notes = self.session.bench.analyzer.run_notes()
        if instrument_notes:
            writer.update_info(notes={**writer.info.notes, **instrument_notes})
        try:
            verdict = self._verdict(writer)
        except NoisebenchError as exc:  # a verdict problem must not lose the run
            logger.error("no verdict: %s", exc)
            verdict = None
        return writer.finish(status, verdict=verdict)

    def _safe(self) -> None:
        self.session.bench.safe_state()

    # ----------------------------------------------------------------- the work

    def _measure(self, todo: list[FrequencyPoint], writer) -> None:
        groups = plan_groups(todo)
        if not groups:
            return
        self._calibrate_all(groups, writer)
        assert self.corrections is not None  # resolved in __init__
        if self.plan.method is Method.GAIN and self.corrections.gain is None:
            self.progress.phase(DUT_GAIN, 1)
            self._measure_gain(groups, writer)
            self.progress.step_done()
        self.progress.phase(MEASUREMENT, len(todo) - len(self.skipped))
        self.session.connect(Connection.DUT)
        if self._switched(groups):
            self._measure_switched(groups, writer)
            return
        for group in groups:
            if group.index in self._unmeasurable:
                continue
            try:
                outcome = self._with_context(group, partial(self._measure_group, group))
            except MeasurementError as exc:
                self._skip(group, exc, "measurement", writer)
                continue
            self._store_outcome(group, outcome, writer)

    def _record_settings(
        self, settings: AcquisitionSettings | None, group: PointGroup, writer
    ) -> None:
        """Keep each distinct set of applied settings once (centre and averages vary per
        group), with the frequencies it served; ``run.json`` is rewritten only when a new set
        appears."""
        if settings is None:
            return
        # the entry found for these values before (the settings model is frozen, and equal
        # values dump equally): no dump and no comparison of dumps per point
        key = tuple(v for k, v in settings.__dict__.items() if k not in _VARY_PER_GROUP)
        entry = self._applied_by_key.get(key)
        if entry is None:
            dump = settings.model_dump(mode="json", exclude=set(_VARY_PER_GROUP))
            entry = next((e for e in self._applied if e["settings"] == dump), None)
            if entry is None:
                entry = {"settings": dump, "freqs_hz": list(group.freqs_hz)}
                self._applied.append(entry)
                self._applied_by_key[key] = entry
                writer.update_info(applied_settings=self._applied)
                return
            self._applied_by_key[key] = entry
        entry["freqs_hz"].extend(group.freqs_hz)


_VARY_PER_GROUP = ("center_hz", "averages")  # settings fields left out of applied_settings


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
    out_folder = Path(folder) if folder is not None else target
    assert out_folder is not None  # run() refuses a resume without a folder
    if outputs and record.points:
        write_outputs(record, out_folder, plots=plan.output.plots, report=plan.output.report)
    return record, out_folder

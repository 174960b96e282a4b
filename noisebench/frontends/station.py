"""Station mode: measure one plan on a production lot, unit after unit, on one open bench.

A station run loops over units. Each unit is named by a serial number typed at a prompt, read
from a list, or scanned as a barcode line (:func:`parse_unit_line`)::

    ABC123                       a plain serial
    SN:ABC123;LOT:L24-07         serial and lot (keys SN, LOT, PN; any order, case-insensitive)
    SN:ABC123;LOT:L24-07;PN:LNA-2

Serials, lots and part numbers are 1-64 characters of letters, digits, ``.``, ``_`` and ``-``
(first character a letter or digit). A line with a control character (tab, escape, NUL, the
group separator some scanners send, ...) is refused whole; only one line ending is removed.
An empty line or ``q`` ends the loop; so does end of input and Ctrl-C.

For every unit the station

1. puts the bench in its safe state (noise source off, generator off) before asking for the
   unit, so the operator can swap units safely;
2. measures the plan into its own run folder (``<station folder>/units/<UTC time>_<serial>``),
   re-using the station's calibration while it is valid: a calibration older than
   ``calibration_max_age_s`` (station setting, else the plan's ``[calibration] max_age_s``) or
   measured with other analyzer settings is measured again (:mod:`noisebench.running.calibration`);
   the calibrations are counted with their reason;
3. completes budgets and verdict (:func:`noisebench.results.production.apply_budgets_and_verdict`),
   records lot, part number and station data in the run's notes, rewrites the results and
   writes plots and report (as the plan's ``[output]`` says);
4. stores the run in the results database (default: ``station.sqlite`` in the station folder;
   any SQLAlchemy URL, e.g. PostgreSQL, instead) - a database failure is reported and the
   run folder keeps the data (``noisebench db import`` stores it later);
5. writes ``station_summary.json`` (atomically) so a crash never loses the tally.

Ctrl-C during a measurement ends that unit as ``interrupted`` (the sequencer leaves the bench
safe and keeps its finished points), stores it, and ends the station run; finished units are
kept. Points the physics refuses are skipped by the sequencer and listed with the unit; a unit
with skipped points never passes (:mod:`noisebench.results.production`). A unit whose run the
physics
refuses (:class:`~noisebench.errors.MeasurementError`) or that would endanger the bench
(:class:`~noisebench.errors.SafetyError`) is recorded as an error and the loop goes on; an
instrument or communication fault or a plan problem ends the station run.

**Simulated units.** On a ``sim://`` bench every serial gets a deterministic unit-to-unit
variation of the scenario's DUT (:class:`UnitVariation`), seeded from the SHA-256 of the serial:
an NF offset, an NF tilt across the DUT's band, a gain offset and, for a share of the units,
a "weak" NF excess. It is applied through the simulator's scenario overrides (the unit's
``[dut]`` table, validated like any scenario) and installed in the running bench, so the
analyzer, noise source, cables and the calibration stay those of the one bench. Every number
of this model is invented. The offsets are stored in the run's notes
(``station.simulated_unit``).

The end summary (:class:`StationSummary`) counts units by the verdict of their latest run
(a re-tested serial counts once), gives the yield as passed / judged (pass + fail +
indeterminate, the results database's definition; units not measured are listed apart), and
the mean time per unit (wall clock, station overhead included).
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Iterable, Iterator
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, field_validator

from noisebench.errors import (
    InputError,
    MeasurementError,
    NoisebenchError,
    SafetyError,
)
from noisebench.frontends.station_summary import StationSummary, UnitResult
from noisebench.frontends.units import (
    END_WORDS,
    UnitId,
    _checked_name,
    _refuse_control_characters,
    parse_unit_line,
    units_from_file,
    units_from_lines,
    units_from_prompt,
)
from noisebench.running.plan import Plan
from noisebench.sims.unit_variation import (
    UnitOffsets,
    UnitVariation,
    apply_simulated_unit,
    install_scenario_dut,
)

logger = logging.getLogger(__name__)

__all__ = [
    "END_WORDS",
    "SUMMARY_FILE",
    "Station",
    "StationSettings",
    "StationSummary",
    "UnitId",
    "UnitOffsets",
    "UnitResult",
    "UnitVariation",
    "apply_simulated_unit",
    "install_scenario_dut",
    "parse_unit_line",
    "units_from_file",
    "units_from_lines",
    "units_from_prompt",
]

SUMMARY_FILE = "station_summary.json"
DEFAULT_DATABASE_FILE = "station.sqlite"


# =========================================================================== settings, results


def _no_control(field: str, value: str | None) -> str | None:
    if value is not None:
        _refuse_control_characters(value)
        if not value.strip():
            raise InputError(
                field, "is empty", fix=f"give a {field.replace('_', ' ')} or leave it out"
            )
    return value


class StationSettings(BaseModel):
    """How a station runs (everything but the plan and the units).

    ``folder`` None: ``<plan folder>/<output.folder>/station-<station_id>``.
    ``database_url`` None: an SQLite file ``station.sqlite`` in the folder; ``store`` False:
    no database. ``calibration_max_age_s`` None: the plan's ``[calibration] max_age_s``.
    ``unit_variation`` applies on a simulated bench only (None: every unit is the scenario's
    nominal DUT). ``outputs``: plots and report per unit as the plan's ``[output]`` says.
    """

    model_config = ConfigDict(extra="forbid")

    station_id: str = Field(min_length=1, max_length=64)
    operator: str | None = Field(default=None, max_length=200)
    folder: Path | None = None
    database_url: str | None = None
    store: bool = True
    calibration_max_age_s: float | None = Field(default=None, gt=0)
    lot: str | None = None
    part_number: str | None = None
    unit_variation: UnitVariation | None = Field(default_factory=UnitVariation)
    outputs: bool = True

    @field_validator("station_id")
    @classmethod
    def _station_id(cls, value: str) -> str:
        _refuse_control_characters(value)
        return _checked_name("station_id", value, value)

    @field_validator("operator")
    @classmethod
    def _operator(cls, value: str | None) -> str | None:
        return _no_control("operator", value)

    @field_validator("lot", "part_number")
    @classmethod
    def _names(cls, value: str | None, info: Any) -> str | None:
        if value is None:
            return value
        _refuse_control_characters(value)
        return _checked_name(info.field_name, value, value)


# =========================================================================== the station


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def safe_url(url: str) -> str:
    """A database URL without its password, for messages and summaries."""
    try:
        from sqlalchemy.engine import make_url

        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - any unparsable URL is shown as a placeholder
        return "<database url>"


def _folder_safe(text: str) -> str:
    from noisebench.user_files import safe_path_component

    return safe_path_component(text, default="unit")


class Station:
    """A production station: one plan, one open bench, many units.

    ``session`` (a :class:`~noisebench.bench.registry.BenchSession`) is opened from the plan when
    not given, and then closed by :meth:`close`. ``calibrations`` may be shared with other
    stations on the same bench. ``prompt`` answers operator instructions (cable moves),
    ``say`` receives the station's messages (default: the log), ``on_point`` and
    ``progress`` go to the sequencer.
    """

    def __init__(
        self,
        plan: Plan,
        settings: StationSettings,
        *,
        session: Any = None,
        calibrations: Any = None,
        prompt: Callable[[str], Any] = input,
        say: Callable[[str], Any] | None = None,
        on_point: Callable[[Any], Any] | None = None,
        progress: Any = None,
    ) -> None:
        from noisebench.bench.registry import open_bench
        from noisebench.running.calibration import CalibrationStore

        if not isinstance(plan, Plan):
            raise InputError(
                "plan",
                f"must be a Plan (got {type(plan).__name__})",
                fix="load it with noisebench.running.plan.load_plan",
            )
        self.plan = plan
        self.settings = settings
        self.folder = (
            Path(settings.folder)
            if settings.folder is not None
            else plan.resolve_path(plan.output.folder) / f"station-{settings.station_id}"
        )
        self.calibrations = calibrations if calibrations is not None else CalibrationStore()
        self._say = say or (lambda text: logger.info("%s", text))
        self._on_point = on_point
        self._progress = progress
        self._own_session = session is None
        self.db = self._open_database()
        try:
            self.session = session if session is not None else open_bench(plan.bench, prompt=prompt)
        except BaseException:
            if self.db is not None:
                self.db.close()
            raise
        self._base_scenario = getattr(self.session.sim, "scenario", None)
        self._units_installed = False
        self._attempts: dict[str, int] = {}

    # ----------------------------------------------------------------- set-up

    def _open_database(self) -> Any:
        if not self.settings.store:
            return None
        url = self.settings.database_url
        if url is None:
            self.folder.mkdir(parents=True, exist_ok=True)
            url = str(self.folder / DEFAULT_DATABASE_FILE)
        try:
            from noisebench.results.database import ResultsDatabase
        except ImportError as exc:
            raise InputError(
                "database",
                str(exc),
                fix="pip install 'noisebench[db]', or run the station without a database",
            ) from None
        return ResultsDatabase(url)

    @property
    def database_url(self) -> str | None:
        """The database URL without its password (None: no database)."""
        return None if self.db is None else safe_url(self.db.url)

    @property
    def simulated(self) -> bool:
        return self.session.sim is not None

    def close(self) -> None:
        """Safe state; the simulator's nominal DUT back; close the bench (when the station
        opened it) and the database."""
        try:
            self.session.bench.safe_state()
            if self._units_installed:
                install_scenario_dut(self.session.sim, self._base_scenario)
                self._units_installed = False
        finally:
            if self._own_session:
                self.session.close()
            if self.db is not None:
                self.db.close()

    def __enter__(self) -> Station:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # ----------------------------------------------------------------- the loop

    def run(self, units: Iterable[UnitId]) -> StationSummary:
        """Measure every unit of ``units`` (a list, or :func:`units_from_prompt`)."""
        summary = StationSummary(
            station_id=self.settings.station_id,
            operator=self.settings.operator,
            plan_name=self.plan.name,
            folder=str(self.folder),
            database=self.database_url,
            started_at=_utc_now(),
        )
        self.folder.mkdir(parents=True, exist_ok=True)
        iterator = iter(units)
        try:
            summary.stopped_by = self._loop(iterator, summary)
        except KeyboardInterrupt:
            summary.stopped_by = "interrupted (Ctrl-C)"
        finally:
            self.session.bench.safe_state()
            summary.ended_at = _utc_now()
            self._save_summary(summary)
        self._say(summary.format())
        return summary

    def _loop(self, units: Iterator[UnitId], summary: StationSummary) -> str:
        while True:
            self.session.bench.safe_state()  # safe to swap units while we wait
            unit = next(units, None)
            if unit is None:
                return "end of input"
            result, stop = self.measure(unit)
            summary.units.append(result)
            self._save_summary(summary)
            self._say(result.line())
            if stop:
                return stop

    def _save_summary(self, summary: StationSummary) -> None:
        from noisebench.results.store import write_atomic

        write_atomic(self.folder / SUMMARY_FILE, summary.model_dump_json(indent=2))

    # ----------------------------------------------------------------- one unit

    def measure(self, unit: UnitId) -> tuple[UnitResult, str | None]:
        """Measure one unit; returns its result and why the station must stop (or None)."""
        from noisebench.running.sequencer import Sequencer

        started, wall0 = _utc_now(), time.monotonic()
        attempt = self._attempts.get(unit.serial, 0) + 1
        self._attempts[unit.serial] = attempt
        offsets = self._prepare_simulated_unit(unit)
        plan = self._unit_plan(unit)
        folder = self._unit_folder(unit, started)
        before = list(self.calibrations.entries)
        clock0 = self.session.instrument_time_s()
        seq = Sequencer(
            plan,
            self.session,
            calibrations=self.calibrations,
            progress=self._progress,
            on_point=self._on_point,
        )
        record, error, stop = self._run_sequencer(seq, folder)
        result = UnitResult(
            serial=unit.serial,
            lot=unit.lot,
            part_number=unit.part_number,
            attempt=attempt,
            folder=str(folder),
            status="not_started" if record is None else record.info.status,
            started_at=started,
            duration_s=0.0,
            error=error,
            calibrated_groups=seq.calibrations_measured,
            calibration_reason=self._calibration_reason(seq, before, plan, started),
            simulated_unit=offsets.to_dict() if offsets else None,
        )
        if record is not None:
            try:
                result = self._finish_unit(record, plan, unit, result, folder, clock0)
            except KeyboardInterrupt:
                stop = "interrupted (Ctrl-C)"
        if result.status == "interrupted" and stop is None:
            stop = "interrupted (Ctrl-C)"
        result.duration_s = time.monotonic() - wall0
        return result, stop

    def _run_sequencer(self, seq: Any, folder: Path) -> tuple[Any, str | None, str | None]:
        """(record or None, error text, stop reason) of one sequencer run."""
        try:
            return seq.run(folder), None, None
        except (MeasurementError, SafetyError) as exc:  # this unit cannot be measured
            logger.warning("unit not measured: %s", exc)
            return self._load_quietly(folder), str(exc), None
        except NoisebenchError as exc:  # the bench or the plan is at fault: stop
            logger.error("station stops: %s", exc)
            return self._load_quietly(folder), str(exc), f"error: {exc}"

    @staticmethod
    def _load_quietly(folder: Path) -> Any:
        from noisebench.results.store import RUN_INFO_FILE, load_run

        if not (folder / RUN_INFO_FILE).exists():
            return None
        try:
            return load_run(folder)
        except (NoisebenchError, OSError, ValueError):
            logger.warning("could not read the failed run in %s", folder, exc_info=True)
            return None

    def _prepare_simulated_unit(self, unit: UnitId) -> UnitOffsets | None:
        variation = self.settings.unit_variation
        if not self.simulated or variation is None or self._base_scenario is None:
            return None
        offsets = variation.offsets(unit.serial)
        apply_simulated_unit(self.session.sim, self._base_scenario, offsets)
        self._units_installed = True
        return offsets

    def _unit_plan(self, unit: UnitId) -> Plan:
        plan = self.plan
        update: dict[str, Any] = {
            "dut": plan.dut.model_copy(update={"id": unit.serial}),
            "operator": self.settings.operator or plan.operator,
            "station": self.settings.station_id,
        }
        if self.settings.calibration_max_age_s is not None:
            update["calibration"] = plan.calibration.model_copy(
                update={"max_age_s": self.settings.calibration_max_age_s}
            )
        return plan.model_copy(update=update)

    def _unit_folder(self, unit: UnitId, started: datetime) -> Path:
        stamp = started.strftime("%Y%m%dT%H%M%SZ")
        base = self.folder / "units" / f"{stamp}_{_folder_safe(unit.serial)}"
        folder, n = base, 1
        while folder.exists():
            n += 1
            folder = base.with_name(f"{base.name}-{n}")
        return folder

    @staticmethod
    def _calibration_reason(
        seq: Any, before: list[Any], plan: Plan, started: datetime
    ) -> str | None:
        if not seq.calibrations_measured:
            return None
        from noisebench.running.calibration import CalibrationKind
        from noisebench.science.point import Method

        kind = CalibrationKind.FLOOR if plan.method is Method.GAIN else CalibrationKind.SYSTEM
        same_kind = [e for e in before if e.kind is kind]
        if not same_kind:
            return "first calibration"
        max_age = plan.calibration.max_age_s
        if all(e.age_s(started) > max_age for e in same_kind):
            return "expired"
        return "settings changed"

    def _finish_unit(
        self,
        record: Any,
        plan: Plan,
        unit: UnitId,
        result: UnitResult,
        folder: Path,
        clock0: float | None,
    ) -> UnitResult:
        from noisebench.results.production import (
            annotate_record,
            apply_budgets_and_verdict,
            failing_points,
            save_record,
        )

        record = apply_budgets_and_verdict(record, plan)
        record = annotate_record(
            record,
            lot=unit.lot,
            part_number=unit.part_number,
            station={
                "station_id": self.settings.station_id,
                "attempt": result.attempt,
                "simulated_unit": result.simulated_unit,
            },
        )
        save_record(record, folder)
        self._write_outputs(record, plan, folder)
        result = result.model_copy(
            update={
                "run_id": record.info.run_id,
                "status": record.info.status,
                "verdict": (record.verdict or {}).get("unit"),
                "failing": failing_points(record),
                "points": len(record.points),
                "skipped_points": list(record.info.notes.get("skipped_points") or []),
                "max_nf_db": max((p.nf_db for p in record.points), default=None),
                "min_gain_db": min(
                    (p.gain_db for p in record.points if p.gain_db is not None), default=None
                ),
                "instrument_time_s": self._instrument_time(record, clock0),
            }
        )
        return self._store(record, unit, result)

    def _write_outputs(self, record: Any, plan: Plan, folder: Path) -> None:
        """Plots and report as ``[output]`` says; ``plots = false`` means a report without
        figures (rendering them costs more than a short measurement)."""
        if not (self.settings.outputs and record.points):
            return
        try:
            images: list[Path] = []
            if plan.output.plots:
                from noisebench.results.plots import plot_run

                images = list(plot_run(record, folder))
            if plan.output.report:
                from noisebench.results.report import write_report
                from noisebench.results.store import REPORT_FILE

                write_report(record, folder / REPORT_FILE, plots=images)
        except (NoisebenchError, OSError, ImportError, ValueError) as exc:
            logger.warning("plots/report of %s not written: %s", folder, exc)

    def _instrument_time(self, record: Any, clock0: float | None) -> float | None:
        now = self.session.instrument_time_s()
        if clock0 is not None and now is not None:
            return now - clock0
        times = [p.instrument_time_s for p in record.points if p.instrument_time_s is not None]
        return math.fsum(times) if times else None

    def _store(self, record: Any, unit: UnitId, result: UnitResult) -> UnitResult:
        if self.db is None:
            return result
        try:
            db_id = self.db.store_run(
                record,
                lot=unit.lot,
                part_number=unit.part_number or "",
                station=self.settings.station_id,
            )
        except (NoisebenchError, OSError) as exc:
            logger.error("run %s not stored: %s", record.info.run_id, exc)
            return result.model_copy(update={"store_error": str(exc)})
        return result.model_copy(update={"database_id": db_id})

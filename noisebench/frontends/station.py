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

import hashlib
import logging
import math
import re
import time
import unicodedata
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from noisebench.errors import (
    InputError,
    MeasurementError,
    NoisebenchError,
    SafetyError,
)
from noisebench.running.plan import Plan

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
END_WORDS = frozenset({"", "q", "Q"})
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
_KEYS = {"SN": "serial", "LOT": "lot", "PN": "part_number"}
_LINE_ENDINGS = ("\r\n", "\n", "\r")


# =========================================================================== unit names


@dataclass(frozen=True)
class UnitId:
    """One unit: its serial number, and the lot and part number when known."""

    serial: str
    lot: str | None = None
    part_number: str | None = None


def _refuse_control_characters(line: str) -> None:
    for index, ch in enumerate(line):
        if unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp"):
            raise InputError(
                "unit",
                f"control character {ch!r} at position {index} in {line!r}",
                value=line,
                fix="type the serial again; set the scanner to send plain text",
            )


def _checked_name(field: str, value: str, line: str) -> str:
    if not _NAME.fullmatch(value):
        raise InputError(
            field,
            f"{value!r} (in {line!r}) is not a valid {field.replace('_', ' ')}",
            value=value,
            fix="1-64 letters, digits, '.', '_' or '-', starting with a letter or digit",
        )
    return value


def _parse_fields(text: str, line: str) -> dict[str, str]:
    fields: dict[str, str] = {}
    for part in text.split(";"):
        key, sep, value = part.partition(":")
        key, value = key.strip().upper(), value.strip()
        if not sep or not key:
            raise InputError(
                "unit",
                f"field {part!r} of {line!r} is not KEY:VALUE",
                value=line,
                fix="write SN:<serial>;LOT:<lot>;PN:<part number>",
            )
        if key not in _KEYS:
            raise InputError(
                "unit",
                f"unknown key {key!r} in {line!r}",
                value=line,
                fix="keys are SN, LOT and PN",
            )
        name = _KEYS[key]
        if name in fields:
            raise InputError("unit", f"key {key!r} appears twice in {line!r}", value=line)
        fields[name] = _checked_name(name, value, line)
    if "serial" not in fields:
        raise InputError(
            "serial", f"{line!r} has no SN field", value=line, fix="start the line with SN:<serial>"
        )
    return fields


def parse_unit_line(
    line: str, *, lot: str | None = None, part_number: str | None = None
) -> UnitId | None:
    """A unit from one input line, or None for the end of input (empty line or ``q``).

    ``lot`` / ``part_number`` apply when the line does not give them. Raises
    :class:`InputError` (naming the problem) for anything that is not a clean serial or
    ``SN:..;LOT:..;PN:..`` line.
    """
    if not isinstance(line, str):
        raise InputError("unit", f"must be text (got {type(line).__name__})")
    for ending in _LINE_ENDINGS:
        if line.endswith(ending):
            line = line[: -len(ending)]
            break
    _refuse_control_characters(line)
    text = line.strip()
    if text in END_WORDS:
        return None
    if ":" in text or ";" in text:
        fields = _parse_fields(text, line)
    else:
        fields = {"serial": _checked_name("serial", text, line)}
    return UnitId(
        serial=fields["serial"],
        lot=fields.get("lot", lot),
        part_number=fields.get("part_number", part_number),
    )


def units_from_prompt(
    read_line: Callable[[str], str] = input,
    *,
    prompt: str = "unit serial or barcode (empty or q ends): ",
    on_refused: Callable[[str], Any] | None = None,
    lot: str | None = None,
    part_number: str | None = None,
) -> Iterator[UnitId]:
    """Units typed or scanned at a prompt, until an empty line, ``q`` or end of input.

    A refused line is reported through ``on_refused`` (default: the log) and asked again.
    """
    report = on_refused or (lambda text: logger.warning("%s", text))
    while True:
        try:
            line = read_line(prompt)
        except EOFError:
            return
        try:
            unit = parse_unit_line(line, lot=lot, part_number=part_number)
        except InputError as exc:
            report(f"refused: {exc}")
            continue
        if unit is None:
            return
        yield unit


def units_from_lines(
    lines: Iterable[str],
    *,
    lot: str | None = None,
    part_number: str | None = None,
    source: str = "list",
) -> list[UnitId]:
    """Units of a list (a file's lines): all checked before any is measured.

    Blank lines and lines starting with ``#`` are skipped; a ``q`` line ends the list. Every
    bad line is reported in one :class:`InputError` with its line number.
    """
    units: list[UnitId] = []
    problems: list[str] = []
    for number, line in enumerate(lines, start=1):
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        try:
            unit = parse_unit_line(line, lot=lot, part_number=part_number)
        except InputError as exc:
            problems.append(f"line {number}: {exc}")
            continue
        if unit is None:
            break
        units.append(unit)
    if problems:
        raise InputError(
            "units", f"{source}: " + "; ".join(problems), fix="correct the lines named above"
        )
    return units


def units_from_file(
    path: str | Path, *, lot: str | None = None, part_number: str | None = None
) -> list[UnitId]:
    """Units listed in a text file, one serial or barcode line per line."""
    path = Path(path)
    with path.open(encoding="utf-8-sig", newline="") as handle:  # a byte-order mark is fine
        return units_from_lines(
            handle.read().splitlines(), lot=lot, part_number=part_number, source=path.name
        )


# =========================================================================== simulated units


class UnitVariation(BaseModel):
    """Invented unit-to-unit spread of a simulated DUT (dB), seeded from each serial.

    For each unit: an NF offset ~ N(0, ``nf_sigma_db``), an NF tilt ~ N(0,
    ``nf_tilt_sigma_db``) (the change at the band edges, opposite signs, zero at the centre),
    a gain offset ~ N(0, ``gain_sigma_db``), and with probability ``weak_fraction`` an extra
    ``weak_nf_db`` of NF (a weak input stage). ``seed`` selects another population from the
    same serials. Passive DUTs get the gain (loss) offset only.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    nf_sigma_db: float = Field(default=0.10, ge=0, le=5)
    nf_tilt_sigma_db: float = Field(default=0.05, ge=0, le=5)
    gain_sigma_db: float = Field(default=0.40, ge=0, le=10)
    weak_fraction: float = Field(default=0.15, ge=0, le=1)
    weak_nf_db: float = Field(default=0.6, ge=0, le=20)
    seed: int = Field(default=0, ge=0)

    def offsets(self, serial: str) -> UnitOffsets:
        """The deterministic offsets of unit ``serial``."""
        digest = hashlib.sha256(serial.encode("utf-8")).digest()
        words = [int.from_bytes(digest[i : i + 4], "big") for i in range(0, 16, 4)]
        rng = np.random.default_rng(np.random.SeedSequence([self.seed, *words]))
        z_nf, z_tilt, z_gain = rng.standard_normal(3)
        weak = bool(rng.random() < self.weak_fraction)
        return UnitOffsets(
            serial=serial,
            nf_offset_db=float(z_nf * self.nf_sigma_db),
            nf_tilt_db=float(z_tilt * self.nf_tilt_sigma_db),
            gain_offset_db=float(z_gain * self.gain_sigma_db),
            weak=weak,
            weak_nf_db=self.weak_nf_db if weak else 0.0,
        )


@dataclass(frozen=True)
class UnitOffsets:
    """The changes (dB) one simulated unit makes to the scenario's DUT tables."""

    serial: str
    nf_offset_db: float
    nf_tilt_db: float
    gain_offset_db: float
    weak: bool
    weak_nf_db: float

    def nf_change_db(self, freq_hz: np.ndarray, band_hz: tuple[float, float]) -> np.ndarray:
        """NF change (dB) at ``freq_hz``: offset + weak excess + tilt (-1 .. +1 across band)."""
        f = np.asarray(freq_hz, dtype=float)
        lo, hi = band_hz
        x = (2.0 * (f - lo) / (hi - lo) - 1.0) if hi > lo else np.zeros_like(f)
        return self.nf_offset_db + self.weak_nf_db + self.nf_tilt_db * x

    def to_dict(self) -> dict[str, Any]:
        return {
            "serial": self.serial,
            "nf_offset_db": self.nf_offset_db,
            "nf_tilt_db": self.nf_tilt_db,
            "gain_offset_db": self.gain_offset_db,
            "weak": self.weak,
            "weak_nf_db": self.weak_nf_db,
        }


MIN_SIMULATED_NF_DB = 0.05


def unit_dut_table(dut: Any, offsets: UnitOffsets) -> dict[str, Any]:
    """The ``[dut]`` overrides of one unit for a scenario's DUT spec (``sims.scenario``)."""
    freq = np.asarray(dut.freq_hz, dtype=float)
    gain = np.asarray(dut.gain_db, dtype=float) + offsets.gain_offset_db
    table: dict[str, Any] = {"name": f"{dut.name} #{offsets.serial}"}
    if dut.nf_db is not None:
        band = (float(freq[0]), float(freq[-1]))
        nf = np.asarray(dut.nf_db, dtype=float) + offsets.nf_change_db(freq, band)
        table["nf_db"] = [float(v) for v in np.maximum(nf, MIN_SIMULATED_NF_DB)]
    else:
        gain = np.minimum(gain, 0.0)  # a passive DUT never gains
    table["gain_db"] = [float(v) for v in gain]
    return table


def apply_simulated_unit(sim: Any, base_scenario: Any, offsets: UnitOffsets) -> Any:
    """Install unit ``offsets`` (relative to ``base_scenario``) in the running simulator.

    The unit's scenario is built through the simulator's validated scenario overrides; its
    DUT model replaces the bench's (``SimulatedBench.replace_dut``). Returns
    the unit's scenario.
    """
    from noisebench.sims.scenario import scenario_from_dict

    data = base_scenario.model_dump()
    data["dut"] = {**data["dut"], **unit_dut_table(base_scenario.dut, offsets)}
    scenario = scenario_from_dict(data, source=f"unit {offsets.serial}")
    install_scenario_dut(sim, scenario)
    logger.debug("simulated unit %s installed: %s", offsets.serial, offsets)
    return scenario


def install_scenario_dut(sim: Any, scenario: Any) -> None:
    """Make the running simulator's DUT the one of ``scenario`` (nothing else changes)."""
    sim.replace_dut(scenario.dut)


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


UnitStatus = Literal["complete", "interrupted", "failed", "not_started"]


class UnitResult(BaseModel):
    """What the station did with one unit."""

    serial: str
    lot: str | None = None
    part_number: str | None = None
    attempt: int = 1
    run_id: str | None = None
    folder: str | None = None
    status: UnitStatus
    verdict: str | None = None  # pass / fail / indeterminate; None: not judged or not measured
    failing: list[dict[str, Any]] = Field(default_factory=list)
    points: int = 0
    skipped_points: list[dict[str, Any]] = Field(default_factory=list)
    max_nf_db: float | None = None
    min_gain_db: float | None = None
    started_at: datetime
    duration_s: float = Field(ge=0)
    instrument_time_s: float | None = None
    calibrated_groups: int = 0
    calibration_reason: str | None = None
    database_id: int | None = None
    store_error: str | None = None
    error: str | None = None
    simulated_unit: dict[str, Any] | None = None

    @property
    def outcome(self) -> str:
        """``pass``/``fail``/``indeterminate``, ``not_judged`` (no limits), or ``error``.

        ``error``: the run did not complete (refused, failed, interrupted), whatever its
        points say; as in the results database, only complete runs are judged units. A
        complete run is counted by its verdict (a unit whose points were all skipped is
        ``indeterminate``: nothing was verified), or without limits ``not_judged`` -
        ``error`` when it measured no point at all.
        """
        if self.error is not None or self.status != "complete":
            return "error"
        if self.verdict:
            return self.verdict
        return "error" if self.points == 0 else "not_judged"

    def line(self) -> str:
        """One line for the operator."""
        who = self.serial + (f" (lot {self.lot})" if self.lot else "")
        text = f"{who}: {self.outcome.upper().replace('_', ' ')}"
        if self.max_nf_db is not None:
            text += f"  NF max {self.max_nf_db:.3f} dB"
        if self.min_gain_db is not None:
            text += f"  gain min {self.min_gain_db:.2f} dB"
        text += f"  {self.duration_s:.1f} s"
        if self.calibration_reason:
            text += f"  [calibrated: {self.calibration_reason}]"
        if self.status != "complete":
            text += f"  [run {self.status}]"
        for point in self.failing[:5]:
            text += "\n    " + _failing_text(point)
        if len(self.failing) > 5:
            text += f"\n    ... {len(self.failing) - 5} more point(s)"
        for skipped in self.skipped_points[:3]:
            text += (
                f"\n    not measured: {skipped.get('freq_hz', 0.0) / 1e9:.6g} GHz "
                f"({skipped.get('stage')}): {skipped.get('reason')}"
            )
        if len(self.skipped_points) > 3:
            text += f"\n    ... {len(self.skipped_points) - 3} more point(s) not measured"
        if self.error:
            text += f"\n    error: {self.error}"
        if self.store_error:
            text += f"\n    NOT STORED in the database: {self.store_error}"
        return text


def _failing_text(point: dict[str, Any]) -> str:
    checks = "; ".join(
        f"{c.get('quantity')} {c.get('value') if c.get('value') is None else round(c['value'], 3)}"
        f" vs {c.get('kind')} {c.get('limit')} (U {_fmt(c.get('U'))}): {c.get('verdict')}"
        for c in point.get("checks") or []
    )
    return f"{point.get('freq_hz', 0.0) / 1e9:.6g} GHz {point.get('verdict')}: {checks}"


def _fmt(value: Any, digits: int = 3) -> str:
    return "-" if not isinstance(value, (int, float)) else f"{value:.{digits}f}"


OUTCOMES = ("pass", "fail", "indeterminate", "not_judged", "error")


class StationSummary(BaseModel):
    """The tally of a station run (see the module docstring for the counting rules)."""

    station_id: str
    operator: str | None = None
    plan_name: str | None = None
    folder: str
    database: str | None = None
    started_at: datetime
    ended_at: datetime | None = None
    stopped_by: str | None = None
    units: list[UnitResult] = Field(default_factory=list)

    def latest(self) -> list[UnitResult]:
        """The latest attempt of every serial, in first-seen order."""
        last: dict[str, UnitResult] = {}
        for result in self.units:
            last[result.serial] = result
        return list(last.values())

    def counts(self) -> dict[str, int]:
        """Units (latest attempt per serial) by outcome."""
        out = dict.fromkeys(OUTCOMES, 0)
        for result in self.latest():
            out[result.outcome] += 1
        return out

    @property
    def judged(self) -> int:
        c = self.counts()
        return c["pass"] + c["fail"] + c["indeterminate"]

    @property
    def yield_fraction(self) -> float | None:
        """Passed / judged units; None when no unit was judged."""
        return self.counts()["pass"] / self.judged if self.judged else None

    @property
    def mean_time_per_unit_s(self) -> float | None:
        """Mean wall-clock time per measured unit (every attempt), s."""
        times = [u.duration_s for u in self.units]
        return sum(times) / len(times) if times else None

    @property
    def calibrations(self) -> int:
        """Units that triggered a calibration."""
        return sum(1 for u in self.units if u.calibrated_groups)

    @property
    def retests(self) -> int:
        return len(self.units) - len(self.latest())

    def not_stored(self) -> list[str]:
        return [u.serial for u in self.units if u.store_error]

    def format(self) -> str:
        """The end-of-run summary for the operator (plain text)."""
        c = self.counts()
        head = f"Station {self.station_id}" + (
            f", operator {self.operator}" if self.operator else ""
        )
        lines = [
            f"{head}: {len(self.latest())} unit(s), {len(self.units)} run(s)"
            + (f" ({self.retests} re-test(s))" if self.retests else ""),
            "  " + ", ".join(f"{k.replace('_', ' ')} {c[k]}" for k in OUTCOMES),
        ]
        if self.yield_fraction is not None:
            lines.append(
                f"  yield {100 * self.yield_fraction:.1f} % ({c['pass']} of {self.judged} judged)"
            )
        else:
            lines.append("  yield - (no unit judged)")
        if self.mean_time_per_unit_s is not None:
            lines.append(f"  mean time per unit {self.mean_time_per_unit_s:.1f} s")
        reasons = [u.calibration_reason for u in self.units if u.calibrated_groups]
        detail = ", ".join(f"{reasons.count(r)} {r}" for r in dict.fromkeys(reasons))
        lines.append(f"  calibrations {self.calibrations}" + (f" ({detail})" if detail else ""))
        failed = [u.serial for u in self.latest() if u.outcome in ("fail", "error")]
        if failed:
            lines.append("  fail/error: " + ", ".join(failed))
        if self.database:
            missing = self.not_stored()
            lines.append(
                f"  database {self.database}"
                + (f"; NOT STORED: {', '.join(missing)}" if missing else "")
            )
        lines.append(f"  results in {self.folder}")
        if self.stopped_by:
            lines.append(f"  stopped: {self.stopped_by}")
        return "\n".join(lines)


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
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in text)


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

"""The run store: a crash-safe journal while measuring, typed files when done.

A run lives in one folder:

==================  ==============================================================================
``run.json``        :class:`RunInfo` (everything about the run except the points); rewritten
                    atomically (temporary file + ``os.replace``) when a calibration is saved,
                    on resume and on finish.
``points.jsonl``    the journal: one JSON object per line, appended, flushed and fsync'ed one at a
                    time. ``{"kind": "point", "point": {...}, "budget": {...} | null}`` or
                    ``{"kind": "calibration", "calibration": {...}}``. A half-written last line
                    (the process was killed mid-write) is ignored with a warning.
``results.json``    :class:`RunRecord` (info, points sorted by frequency, budgets, verdict), written
                    by :meth:`RunWriter.finish` with pydantic.
``results.csv``     one row per point, sorted by frequency (columns below), written with ``csv``.
``plots/*.png``     :func:`noisebench.results.plots.plot_run`.
``report.html``     :func:`noisebench.results.report.write_report`.
==================  ==============================================================================

Columns of ``results.csv`` (empty cell = not applicable; numbers as Python ``repr``, which reads
back bit-exact):

=======================  ==========================================================================
``freq_hz``              measurement frequency, Hz
``nf_db``                noise figure of the DUT, dB (reference temperature T0 of the run)
``u_nf_db``              standard uncertainty of ``nf_db`` from the measurement statistics, dB
``te_k``                 effective input noise temperature, K
``u_te_k``               standard uncertainty of ``te_k``, K
``gain_db``              available gain of the DUT, dB
``u_gain_db``            standard uncertainty of ``gain_db``, dB
``y_db``                 Y-factor (hot/cold) with the DUT, dB (Y-factor method only)
``floor_margin_db``      DUT output noise above the analyzer's own noise, dB
``enr_db``               ENR of the noise source at this frequency, dB (Y-factor method only)
``averages``             traces/readings averaged for this point
``instrument_time_s``    instrument time spent on this point, s
``flags``                qualifiers, ``;``-joined (see :data:`FLAG_DESCRIPTIONS`)
``floor_correction_db``  change of NF made by the second-stage (analyzer-floor) correction, dB
``source_temperature_k`` physical temperature of the termination / cold source, K
``U_nf_db``              expanded uncertainty of ``nf_db`` from the budget, dB (only with budgets)
``coverage_k``           coverage factor of ``U_nf_db`` (only with budgets)
``budget_method``        ``gum`` or ``monte_carlo`` (only with budgets)
``verdict``              per-point verdict, e.g. ``pass``/``fail``/``indeterminate`` (only with a
                         verdict)
``limit``                the limit the point was judged against (only with a verdict)
=======================  ==========================================================================
"""

from __future__ import annotations

import contextlib
import csv
import functools
import io
import json
import logging
import math
import os
import platform
import secrets
import tempfile
import threading
from collections.abc import Callable, Iterable, Iterator
from datetime import datetime, timezone
from enum import Enum
from importlib import metadata
from pathlib import Path
from typing import Any, Literal, TypeVar

from pydantic import BaseModel, ConfigDict, Field, ValidationError, ValidationInfo, field_validator

from noisebench.errors import InputError
from noisebench.science.point import Method, PointFlag, PointResult

logger = logging.getLogger(__name__)
T = TypeVar("T")

RUN_INFO_FILE = "run.json"
JOURNAL_FILE = "points.jsonl"
RESULTS_JSON_FILE = "results.json"
RESULTS_CSV_FILE = "results.csv"
PLOTS_DIR = "plots"
REPORT_FILE = "report.html"

RunStatus = Literal["running", "complete", "interrupted", "failed"]
FINAL_STATUSES: tuple[str, ...] = ("complete", "interrupted", "failed")

#: The fixed CSV columns, in order. Optional columns follow when budgets or a verdict exist.
CSV_COLUMNS: tuple[str, ...] = (
    "freq_hz",
    "nf_db",
    "u_nf_db",
    "te_k",
    "u_te_k",
    "gain_db",
    "u_gain_db",
    "y_db",
    "floor_margin_db",
    "enr_db",
    "averages",
    "instrument_time_s",
    "flags",
    "floor_correction_db",
    "source_temperature_k",
)
CSV_BUDGET_COLUMNS: tuple[str, ...] = ("U_nf_db", "coverage_k", "budget_method")
CSV_VERDICT_COLUMNS: tuple[str, ...] = ("verdict", "limit")

#: What each point flag means, in words (for reports and summaries).
FLAG_DESCRIPTIONS: dict[PointFlag, str] = {
    PointFlag.Y_TOO_SMALL: "Y-factor close to 1: the noise figure is very sensitive to jitter; "
    "use a higher-ENR source or more averages.",
    PointFlag.NEAR_ANALYZER_FLOOR: "DUT noise only a few dB above the analyzer's own noise: "
    "the floor correction is large and adds uncertainty.",
    PointFlag.ENR_EXTRAPOLATED: "Frequency outside the ENR table: the ENR was clamped to the "
    "nearest table value.",
    PointFlag.SPURS_EXCLUDED: "Narrowband lines were found in the band and left out of the "
    "noise estimate.",
    PointFlag.TIME_LIMIT: "The time limit was reached before the target uncertainty.",
    PointFlag.EXCESS_SCATTER: "The trace scattered more than noise statistics predict "
    "(drift, interference or an unstable DUT).",
    PointFlag.LOW_GAIN: "Low DUT gain: the second-stage correction is large.",
    PointFlag.COMPRESSION_RISK: "Total noise power is near the analyzer's input limit: "
    "check linearity (e.g. add 3 dB attenuation).",
    PointFlag.NEGATIVE_TE: "The corrected noise temperature came out below zero, which is "
    "physically implausible: check calibration and losses.",
}


# ----------------------------------------------------------------------------- models


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


class RunInfo(BaseModel):
    """Everything about a run except the points: identity, provenance, settings, calibration.

    Temperatures in K. ``plan`` is the validated plan as a JSON-able dict; ``identities`` the
    instruments' identification strings by role; ``applied_settings`` the
    ``AcquisitionSettings`` dumps really used (per segment/group); ``calibration`` the latest
    calibration saved (see :attr:`RunRecord.calibrations` for all of them).
    """

    model_config = ConfigDict(extra="forbid")

    run_id: str = Field(min_length=1)
    method: Method
    dut_id: str | None = None
    operator: str | None = None
    station: str | None = None
    plan: dict[str, Any] = Field(default_factory=dict)
    identities: dict[str, str] = Field(default_factory=dict)
    versions: dict[str, str] = Field(default_factory=dict)
    started_at: datetime = Field(default_factory=_utc_now)
    ended_at: datetime | None = None
    status: RunStatus = "running"
    ambient_k: float | None = Field(default=None, gt=0)
    cold_temperature_k: float | None = Field(default=None, gt=0)
    applied_settings: list[dict[str, Any]] = Field(default_factory=list)
    calibration: dict[str, Any] | None = None
    notes: dict[str, Any] = Field(default_factory=dict)
    resumed_at: list[datetime] = Field(default_factory=list)
    format_version: int = 1

    @field_validator("plan", "applied_settings", "calibration", "notes", mode="before")
    @classmethod
    def _plain_json(cls, value: Any, info: ValidationInfo) -> Any:
        """Accept models, numpy values and enums; store plain JSON types."""
        return _jsonable(value, info.field_name or "info")


class RunRecord(BaseModel):
    """A whole run: info, points (sorted by frequency), budgets, verdict.

    ``budgets`` are the uncertainty engineer's dicts (one per frequency, with ``freq_hz``);
    ``verdict`` the limits engineer's dict (``unit``, ``points``, ``limits``).
    ``calibrations`` holds every calibration saved during the run, oldest first.
    ``warnings`` lists what loading had to work around (torn journal line, duplicates, ...).
    """

    model_config = ConfigDict(extra="forbid")

    info: RunInfo
    points: list[PointResult]
    budgets: list[dict[str, Any]] = Field(default_factory=list)
    verdict: dict[str, Any] | None = None
    calibrations: list[dict[str, Any]] = Field(default_factory=list)
    warnings: list[str] = Field(default_factory=list)

    @field_validator("budgets", "verdict", "calibrations", mode="before")
    @classmethod
    def _plain_json(cls, value: Any, info: ValidationInfo) -> Any:
        """Accept budget/verdict objects (``to_dict``), models and numpy values."""
        return _jsonable(value, info.field_name or "record")

    def budgets_by_freq(self) -> dict[float, dict[str, Any]]:
        """The budgets keyed by their ``freq_hz`` (first one wins)."""
        out: dict[float, dict[str, Any]] = {}
        for budget in self.budgets:
            out.setdefault(budget.get("freq_hz"), budget)
        return out

    def verdicts_by_freq(self) -> dict[float, dict[str, Any]]:
        """The per-point verdict entries keyed by ``freq_hz`` (empty without a verdict)."""
        out: dict[float, dict[str, Any]] = {}
        for entry in (self.verdict or {}).get("points") or []:
            if isinstance(entry, dict):
                out.setdefault(entry.get("freq_hz"), entry)
        return out

    def budget_at(self, freq_hz: float) -> dict[str, Any] | None:
        """The budget stored for ``freq_hz`` (exact match), or ``None``."""
        return self.budgets_by_freq().get(freq_hz)

    def verdict_at(self, freq_hz: float) -> dict[str, Any] | None:
        """The verdict entry for ``freq_hz`` (exact match), or ``None``."""
        return self.verdicts_by_freq().get(freq_hz)


# ----------------------------------------------------------------------------- helpers


def new_run_id(now: datetime | None = None) -> str:
    """A sortable, collision-safe run id such as ``20250101T120000Z-3f9a1c``."""
    stamp = (now or _utc_now()).astimezone(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return f"{stamp}-{secrets.token_hex(3)}"


def collect_versions() -> dict[str, str]:
    """Versions of noisebench, its main dependencies and Python (for ``RunInfo.versions``)."""
    versions = {"python": platform.python_version()}
    for dist in ("noisebench", "numpy", "scipy", "pydantic", "pyvisa", "pyvisa-py"):
        try:
            versions[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            versions[dist] = "not installed"
    return versions


def _jsonable(value: Any, where: str) -> Any:
    """Plain JSON types from numpy scalars/arrays, enums, paths, datetimes and models.

    Non-finite floats become ``None`` with a warning (JSON has no NaN).
    """
    to_dict = getattr(value, "to_dict", None)
    if callable(to_dict):  # e.g. uncertainty budgets and verdicts: their documented shape
        return _jsonable(to_dict(), where)
    if isinstance(value, BaseModel):
        return _jsonable(value.model_dump(mode="python"), where)
    if isinstance(value, dict):
        return {str(k): _jsonable(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [_jsonable(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, Enum):
        return value.value
    if isinstance(value, (datetime, Path)):
        return value.isoformat() if isinstance(value, datetime) else str(value)
    if hasattr(value, "tolist") and not isinstance(value, (str, bytes)):  # numpy
        return _jsonable(value.tolist(), where)
    if isinstance(value, bool) or value is None or isinstance(value, (str, int)):
        return value
    if isinstance(value, float):
        if math.isfinite(value):
            return value
        logger.warning("%s is %r: stored as null (JSON has no NaN/inf)", where, value)
        return None
    raise InputError(
        where,
        f"cannot be stored as JSON (type {type(value).__name__})",
        fix="store numbers, strings, lists or dicts",
    )


def _clean_point(point: PointResult) -> PointResult:
    """Refuse non-finite numbers in a point; return a copy with JSON-able notes."""
    if not isinstance(point, PointResult):
        raise InputError("point", f"must be a PointResult (got {type(point).__name__})")
    numbers = {
        name: getattr(point, name)
        for name in (
            "freq_hz",
            "nf_db",
            "te_k",
            "gain_db",
            "y_db",
            "u_nf_db",
            "u_te_k",
            "u_gain_db",
            "floor_margin_db",
            "floor_correction_db",
            "enr_db",
            "source_temperature_k",
            "instrument_time_s",
        )
    }
    numbers.update({f"densities_w_per_hz.{k}": v for k, v in point.densities_w_per_hz.items()})
    for name, value in numbers.items():
        if value is not None and not math.isfinite(value):
            raise InputError(
                f"point.{name}",
                f"is {value!r} at {point.freq_hz!r} Hz",
                fix="store only finite results; flag or skip the point instead",
            )
    notes = _jsonable(point.notes, "point.notes")
    return point.model_copy(update={"notes": notes})


def _fsync_dir(folder: Path) -> None:
    """Make a rename durable (POSIX); a no-op where directories cannot be opened."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_atomic(path: Path, data: str) -> None:
    """Write ``data`` (UTF-8) so that ``path`` holds either the old or the new content."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; results are meant to be shared
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)


def _sorted_points(points: Iterable[PointResult]) -> list[PointResult]:
    return sorted(points, key=lambda p: p.freq_hz)


def _sorted_budgets(budgets: Iterable[dict[str, Any]]) -> list[dict[str, Any]]:
    return sorted(budgets, key=lambda b: b.get("freq_hz", math.inf))


# ----------------------------------------------------------------------------- journal


class _Journal:
    """What a journal holds, parsed tolerantly. ``valid_bytes`` ends after the last good line."""

    def __init__(self) -> None:
        self.points: list[PointResult] = []
        self.budgets: list[dict[str, Any]] = []
        self.calibrations: list[dict[str, Any]] = []
        self.warnings: list[str] = []
        self.done_freqs_hz: set[float] = set()
        self.valid_bytes = 0
        self.needs_newline = False


def _parse_entry(line: bytes, where: str, journal: _Journal) -> None:
    entry = json.loads(line)
    kind = entry.get("kind") if isinstance(entry, dict) else None
    if kind == "point":
        point = _clean_point(PointResult.model_validate(entry["point"]))  # finite, as written
        if point.freq_hz in journal.done_freqs_hz:
            text = f"{where}: duplicate point at {point.freq_hz!r} Hz ignored (first one kept)"
            logger.warning(text)
            journal.warnings.append(text)
            return
        journal.points.append(point)
        journal.done_freqs_hz.add(point.freq_hz)
        if entry.get("budget") is not None:
            journal.budgets.append(entry["budget"])
    elif kind == "calibration":
        journal.calibrations.append(entry["calibration"])
    else:
        raise ValueError(f"unknown journal entry kind {kind!r}")


def _read_journal(path: Path) -> _Journal:
    """Parse ``points.jsonl``. A torn last line is ignored with a warning, never raised.

    Appends are single writes ending in a newline, so only the unterminated final piece of the
    file can be torn; an unreadable line elsewhere is skipped with a warning and kept on disk.
    """
    journal = _Journal()
    if not path.exists():
        return journal
    data = path.read_bytes()
    pieces = data.split(b"\n")
    last = len(pieces) - 1
    for index, piece in enumerate(pieces):
        if not piece.strip():
            continue
        where = f"{path.name} line {index + 1}"
        try:
            _parse_entry(piece, where, journal)
        except (ValueError, KeyError, TypeError, ValidationError) as exc:
            if index == last:
                text = (
                    f"{where}: incomplete last entry ({len(piece)} bytes) ignored; "
                    "the run was probably killed while writing it"
                )
            else:
                text = f"{where}: unreadable entry skipped ({type(exc).__name__}: {exc})"
            logger.warning(text)
            journal.warnings.append(text)
            if index == last:
                journal.valid_bytes = len(data) - len(piece)
                return journal
            continue
        journal.needs_newline = index == last  # complete JSON whose newline never reached disk
    journal.valid_bytes = len(data)
    return journal


# ----------------------------------------------------------------------------- locking


class _FolderLock:
    """Advisory, process-wide lock on a run folder (POSIX ``flock``; none elsewhere).

    The OS releases it when the process dies, so a killed run never stays locked. ``release``
    deletes the lock file (no empty ``.lock`` is left in a finished folder); a process that
    opened the file just before it was deleted sees that its locked file is no longer the one
    at the path and refuses, as if the folder were busy.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self._fd: int | None = None

    def acquire(self) -> None:
        try:
            import fcntl
        except ImportError:  # pragma: no cover - Windows: no advisory lock
            return
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            busy = InputError(
                "folder",
                f"{self.path.parent} is in use by another running measurement",
                fix="wait for it to end, or pick another folder",
            )
            raise busy from None
        try:
            same = os.path.samestat(os.fstat(fd), os.stat(self.path))
        except OSError:
            same = False
        if not same:  # the holder released and deleted it between our open and flock
            os.close(fd)
            raise InputError(
                "folder",
                f"{self.path.parent} was just released by another measurement",
                fix="try again",
            )
        self._fd = fd

    def release(self) -> None:
        if self._fd is not None:
            try:
                self.path.unlink()  # while still holding the lock (see the class doc)
            except OSError:
                pass
            os.close(self._fd)
            self._fd = None

    @staticmethod
    def is_held(path: Path) -> bool:
        """True when a live process holds the lock on ``path``."""
        try:
            import fcntl
        except ImportError:  # pragma: no cover
            return False
        if not path.exists():
            return False
        fd = os.open(path, os.O_RDONLY)
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except OSError:
            return True
        finally:
            os.close(fd)
        return False


LOCK_FILE = ".lock"
# O_BINARY (Windows only) keeps newlines as written; O_APPEND makes each write land at the end.
_APPEND_FLAGS = os.O_WRONLY | os.O_APPEND | os.O_CREAT | getattr(os, "O_BINARY", 0)


# ----------------------------------------------------------------------------- writer


def _serialized(method: Callable[..., T]) -> Callable[..., T]:
    """Run a writer method under the writer's lock (calls from several threads queue up)."""

    @functools.wraps(method)
    def wrapper(self: RunWriter, *args: Any, **kwargs: Any) -> T:
        with self._mutex:
            return method(self, *args, **kwargs)

    return wrapper


class RunWriter:
    """Incremental, crash-safe writer of one run folder.

    Every :meth:`add_point` appends one line to ``points.jsonl`` and fsyncs it before returning,
    so a kill at any moment loses at most the point being written. Use :meth:`create` for a new
    run, :meth:`resume` to continue an interrupted one (``done_freqs_hz`` tells which
    frequencies to skip), and :meth:`finish` to write ``results.json`` and ``results.csv``.
    Also a context manager: leaving the block on an exception finishes the run as
    ``interrupted`` (KeyboardInterrupt) or ``failed``; a clean exit without :meth:`finish`
    leaves it resumable.
    """

    def __init__(self, folder: Path, info: RunInfo, journal: _Journal, lock: _FolderLock) -> None:
        self.folder = folder
        self.info = info
        self.done_freqs_hz: set[float] = set(journal.done_freqs_hz)
        self._points = list(journal.points)
        self._budgets = list(journal.budgets)
        self._calibrations = list(journal.calibrations)
        self._warnings = list(journal.warnings)
        self._lock = lock
        self._fd: int | None = os.open(folder / JOURNAL_FILE, _APPEND_FLAGS, 0o644)
        self._mutex = threading.RLock()  # one writer object may be shared by threads

    # -- opening

    @classmethod
    def create(cls, folder: Path, info: RunInfo) -> RunWriter:
        """Start a new run in ``folder`` (created if needed; must not already hold a run)."""
        folder = Path(folder)
        if not isinstance(info, RunInfo):
            raise InputError("info", f"must be a RunInfo (got {type(info).__name__})")
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(
                "folder",
                f"cannot create {folder}: {exc.strerror or exc}",
                fix="choose a writable output folder",
            ) from exc
        lock = _FolderLock(folder / LOCK_FILE)
        lock.acquire()
        try:
            if (folder / RUN_INFO_FILE).exists() or (folder / JOURNAL_FILE).exists():
                raise InputError(
                    "folder",
                    f"{folder} already holds a run",
                    fix="choose a new folder, or resume that run",
                )
            info = info.model_copy(update={"status": "running", "ended_at": None})
            info = RunInfo.model_validate(_jsonable(info, "info"))
            write_atomic(folder / RUN_INFO_FILE, info.model_dump_json(indent=2))
            writer = cls(folder, info, _Journal(), lock)
        except BaseException:
            lock.release()
            raise
        logger.info("run %s started in %s", info.run_id, folder)
        return writer

    @classmethod
    def resume(cls, folder: Path) -> RunWriter:
        """Re-open an interrupted or failed run (or a complete one with points the physics
        refused) to add the missing points."""
        folder = Path(folder)
        info = _read_info(folder)
        lock = _FolderLock(folder / LOCK_FILE)
        lock.acquire()
        try:
            check_resumable(folder, info)
            # points the physics refused are measured again: the resumed run records afresh
            # whichever it still cannot measure
            notes = {k: v for k, v in info.notes.items() if k != "skipped_points"}
            journal = _read_journal(folder / JOURNAL_FILE)
            _repair_journal(folder / JOURNAL_FILE, journal)
            if journal.calibrations:
                info = info.model_copy(update={"calibration": journal.calibrations[-1]})
            info = info.model_copy(
                update={
                    "status": "running",
                    "ended_at": None,
                    "notes": notes,
                    "resumed_at": [*info.resumed_at, _utc_now()],
                }
            )
            for stale in (RESULTS_JSON_FILE, RESULTS_CSV_FILE):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(folder / stale)
            write_atomic(folder / RUN_INFO_FILE, info.model_dump_json(indent=2))
            writer = cls(folder, info, journal, lock)
        except BaseException:
            lock.release()
            raise
        logger.info(
            "run %s resumed in %s with %d points done",
            info.run_id,
            folder,
            len(writer.done_freqs_hz),
        )
        return writer

    # -- writing

    @property
    def points(self) -> list[PointResult]:
        """Points written so far, in the order they were added."""
        return list(self._points)

    @_serialized
    def add_point(self, point: PointResult, budget: dict | None = None) -> None:
        """Append one point (and its uncertainty budget) to the journal, durably.

        ``budget`` is a dict in the budget shape or an object with ``to_dict()``.
        Raises :class:`InputError` for a frequency already in :attr:`done_freqs_hz`, for
        non-finite numbers, or for a budget whose ``freq_hz`` differs from the point's.
        """
        self._require_open()
        point = _clean_point(point)
        if point.freq_hz in self.done_freqs_hz:
            raise InputError(
                "point.freq_hz",
                f"{point.freq_hz!r} Hz is already in this run",
                fix="skip frequencies listed in RunWriter.done_freqs_hz",
            )
        if budget is not None:
            budget = self._clean_budget(point.freq_hz, budget)
        entry = {"kind": "point", "point": point.model_dump(mode="json"), "budget": budget}
        self._append(entry)
        self._points.append(point)
        if budget is not None:
            self._budgets.append(budget)
        self.done_freqs_hz.add(point.freq_hz)
        logger.debug("point %.6g Hz stored: NF %.3f dB", point.freq_hz, point.nf_db)

    @_serialized
    def save_calibration(self, calibration: dict) -> None:
        """Store a calibration (journal + ``run.json``); the latest is ``info.calibration``."""
        self._require_open()
        calibration = _jsonable(calibration, "calibration")
        if not isinstance(calibration, dict):
            raise InputError(
                "calibration",
                f"must be a dict (got {type(calibration).__name__})",
                fix="pass the calibration as a JSON-able dict or a model",
            )
        self._append({"kind": "calibration", "calibration": calibration})
        self._calibrations.append(calibration)
        self.info = self.info.model_copy(update={"calibration": calibration})
        write_atomic(self.folder / RUN_INFO_FILE, self.info.model_dump_json(indent=2))

    @_serialized
    def update_info(self, **fields: Any) -> None:
        """Change run-level fields (e.g. ``identities``, ``applied_settings``) and save them."""
        self._require_open()
        for name in ("run_id", "status", "ended_at", "started_at"):
            if name in fields:
                raise InputError(
                    name, "is managed by the run store", fix="use create/resume/finish"
                )
        merged = {**self.info.model_dump(mode="json"), **_jsonable(fields, "info")}
        try:
            self.info = RunInfo.model_validate(merged)
        except ValidationError as exc:
            err = exc.errors()[0]
            field = ".".join(str(p) for p in err["loc"]) or "info"
            raise InputError(field, err["msg"]) from None
        write_atomic(self.folder / RUN_INFO_FILE, self.info.model_dump_json(indent=2))

    @_serialized
    def finish(self, status: str = "complete", verdict: dict | None = None) -> RunRecord:
        """End the run: write ``results.json`` and ``results.csv``, then ``run.json``."""
        self._require_open()
        if status not in FINAL_STATUSES:
            raise InputError(
                "status", f"must be one of {', '.join(FINAL_STATUSES)} (got {status!r})"
            )
        verdict = _jsonable(verdict, "verdict") if verdict is not None else None
        if verdict is not None and not isinstance(verdict, dict):
            raise InputError(
                "verdict",
                f"must be a dict (got {type(verdict).__name__})",
                fix="pass UnitVerdict.to_dict() or the verdict object",
            )
        info = self.info.model_copy(update={"status": status, "ended_at": _utc_now()})
        record = RunRecord(
            info=info,
            points=_sorted_points(self._points),
            budgets=_sorted_budgets(self._budgets),
            verdict=verdict,
            calibrations=self._calibrations,
            warnings=self._warnings,
        )
        write_results(record, self.folder)
        write_atomic(self.folder / RUN_INFO_FILE, info.model_dump_json(indent=2))
        self.info = info
        self._close_files()
        logger.info(
            "run %s %s: %d points in %s", info.run_id, status, len(record.points), self.folder
        )
        return record

    @_serialized
    def close(self) -> None:
        """Release the folder without finishing (the run stays resumable). Idempotent."""
        self._close_files()

    # -- context manager

    def __enter__(self) -> RunWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._fd is None:
            return
        if exc_type is None:
            self.close()
        elif issubclass(exc_type, KeyboardInterrupt):
            self.finish("interrupted")
        else:
            self.finish("failed")

    # -- internals

    def _require_open(self) -> None:
        if self._fd is None:
            raise InputError(
                "run",
                f"run {self.info.run_id} is closed",
                fix="resume the run folder to write to it again",
            )

    def _clean_budget(self, freq_hz: float, budget: Any) -> dict[str, Any]:
        budget = _jsonable(budget, "budget")
        if not isinstance(budget, dict):
            raise InputError(
                "budget",
                f"must be a dict (got {type(budget).__name__})",
                fix="pass Budget.to_dict() or the budget object",
            )
        if "freq_hz" in budget and budget["freq_hz"] != freq_hz:
            raise InputError(
                "budget.freq_hz",
                f"is {budget['freq_hz']!r} but the point is at {freq_hz!r} Hz",
                fix="pass the budget computed for this point",
            )
        return {**budget, "freq_hz": freq_hz}

    def _append(self, entry: dict[str, Any]) -> None:
        line = (json.dumps(entry, allow_nan=False, separators=(",", ":")) + "\n").encode()
        assert self._fd is not None
        view = memoryview(line)
        while view:
            written = os.write(self._fd, view)
            view = view[written:]
        os.fsync(self._fd)

    def _close_files(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self._lock.release()

    def __del__(self) -> None:  # a dropped writer must not keep the folder locked
        with contextlib.suppress(Exception):
            self._close_files()


def _repair_journal(path: Path, journal: _Journal) -> None:
    """Before appending again: cut a torn last line off, or end a complete one with a newline."""
    if not path.exists():
        return
    size = path.stat().st_size
    if size > journal.valid_bytes:
        logger.warning(
            "%s: removing %d bytes of an incomplete last entry before resuming",
            path.name,
            size - journal.valid_bytes,
        )
        with open(path, "r+b") as handle:
            handle.truncate(journal.valid_bytes)
            handle.flush()
            os.fsync(handle.fileno())
    elif journal.needs_newline:
        with open(path, "ab") as handle:
            handle.write(b"\n")
            handle.flush()
            os.fsync(handle.fileno())


# ----------------------------------------------------------------------------- reading


def check_resumable(folder: str | Path, info: RunInfo | None = None) -> RunInfo:
    """The run description of ``folder`` if ``resume`` can continue it, else InputError
    (no run there, or a complete run with no point left to measure). Touches nothing."""
    folder = Path(folder)
    info = info or _read_info(folder)
    if info.status == "complete" and not info.notes.get("skipped_points"):
        raise InputError(
            "folder",
            f"run {info.run_id} in {folder} is already complete",
            fix="start a new run to measure again",
        )
    return info


def _read_info(folder: Path) -> RunInfo:
    path = folder / RUN_INFO_FILE
    if not folder.is_dir():
        raise InputError(
            "folder", f"{folder} is not a folder", fix="pass the output folder of a run"
        )
    if not path.exists():
        raise InputError(
            "folder",
            f"{folder} holds no {RUN_INFO_FILE}",
            fix="pass a run folder written by noisebench",
        )
    try:
        return RunInfo.model_validate_json(path.read_text(encoding="utf-8"))
    except ValidationError as exc:
        raise InputError(
            f"{RUN_INFO_FILE}",
            f"is not a valid run description "
            f"({exc.error_count()} problems, first: {exc.errors()[0]['msg']})",
            fix="restore the file from a backup",
        ) from None


def load_run(folder: Path) -> RunRecord:
    """Load a run: from ``results.json`` when finished, else rebuilt from the journal.

    A run rebuilt from the journal reports status ``running`` if a live process still holds
    the folder, otherwise ``interrupted``; ``record.warnings`` says so.
    """
    folder = Path(folder)
    info = _read_info(folder)
    results = folder / RESULTS_JSON_FILE
    if info.status != "running" and results.exists():
        try:
            return RunRecord.model_validate_json(results.read_text(encoding="utf-8"))
        except ValidationError as exc:
            logger.warning(
                "%s unreadable (%s); rebuilding from the journal", results, exc.errors()[0]["msg"]
            )
    return _record_from_journal(folder, info)


def _record_from_journal(folder: Path, info: RunInfo) -> RunRecord:
    journal = _read_journal(folder / JOURNAL_FILE)
    warnings = list(journal.warnings)
    if info.status == "running":
        live = _FolderLock.is_held(folder / LOCK_FILE)
        status = "running" if live else "interrupted"
        warnings.append(
            "run still in progress: results so far"
            if live
            else "run did not finish (killed or crashed): rebuilt from the journal"
        )
        info = info.model_copy(update={"status": status})
    if journal.calibrations:
        info = info.model_copy(update={"calibration": journal.calibrations[-1]})
    return RunRecord(
        info=info,
        points=_sorted_points(journal.points),
        budgets=_sorted_budgets(journal.budgets),
        calibrations=journal.calibrations,
        warnings=warnings,
    )


# ----------------------------------------------------------------------------- outputs


def write_results(record: RunRecord, folder: Path) -> tuple[Path, Path]:
    """Write ``results.json`` (pydantic) and ``results.csv`` (csv module) atomically."""
    folder = Path(folder)
    json_path, csv_path = folder / RESULTS_JSON_FILE, folder / RESULTS_CSV_FILE
    write_atomic(json_path, record.model_dump_json(indent=2))
    write_atomic(csv_path, results_csv_text(record))
    return json_path, csv_path


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)
    return str(value)


def csv_columns(record: RunRecord) -> list[str]:
    """The columns ``results.csv`` will have for ``record``."""
    columns = list(CSV_COLUMNS)
    if record.budgets:
        columns += CSV_BUDGET_COLUMNS
    if record.verdict and record.verdict.get("points"):
        columns += CSV_VERDICT_COLUMNS
    return columns


def csv_rows(record: RunRecord) -> Iterator[dict[str, str]]:
    """One dict of formatted cells per point, keys as :func:`csv_columns`."""
    columns = csv_columns(record)
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    for point in _sorted_points(record.points):
        row: dict[str, Any] = {name: getattr(point, name, None) for name in CSV_COLUMNS}
        row["flags"] = ";".join(flag.value for flag in point.flags)
        budget = budgets.get(point.freq_hz) or {}
        row["U_nf_db"] = budget.get("U_expanded_db")
        row["coverage_k"] = budget.get("k")
        row["budget_method"] = budget.get("method")
        verdict = verdicts.get(point.freq_hz) or {}
        row["verdict"] = verdict.get("verdict")
        limit = verdict.get("limit")
        row["limit"] = json.dumps(limit) if isinstance(limit, (dict, list)) else limit
        yield {name: _cell(row.get(name)) for name in columns}


def results_csv_text(record: RunRecord) -> str:
    """The content of ``results.csv``."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=csv_columns(record), lineterminator="\n")
    writer.writeheader()
    writer.writerows(csv_rows(record))
    return buffer.getvalue()


# ----------------------------------------------------------------------------- summary


def _fmt(value: float | None, digits: int = 3, unit: str = "") -> str:
    if value is None:
        return "-"
    return f"{value:.{digits}f}{unit}"


def _fmt_freq(freq_hz: float) -> str:
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(freq_hz) >= scale:
            return f"{freq_hz / scale:.6g} {unit}"
    return f"{freq_hz:.6g} Hz"


def nf_extremes(record: RunRecord) -> tuple[PointResult, PointResult] | None:
    """The points with the lowest and highest NF, or ``None`` without points."""
    if not record.points:
        return None
    return (min(record.points, key=lambda p: p.nf_db), max(record.points, key=lambda p: p.nf_db))


def format_summary(record: RunRecord, *, table: bool = False) -> str:
    """A plain-text summary of a run for terminals and logs (no colour, no Rich).

    With ``table=True`` a per-point table follows the summary.
    """
    info = record.info
    rows: list[tuple[str, str]] = [
        (
            "DUT",
            f"{info.dut_id or '-'}    operator {info.operator or '-'}    "
            f"station {info.station or '-'}",
        ),
        (
            "started",
            info.started_at.isoformat(timespec="seconds")
            + (f"    ended {info.ended_at.isoformat(timespec='seconds')}" if info.ended_at else ""),
        ),
    ]
    rows += [
        (role.replace("_", " "), identity) for role, identity in sorted(info.identities.items())
    ]
    rows.append(
        (
            "points",
            f"{len(record.points)}"
            + (
                f" ({_fmt_freq(record.points[0].freq_hz)}"
                f" to {_fmt_freq(record.points[-1].freq_hz)})"
                if record.points
                else ""
            ),
        )
    )
    extremes = nf_extremes(record)
    if extremes:
        low, high = extremes
        rows.append(
            (
                "NF",
                f"min {low.nf_db:.3f} dB at {_fmt_freq(low.freq_hz)}, "
                f"max {high.nf_db:.3f} dB at {_fmt_freq(high.freq_hz)}",
            )
        )
        gains = [p.gain_db for p in record.points if p.gain_db is not None]
        if gains:
            rows.append(("gain", f"{min(gains):.3f} to {max(gains):.3f} dB"))
        flagged = sum(1 for p in record.points if p.flags)
        if flagged:
            rows.append(("flagged", f"{flagged} of {len(record.points)} points"))
    if record.verdict:
        rows.append(("verdict", str(record.verdict.get("unit", "-")).upper()))
    rows += [("warning", warning) for warning in record.warnings]
    width = max(len(label) for label, _ in rows) + 2
    lines = [
        f"Run {info.run_id}: {info.method.value.replace('_', '-')} method, status {info.status}"
    ]
    lines += [f"  {label:<{width}}{text}" for label, text in rows]
    if table and record.points:
        lines.append("")
        lines.extend(_summary_table(record))
    return "\n".join(lines)


def _summary_table(record: RunRecord) -> list[str]:
    header = (
        f"{'freq':>14} {'NF dB':>8} {'u dB':>7} {'U dB':>7} {'Te K':>9} "
        f"{'gain dB':>8} {'verdict':>13}  flags"
    )
    rows = [header, "-" * len(header)]
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    for point in record.points:
        budget = budgets.get(point.freq_hz) or {}
        verdict = verdicts.get(point.freq_hz) or {}
        rows.append(
            f"{_fmt_freq(point.freq_hz):>14} {point.nf_db:>8.3f} {point.u_nf_db:>7.3f} "
            f"{_fmt(budget.get('U_expanded_db')):>7} {point.te_k:>9.1f} "
            f"{_fmt(point.gain_db):>8} {str(verdict.get('verdict', '-')):>13}  "
            + ",".join(f.value for f in point.flags)
        )
    return rows


__all__ = [
    "CSV_BUDGET_COLUMNS",
    "CSV_COLUMNS",
    "CSV_VERDICT_COLUMNS",
    "FLAG_DESCRIPTIONS",
    "JOURNAL_FILE",
    "PLOTS_DIR",
    "REPORT_FILE",
    "RESULTS_CSV_FILE",
    "RESULTS_JSON_FILE",
    "RUN_INFO_FILE",
    "RunInfo",
    "RunRecord",
    "RunWriter",
    "check_resumable",
    "collect_versions",
    "csv_columns",
    "csv_rows",
    "format_summary",
    "load_run",
    "new_run_id",
    "nf_extremes",
    "results_csv_text",
    "write_atomic",
    "write_results",
]

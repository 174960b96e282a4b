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
import copy
import functools
import json
import logging
import os
import platform
import secrets
import threading
from collections.abc import Callable, Iterator
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import Any, TypeVar

from pydantic import ValidationError

from noisebench.errors import InputError
from noisebench.results.exports import (
    _large,
    csv_columns,
    csv_rows,
    model_json_pieces,
    results_csv_text,
    write_results,
)
from noisebench.results.journal import (
    _APPEND_FLAGS,
    LOCK_FILE,
    _FolderLock,
    _Journal,
    _read_journal,
    _repair_journal,
    write_atomic,
)
from noisebench.results.records import (
    CSV_BUDGET_COLUMNS,
    CSV_COLUMNS,
    CSV_VERDICT_COLUMNS,
    FINAL_STATUSES,
    FLAG_DESCRIPTIONS,
    JOURNAL_FILE,
    PLOTS_DIR,
    REPORT_FILE,
    RESULTS_CSV_FILE,
    RESULTS_JSON_FILE,
    RUN_INFO_FILE,
    RunInfo,
    RunRecord,
    _clean_point,
    _jsonable,
    _sorted_budgets,
    _sorted_points,
    _utc_now,
)
from noisebench.results.run_files import RunFileError, read_model
from noisebench.results.stored import JournalIndex, stored_views
from noisebench.results.summary import format_summary, nf_extremes
from noisebench.science.point import PointResult
from noisebench.units import format_frequency

logger = logging.getLogger(__name__)
T = TypeVar("T")
_APPEND_PIECE_CHARS = 1 << 16  # a large journal line is written in pieces of about this size

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
        # Points and budgets live in the journal only (memory stays flat over a long sweep);
        # ``finish`` and ``points`` read them back from it. The calibrations are kept: the
        # latest is ``info.calibration`` (the same object, so no second copy).
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
            write_atomic(folder / RUN_INFO_FILE, model_json_pieces(info))
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
            write_atomic(folder / RUN_INFO_FILE, model_json_pieces(info))
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
        """Points written so far, in the order they were added (read from the journal)."""
        with self._mutex:
            return _read_journal(self.folder / JOURNAL_FILE).points

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
                f"{format_frequency(point.freq_hz, 12)} is already in this run",
                fix="skip frequencies listed in RunWriter.done_freqs_hz",
            )
        if budget is not None:
            budget = self._clean_budget(point.freq_hz, budget)
        entry = {"kind": "point", "point": point.model_dump(mode="json"), "budget": budget}
        self._append(entry)
        self.done_freqs_hz.add(point.freq_hz)
        logger.debug("point %s stored: NF %.3f dB", format_frequency(point.freq_hz), point.nf_db)

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
        self._append({"kind": "calibration", "calibration": calibration}, large=True)
        self._calibrations.append(calibration)
        self.info = self.info.model_copy(update={"calibration": calibration})
        write_atomic(self.folder / RUN_INFO_FILE, model_json_pieces(self.info))

    @_serialized
    def update_info(self, **fields: Any) -> None:
        """Change run-level fields (e.g. ``identities``, ``applied_settings``) and save them."""
        self._require_open()
        for name in ("run_id", "status", "ended_at", "started_at"):
            if name in fields:
                raise InputError(
                    name, "is managed by the run store", fix="use create/resume/finish"
                )
        # the current fields as they are (a dump would copy the whole calibration each time);
        # the new ones copied, so the caller's objects stay the caller's
        current = {name: getattr(self.info, name) for name in type(self.info).model_fields}
        merged = {**current, **_jsonable(copy.deepcopy(fields), "info")}
        try:
            self.info = RunInfo.model_validate(merged)
        except ValidationError as exc:
            err = exc.errors()[0]
            field = ".".join(str(p) for p in err["loc"]) or "info"
            raise InputError(field, err["msg"]) from None
        write_atomic(self.folder / RUN_INFO_FILE, model_json_pieces(self.info))

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
        # the points and budgets stay in the journal: the record reads them when asked
        path = self.folder / JOURNAL_FILE
        index = _read_journal(path, calibrations=False, index=JournalIndex()).index
        assert index is not None  # asked for
        points, budgets = stored_views(path, index)
        del index
        record = RunRecord(
            info=info,
            points=points,
            budgets=budgets,
            verdict=verdict,
            calibrations=self._calibrations,
            warnings=self._warnings,
        )
        write_results(record, self.folder)
        write_atomic(self.folder / RUN_INFO_FILE, model_json_pieces(info))
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
                f"is {budget['freq_hz']!r} but the point is at {format_frequency(freq_hz, 12)}",
                fix="pass the budget computed for this point",
            )
        return {**budget, "freq_hz": freq_hz}

    def _append(self, entry: dict[str, Any], *, large: bool = False) -> None:
        """One journal line, fsync'ed. A ``large`` entry (a long sweep's calibration) is
        encoded and written in pieces of about 64 kB, never held whole: a process killed
        between the pieces leaves an incomplete last line, which the reader ignores and
        ``resume`` cuts off, as for a torn single write."""
        assert self._fd is not None
        if large:
            pending: list[str] = []
            size = 0
            for piece in _line_pieces(entry):
                pending.append(piece)
                size += len(piece)
                if size >= _APPEND_PIECE_CHARS:
                    self._write("".join(pending).encode())
                    pending, size = [], 0
            self._write(("".join(pending) + "\n").encode())
        else:
            self._write((json.dumps(entry, allow_nan=False, separators=(",", ":")) + "\n").encode())
        os.fsync(self._fd)

    def _write(self, data: bytes) -> None:
        assert self._fd is not None
        view = memoryview(data)
        while view:
            written = os.write(self._fd, view)
            view = view[written:]

    def _close_files(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self._lock.release()

    def __del__(self) -> None:  # a dropped writer must not keep the folder locked
        with contextlib.suppress(Exception):
            self._close_files()


def _line_pieces(value: Any) -> Iterator[str]:
    """``json.dumps(value, allow_nan=False, separators=(",", ":"))`` in pieces, the same text:
    containers that hold a long list are written child by child, anything else in one call of
    the C encoder (``JSONEncoder.iterencode`` runs the pure-Python encoder, about four times
    slower on a long sweep's calibration, leaf by leaf)."""
    if not _large(value):
        yield json.dumps(value, allow_nan=False, separators=(",", ":"))
    elif isinstance(value, dict) and all(type(k) is str for k in value):
        yield "{"
        for index, (key, item) in enumerate(value.items()):
            yield ("," if index else "") + json.dumps(key) + ":"
            yield from _line_pieces(item)
        yield "}"
    elif isinstance(value, list):
        for index, item in enumerate(value):
            yield "," if index else "["
            yield from _line_pieces(item)
        yield "]"
    else:
        yield json.dumps(value, allow_nan=False, separators=(",", ":"))


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
    return read_model(
        path,
        RunInfo,
        fix=f"restore {RUN_INFO_FILE} from a backup; the journal {JOURNAL_FILE} was not touched",
    )


def load_run(folder: Path) -> RunRecord:
    """Load a run: from ``results.json`` when finished, else rebuilt from the journal.

    A run rebuilt from the journal reports status ``running`` if a live process still holds
    the folder, otherwise ``interrupted``; ``record.warnings`` says so. A damaged file is
    worked around where an intact one holds the same data (``run.json`` by ``results.json``,
    ``results.json`` by the journal), with a warning naming the file, line and damage; the
    damaged file is left as it is.
    """
    folder = Path(folder)
    try:
        info = _read_info(folder)
    except RunFileError as damaged:
        return _record_without_info(folder, damaged)
    results = folder / RESULTS_JSON_FILE
    if info.status != "running" and results.exists():
        try:
            return read_model(results, RunRecord, fix="rebuilt from the journal")
        except RunFileError as exc:
            warning = f"{exc}; the points were read from the journal {JOURNAL_FILE} instead"
            logger.warning(warning)
            record = _record_from_journal(folder, info)
            return record.model_copy(update={"warnings": [warning, *record.warnings]})
    return _record_from_journal(folder, info)


def _record_without_info(folder: Path, damaged: RunFileError) -> RunRecord:
    """A run whose ``run.json`` is damaged: from ``results.json`` if that is intact."""
    results = folder / RESULTS_JSON_FILE
    if not results.exists():
        raise damaged
    try:
        record = read_model(results, RunRecord, fix="restore it from a backup")
    except RunFileError:
        raise damaged from None
    warning = f"{damaged}; the run description was taken from {RESULTS_JSON_FILE}"
    logger.warning(warning)
    return record.model_copy(update={"warnings": [warning, *record.warnings]})


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

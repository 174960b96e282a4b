"""Durable files of a run folder: atomic writes, the append-only point journal (`points.jsonl`),
its repair before a resume, and the folder lock."""

from __future__ import annotations

import contextlib
import json
import logging
import os
import re
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any, BinaryIO

from pydantic import ValidationError

from noisebench.errors import InputError
from noisebench.results.records import _clean_point
from noisebench.results.run_files import describe_damage
from noisebench.results.stored import JournalIndex
from noisebench.science.point import PointResult
from noisebench.units import format_frequency

logger = logging.getLogger(__name__)


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


def write_atomic(path: Path, data: str | Iterable[str]) -> None:
    """Write ``data`` (UTF-8) so that ``path`` holds either the old or the new content.

    ``data`` may be an iterable of text pieces, written as they come (a large file is then
    never held whole in memory)."""
    path = Path(path)
    pieces = [data] if isinstance(data, str) else data
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
            for piece in pieces:
                handle.write(piece)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; results are meant to be shared
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)


# ----------------------------------------------------------------------------- journal


_CALIBRATION_LINE = b'{"kind":"calibration"'  # how RunWriter starts a calibration line
_SURROGATE_ESCAPE = re.compile(rb"\\u[dD][89a-fA-F]")


class _Journal:
    """What a journal holds, parsed tolerantly. ``valid_bytes`` ends after the last good line."""

    def __init__(self, index: JournalIndex | None = None) -> None:
        self.index = index  # where the points lie, when they are indexed instead of loaded
        self.points: list[PointResult] = []
        self.budgets: list[dict[str, Any]] = []
        self.calibrations: list[dict[str, Any]] = []
        self.warnings: list[str] = []
        self.done_freqs_hz: set[float] = set()
        self.valid_bytes = 0
        self.needs_newline = False


def _parse_entry(line: bytes, where: str, journal: _Journal, offset: int = 0) -> None:
    entry = json.loads(line.decode("utf-8"))  # strict: no encoded surrogates
    if _SURROGATE_ESCAPE.search(line):  # "\ud800" escapes give text that cannot be written
        json.dumps(entry, ensure_ascii=False).encode("utf-8")  # UnicodeEncodeError: damaged
    kind = entry.get("kind") if isinstance(entry, dict) else None
    if kind == "point":
        point = _clean_point(PointResult.model_validate(entry["point"]))  # finite, as written
        if point.freq_hz in journal.done_freqs_hz:
            text = (
                f"{where}: duplicate point at {format_frequency(point.freq_hz, 12)} ignored "
                "(first one kept)"
            )
            logger.warning(text)
            journal.warnings.append(text)
            return
        if journal.index is not None:
            journal.index.add(offset, len(line), point.freq_hz, entry.get("budget"))
        else:
            journal.points.append(point)
            if entry.get("budget") is not None:
                journal.budgets.append(entry["budget"])
        journal.done_freqs_hz.add(point.freq_hz)
    elif kind == "calibration":
        journal.calibrations.append(entry["calibration"])
    else:
        raise ValueError(f"unknown journal entry kind {kind!r}")


_SKIP_CHUNK = 1 << 16


def _journal_lines(handle: BinaryIO, skip: bytes | None) -> Iterator[tuple[int, bytes | None]]:
    """Each line of ``handle`` with its newline, and its size in bytes; a line starting with
    ``skip`` is read past in pieces and given as ``None`` (a long sweep's calibration line is
    megabytes that a caller skipping it need never hold)."""
    while True:
        head = handle.readline(len(skip)) if skip else handle.readline()
        if not head:
            return
        if skip is None or head.endswith(b"\n") or len(head) < len(skip):
            yield len(head), head
        elif head == skip:
            size = len(head)
            while True:
                rest = handle.readline(_SKIP_CHUNK)
                size += len(rest)
                if not rest or rest.endswith(b"\n"):
                    break
            yield size, None
        else:
            line = head + handle.readline()
            yield len(line), line


def _read_journal(
    path: Path, *, calibrations: bool = True, index: JournalIndex | None = None
) -> _Journal:
    """Parse ``points.jsonl``. A torn last line is ignored with a warning, never raised.

    Every append ends in a newline, so only the unterminated final piece of the file can be
    torn; an unreadable line elsewhere is skipped with a warning and kept on disk.
    Read line by line: the file is never held whole in memory. ``calibrations=False`` skips
    the calibration lines this process wrote itself (the writer keeps those it saved). With an
    ``index`` the points are not kept: the index records where each kept point line lies
    (:mod:`noisebench.results.stored` reads them on demand).
    """
    journal = _Journal(index)
    if not path.exists():
        return journal
    offset = 0
    with open(path, "rb") as handle:
        skip = None if calibrations else _CALIBRATION_LINE
        for number, (size, piece) in enumerate(_journal_lines(handle, skip), start=1):
            start, offset = offset, offset + size
            if piece is None:  # a skipped line, passed over without being held
                continue
            last = not piece.endswith(b"\n")  # only the file's final piece lacks one
            piece = piece.rstrip(b"\n")
            if not piece.strip():
                continue
            where = f"{path.name} line {number}"
            try:
                _parse_entry(piece, where, journal, start)
            except (ValueError, KeyError, TypeError, ValidationError, RecursionError) as exc:
                if last:
                    text = (
                        f"{where}: incomplete last entry ({len(piece)} bytes) ignored; "
                        "the run was probably killed while writing it"
                    )
                else:
                    text = (
                        f"{where}: damaged entry skipped ({describe_damage(exc)}); the line is "
                        "kept in the file as it is"
                    )
                logger.warning(text)
                journal.warnings.append(text)
                if last:
                    journal.valid_bytes = start
                    return journal
                continue
            journal.needs_newline = last  # complete JSON whose newline never reached disk
    journal.valid_bytes = offset
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

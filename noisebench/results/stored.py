"""A finished run's points and budgets, read from its journal when they are asked for.

:meth:`noisebench.results.store.RunWriter.finish` indexes the journal (`points.jsonl`) instead
of loading it: for every point line kept (damaged and duplicate lines are left out exactly as
:func:`noisebench.results.journal._read_journal` leaves them out) the index holds the line's
byte offset and length, its frequency and its budget's frequency - 40 bytes per point. The
returned :class:`~noisebench.results.records.RunRecord` carries :class:`StoredPoints` and
:class:`StoredBudgets` over that index, sorted as ``results.json`` sorts them (by frequency,
stable), so writing the results files and reading the record cost memory independent of the
number of points. Each item is parsed when it is read (``PointResult`` validated and cleaned
as the journal reader does); the journal stays open for reading while the record lives, so
the record keeps working when the folder is moved or deleted (POSIX).
"""

from __future__ import annotations

import json
import math
import os
import threading
import weakref
from array import array
from collections.abc import Iterator
from pathlib import Path
from typing import Any, TypeVar, overload

import numpy as np

from noisebench.results.records import StoredSequence, _clean_point
from noisebench.science.point import PointResult

T = TypeVar("T")


class JournalIndex:
    """Where the kept point lines of a journal lie, in journal order."""

    def __init__(self) -> None:
        self.offsets = array("q")  # byte offset of each point line
        self.lengths = array("q")  # its length without the newline, bytes
        self.freqs_hz = array("d")  # the point's frequency
        self.budget_keys = array("d")  # its budget's ``freq_hz`` (inf: none given; nan: no budget)

    def add(self, offset: int, length: int, freq_hz: float, budget: Any) -> None:
        if budget is None:
            key = math.nan
        else:
            key = budget.get("freq_hz", math.inf) if isinstance(budget, dict) else math.inf
        self.budget_keys.append(key)  # first: a key that is no number adds no half entry
        self.offsets.append(offset)
        self.lengths.append(length)
        self.freqs_hz.append(freq_hz)


class _OpenJournal:
    """The journal open for reading (closed when the last sequence over it is dropped)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_BINARY", 0))
        self._fd = fd
        self._lock = threading.Lock()  # lseek + read where there is no pread
        weakref.finalize(self, os.close, fd)

    def read(self, offset: int, length: int) -> bytes:
        pieces = []
        while length > 0:
            if hasattr(os, "pread"):
                piece = os.pread(self._fd, length, offset)
            else:  # pragma: no cover - Windows
                with self._lock:
                    os.lseek(self._fd, offset, os.SEEK_SET)
                    piece = os.read(self._fd, length)
            if not piece:
                raise OSError(f"{self.path.name} is shorter than when it was indexed")
            pieces.append(piece)
            offset, length = offset + len(piece), length - len(piece)
        return b"".join(pieces)


class _Stored(StoredSequence[T]):
    """Items of chosen journal lines, in a fixed order."""

    def __init__(self, journal: _OpenJournal, offsets: np.ndarray, lengths: np.ndarray) -> None:
        self._journal = journal
        self._offsets = offsets
        self._lengths = lengths

    def __len__(self) -> int:
        return len(self._offsets)

    @overload
    def __getitem__(self, index: int) -> T: ...

    @overload
    def __getitem__(self, index: slice) -> list[T]: ...

    def __getitem__(self, index: int | slice) -> T | list[T]:
        if isinstance(index, slice):
            return [self._item(i) for i in range(*index.indices(len(self)))]
        i = int(index)
        if i < 0:
            i += len(self)
        if not 0 <= i < len(self):
            raise IndexError(f"index {index} out of range for {len(self)} items")
        return self._item(i)

    def __iter__(self) -> Iterator[T]:
        for i in range(len(self)):
            yield self._item(i)

    def __repr__(self) -> str:
        return f"{type(self).__name__}({len(self)} from {self._journal.path})"

    def _entry(self, i: int) -> dict[str, Any]:
        line = self._journal.read(int(self._offsets[i]), int(self._lengths[i]))
        entry: dict[str, Any] = json.loads(line.decode("utf-8"))
        return entry

    def _item(self, i: int) -> T:
        raise NotImplementedError


class StoredPoints(_Stored[PointResult]):
    """A run's points, sorted by frequency, read from its journal one at a time."""

    def _item(self, i: int) -> PointResult:
        return _clean_point(PointResult.model_validate(self._entry(i)["point"]))


class StoredBudgets(_Stored[dict[str, Any]]):
    """A run's budgets, sorted by their ``freq_hz``, read from its journal one at a time."""

    def _item(self, i: int) -> dict[str, Any]:
        budget: dict[str, Any] = self._entry(i)["budget"]
        return budget


def stored_views(path: Path, index: JournalIndex) -> tuple[StoredPoints, StoredBudgets]:
    """The points and budgets of an indexed journal, sorted as ``results.json`` holds them
    (by frequency; equal keys keep the journal's order)."""
    journal = _OpenJournal(path)
    offsets = np.frombuffer(index.offsets, dtype=np.int64) if index.offsets else np.zeros(0, int)
    lengths = np.frombuffer(index.lengths, dtype=np.int64) if index.lengths else np.zeros(0, int)
    freqs = np.frombuffer(index.freqs_hz, dtype=np.float64) if index.freqs_hz else np.zeros(0)
    keys = np.frombuffer(index.budget_keys, dtype=np.float64) if index.budget_keys else freqs
    order = np.argsort(freqs, kind="stable")
    with_budget = np.flatnonzero(~np.isnan(keys))
    budget_order = with_budget[np.argsort(keys[with_budget], kind="stable")]
    points = StoredPoints(journal, offsets[order].copy(), lengths[order].copy())
    budgets = StoredBudgets(journal, offsets[budget_order].copy(), lengths[budget_order].copy())
    return points, budgets

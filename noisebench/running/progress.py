"""Progress display of a run: points done, time left, current NF.

Two back ends behind one small interface: a live ``rich.progress`` bar when stderr is a
terminal (and ``rich`` is installed, and no CI variable is set), plain log lines otherwise, so
logs in CI and files stay clean. The sequencer only calls :meth:`RunProgress.start`,
:meth:`RunProgress.point_done` and :meth:`RunProgress.stop`.
"""

from __future__ import annotations

import logging
import os
import sys
import time
from typing import IO, TYPE_CHECKING, Protocol

from noisebench.science.point import PointResult

if TYPE_CHECKING:
    from rich.progress import TaskID

logger = logging.getLogger(__name__)


class RunProgress(Protocol):
    """What the sequencer reports while it runs."""

    def start(self, total_points: int, *, done_points: int = 0, label: str = "") -> None: ...

    def point_done(self, point: PointResult) -> None: ...

    def stop(self) -> None: ...


def format_freq(freq_hz: float) -> str:
    """Frequency with an SI prefix, e.g. ``1.25 GHz`` (``noisebench.units``)."""
    from noisebench.units import format_frequency

    return format_frequency(freq_hz)


def format_duration(seconds: float) -> str:
    """``75`` -> ``1 min 15 s``; ``3.2`` -> ``3.2 s``."""
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, secs = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {secs:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def describe_point(point: PointResult) -> str:
    """One-line description of a finished point."""
    text = f"{format_freq(point.freq_hz)}: NF {point.nf_db:.3f} dB ± {point.u_nf_db:.3f}"
    if point.gain_db is not None:
        text += f", gain {point.gain_db:.2f} dB"
    if point.flags:
        text += " [" + ",".join(flag.value for flag in point.flags) + "]"
    return text


class _Eta:
    """Remaining time from the mean wall time per point measured so far."""

    def __init__(self, total: int, done: int) -> None:
        self.total, self.done, self.new = total, done, 0
        self.t0 = time.monotonic()

    def advance(self) -> None:
        self.done += 1
        self.new += 1

    def remaining_s(self) -> float | None:
        if self.new == 0:
            return None
        per_point = (time.monotonic() - self.t0) / self.new
        return per_point * max(self.total - self.done, 0)


class LogProgress:
    """Plain log lines (one per point) through :mod:`logging`; clean in CI and in files."""

    def __init__(self, log: logging.Logger | None = None) -> None:
        self._log = log or logger
        self._eta: _Eta | None = None
        self._label = ""

    def start(self, total_points: int, *, done_points: int = 0, label: str = "") -> None:
        self._eta = _Eta(total_points, done_points)
        self._label = label
        already = f", {done_points} already done" if done_points else ""
        self._log.info(
            "%s%d points to measure%s",
            f"{label}: " if label else "",
            total_points - done_points,
            already,
        )

    def point_done(self, point: PointResult) -> None:
        if self._eta is None:
            self.start(1)
        assert self._eta is not None
        self._eta.advance()
        left = self._eta.remaining_s()
        self._log.info(
            "point %d/%d %s%s",
            self._eta.done,
            self._eta.total,
            describe_point(point),
            f", ~{format_duration(left)} left" if left is not None else "",
        )

    def stop(self) -> None:
        self._eta = None


class RichProgress:
    """A live ``rich.progress`` bar on a terminal: points, time left, the last NF."""

    def __init__(self, stream: IO[str] | None = None) -> None:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeRemainingColumn,
        )

        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TimeRemainingColumn(),
            TextColumn("{task.fields[last]}"),
            console=Console(file=stream or sys.stderr),
            transient=False,
        )
        self._task: TaskID | None = None

    def start(self, total_points: int, *, done_points: int = 0, label: str = "") -> None:
        self._progress.start()
        self._task = self._progress.add_task(
            label or "measuring", total=total_points, completed=done_points, last=""
        )

    def point_done(self, point: PointResult) -> None:
        if self._task is None:
            self.start(1)
        assert self._task is not None  # start() added the task
        self._progress.update(self._task, advance=1, last=describe_point(point))

    def stop(self) -> None:
        if self._task is not None:
            self._progress.stop()
            self._task = None


class NullProgress:
    """Reports nothing (library use and tests)."""

    def start(self, total_points: int, *, done_points: int = 0, label: str = "") -> None:
        return None

    def point_done(self, point: PointResult) -> None:
        return None

    def stop(self) -> None:
        return None


def _in_ci() -> bool:
    return any(os.environ.get(name) for name in ("CI", "GITHUB_ACTIONS", "NOISEBENCH_NO_LIVE"))


def make_progress(stream: IO[str] | None = None) -> RunProgress:
    """A live bar on an interactive terminal (rich installed, not CI), else log lines."""
    stream = stream or sys.stderr
    interactive = hasattr(stream, "isatty") and stream.isatty() and not _in_ci()
    if interactive:
        try:
            return RichProgress(stream)
        except ImportError:
            logger.debug("rich not installed: progress as log lines")
    return LogProgress()

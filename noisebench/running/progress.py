"""Progress display of a run: phases (calibration, DUT gain, measurement), steps and points
done, time left, current NF.

Two back ends behind one small interface: a live ``rich.progress`` bar per phase when stderr
is a terminal (and ``rich`` is installed, and no CI variable is set), plain log lines
otherwise, so logs in CI and files stay clean. The sequencer calls
:meth:`RunProgress.start` (with a way to get the forecast), :meth:`RunProgress.phase`,
:meth:`RunProgress.step_done`, :meth:`RunProgress.point_done` and :meth:`RunProgress.stop`;
:class:`Eta` turns the forecast and the timings so far into the time left.

Inside a phase the sequencer also reports its rounds (:meth:`RunProgress.round_start` with the
readings it plans and the units -- frequencies -- they serve, then
:meth:`RunProgress.reading_done` per reading): with sweep-level Y-factor blocks no point ends
before the end of a round, and :class:`RoundFill` moves the bar through the round instead.
"""

from __future__ import annotations

import logging
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import IO, TYPE_CHECKING, Protocol

from noisebench.science.point import PointResult

if TYPE_CHECKING:
    from rich.progress import TaskID

logger = logging.getLogger(__name__)


class RunProgress(Protocol):
    """What the sequencer reports while it runs: the run starts, each phase (calibration,
    DUT gain, measurement) starts with its size, steps of a phase end, points are stored."""

    def start(
        self,
        total_points: int,
        *,
        done_points: int = 0,
        label: str = "",
        forecast: ForecastSource | None = None,
    ) -> None: ...

    def phase(self, name: str, total: int) -> None: ...

    def step_done(self, count: int = 1) -> None: ...

    def point_done(self, point: PointResult) -> None: ...

    def round_start(self, readings: int, units: int) -> None: ...

    def reading_done(self, count: int = 1) -> None: ...

    def stop(self) -> None: ...


@dataclass(frozen=True)
class WorkForecast:
    """Forecast instrument time of what is left to do (``noisebench.running.forecast``):
    the phases in the order they run with their units (calibrated or measured frequencies)
    and seconds per unit, and the measurement's seconds per frequency."""

    units: dict[str, int]
    seconds_per_unit: dict[str, float]
    point_s: dict[float, float] = field(default_factory=dict)


#: computes the forecast when a display wants one (it costs about a second)
ForecastSource = Callable[[], "WorkForecast | None"]


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


CALIBRATION = "calibration"
DUT_GAIN = "DUT gain"
MEASUREMENT = "measurement"


class Eta:
    """Time left, from the forecast until real timings exist.

    Work is counted in forecast seconds of instrument time, each unit weighted by the
    forecast (a point with a 40 s time limit weighs more than one with 20 s). The wall time
    per forecast second is measured: from the current phase once it has finished a unit,
    before that from the earlier phases (so the calibration's timing scales the measurement's
    forecast); before anything is done it is 1: the first estimate is the forecast itself.
    Without a forecast each phase uses its own mean wall time per unit, and says nothing
    before its first unit (the calibration's time never inflates the measurement's
    estimate)."""

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.clock = clock
        self.forecast: WorkForecast | None = None
        self.phases: dict[str, list[float]] = {}  # name -> [total units, done units]
        self.order: list[str] = []
        self.current = ""
        self.done_freqs: set[float] = set()
        self.done_forecast_s = 0.0
        self.unforecast_s = 0.0
        self.phase_forecast_s = 0.0  # forecast seconds done in the current phase
        self.started = clock()
        self._phase_t0 = self.started

    def plan(self, forecast: WorkForecast | None) -> None:
        """Take the forecast and its phases (in the order they run)."""
        self.forecast = forecast
        self.started = self._phase_t0 = self.clock()  # computing the forecast is not run time
        if forecast is not None:
            self.phases = {name: [float(n), 0.0] for name, n in forecast.units.items()}
            self.order = list(forecast.units)

    def phase(self, name: str, total: int) -> None:
        now = self.clock()
        if self.current and not self._forecast_covers(self.current):
            self.unforecast_s += now - self._phase_t0  # e.g. the DUT gain: not in the scale
        self.phases.setdefault(name, [0.0, 0.0])[0] = float(total)
        if name not in self.order:
            self.order.append(name)
        self.current, self._phase_t0, self.phase_forecast_s = name, now, 0.0

    def _forecast_covers(self, name: str) -> bool:
        return self._unit_s(name) > 0 or (
            name == MEASUREMENT and self.forecast is not None and bool(self.forecast.point_s)
        )

    def advance(self, count: float = 1.0, freq_hz: float | None = None) -> None:
        if not self.current:
            self.phase(MEASUREMENT, int(count))
        self.phases[self.current][1] += count
        if freq_hz is not None:
            self.done_freqs.add(freq_hz)
        work = self._unit_s(self.current, freq_hz) * count
        self.done_forecast_s += work
        self.phase_forecast_s += work

    def _unit_s(self, name: str, freq_hz: float | None = None) -> float:
        if self.forecast is None:
            return 0.0
        if name == MEASUREMENT and freq_hz is not None and freq_hz in self.forecast.point_s:
            return self.forecast.point_s[freq_hz]
        return self.forecast.seconds_per_unit.get(name, 0.0)

    def forecast_left_s(self) -> float:
        """Forecast instrument seconds of the work not yet done."""
        start = self.order.index(self.current) if self.current in self.order else 0
        left = 0.0
        for name in self.order[start:]:
            total, done = self.phases[name]
            if name == MEASUREMENT and self.forecast is not None and self.forecast.point_s:
                left += sum(s for f, s in self.forecast.point_s.items() if f not in self.done_freqs)
            else:
                left += max(total - done, 0.0) * self._unit_s(name)
        return left

    def remaining_s(self) -> float | None:
        """Wall seconds left for this run, or None while nothing can be said."""
        now = self.clock()
        if self.forecast is not None:
            scale = 1.0
            if self.phase_forecast_s > 0:  # the current phase's own pace, once it has one
                scale = (now - self._phase_t0) / self.phase_forecast_s
            elif self.done_forecast_s > 0:
                busy = now - self.started - self.unforecast_s
                if self.current and not self._forecast_covers(self.current):
                    busy -= now - self._phase_t0
                scale = busy / self.done_forecast_s
            return self.forecast_left_s() * scale
        if not self.current:
            return None
        total, done = self.phases[self.current]
        if done <= 0:
            return None
        return (now - self._phase_t0) / done * max(total - done, 0.0)


#: share of the room left to a round's units that the round fills while it reads; the rest
#: is filled when its units finish (a round planned as the last may be followed by another,
#: so the bar never runs ahead of the units not finished: a display choice, common practice)
ROUND_SHARE = 0.5


class RoundFill:
    """How far a phase's bar is: units finished plus the readings of the current round.

    ``shown`` (in the phase's units) never goes back: a round starts where the bar is and fills
    :data:`ROUND_SHARE` of the room up to ``finished + units`` in proportion to its readings
    done; finished units lift the bar to at least ``finished``. The bar reaches its total when
    every unit has finished, and never shows a unit done before it is (the room is shared by
    the round's own units)."""

    def __init__(self, finished: int = 0, total: int | None = None) -> None:
        self.finished = finished
        self.total = total
        self.shown = float(finished)
        self.round = 0
        self.planned = 0
        self.read = 0
        self._base = self.shown
        self._span = 0.0

    def round_start(self, readings: int, units: int) -> None:
        self.round += 1
        self.planned, self.read = max(readings, 0), 0
        self._base = self.shown
        ceiling = self.finished + units
        if self.total is not None:
            ceiling = min(ceiling, self.total)
        room = max(ceiling - self._base, 0.0)
        self._span = ROUND_SHARE * room

    def reading_done(self, count: int = 1) -> None:
        self.read += count
        if self.planned > 0:
            part = min(self.read / self.planned, 1.0)
            self.shown = max(self.shown, self._base + self._span * part)

    def finish(self, count: int = 1) -> None:
        self.finished += count
        self.shown = max(self.shown, float(self.finished))

    def round_text(self) -> str:
        if not self.round:
            return ""
        return f"round {self.round}: {min(self.read, self.planned)}/{self.planned} readings"


def _forecast_text(eta: Eta) -> str:
    left = eta.remaining_s()
    return f", ~{format_duration(left)} left" if left is not None else ""


class LogProgress:
    """Plain log lines (one per step and point) through :mod:`logging`; clean in CI and files."""

    def __init__(
        self, log: logging.Logger | None = None, *, clock: Callable[[], float] = time.monotonic
    ) -> None:
        self._log = log or logger
        self._clock = clock
        self._eta: Eta | None = None
        self._label = ""
        self._total = 0
        self._done = 0

    def start(
        self,
        total_points: int,
        *,
        done_points: int = 0,
        label: str = "",
        forecast: ForecastSource | None = None,
    ) -> None:
        self._eta = Eta(self._clock)
        self._eta.plan(forecast() if forecast else None)
        self._label, self._total, self._done = label, total_points, done_points
        already = f", {done_points} already done" if done_points else ""
        self._log.info(
            "%s%d points to measure%s",
            f"{label}: " if label else "",
            total_points - done_points,
            already,
        )

    def _ensure(self) -> Eta:
        if self._eta is None:
            self.start(1)
        assert self._eta is not None
        return self._eta

    def phase(self, name: str, total: int) -> None:
        eta = self._ensure()
        eta.phase(name, total)
        self._log.info("%s: %d to do%s", name, total, _forecast_text(eta))

    def step_done(self, count: int = 1) -> None:
        eta = self._ensure()
        eta.advance(count)
        total, done = eta.phases[eta.current]
        if eta.current == MEASUREMENT:
            self._done += count
        self._log.info("%s %d/%d%s", eta.current, done, total, _forecast_text(eta))

    def point_done(self, point: PointResult) -> None:
        eta = self._ensure()
        if eta.current != MEASUREMENT:
            eta.phase(MEASUREMENT, self._total - self._done)
        eta.advance(1, point.freq_hz)
        self._done += 1
        self._log.info(
            "point %d/%d %s%s", self._done, self._total, describe_point(point), _forecast_text(eta)
        )

    def round_start(self, readings: int, units: int) -> None:
        eta = self._ensure()
        self._log.debug("%s round: %d readings for %d units", eta.current, readings, units)

    def reading_done(self, count: int = 1) -> None:
        return None  # one line per reading would drown the log; the points' lines stay

    def stop(self) -> None:
        self._eta = None


class RichProgress:
    """A live ``rich.progress`` bar per phase on a terminal: steps, time left, the last NF."""

    def __init__(
        self, stream: IO[str] | None = None, *, clock: Callable[[], float] = time.monotonic
    ) -> None:
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TextColumn

        self._eta = Eta(clock)
        self._clock = clock
        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            TextColumn("{task.fields[count]}"),
            TextColumn("{task.fields[round]}"),
            TextColumn("{task.fields[left]}"),
            TextColumn("{task.fields[last]}"),
            console=Console(file=stream or sys.stderr),
            transient=False,
        )
        self._task: TaskID | None = None
        self._fill = RoundFill()
        self._size = 0
        self._label = ""
        self._total = 0
        self._done = 0
        self._running = False

    def _left(self) -> str:
        left = self._eta.remaining_s()
        return f"~{format_duration(left)} left" if left is not None else ""

    def start(
        self,
        total_points: int,
        *,
        done_points: int = 0,
        label: str = "",
        forecast: ForecastSource | None = None,
    ) -> None:
        self._eta = Eta(self._clock)
        self._eta.plan(forecast() if forecast else None)
        self._label, self._total, self._done = label, total_points, done_points
        self._progress.start()
        self._running = True
        self._task = None

    def phase(self, name: str, total: int) -> None:
        if not self._running:
            self.start(total)
        self._eta.phase(name, total)
        completed = self._done if name == MEASUREMENT else 0
        size = self._done + total if name == MEASUREMENT else total
        title = f"{self._label} {name}".strip()
        self._fill, self._size = RoundFill(completed, size), size
        counts = self._counts()
        self._task = self._progress.add_task(
            title,
            total=size,
            completed=completed,
            last="",
            left=self._left(),
            count=counts["count"],
            round=counts["round"],
        )

    def _counts(self) -> dict[str, str]:
        unit = "points" if self._eta.current == MEASUREMENT else "done"
        count = f"{self._fill.finished}/{self._size} {unit}"
        return {"count": count, "round": self._fill.round_text()}

    def _show(self, last: str | None = None) -> None:
        assert self._task is not None  # phase() added the task
        counts = self._counts()
        self._progress.update(
            self._task,
            completed=self._fill.shown,
            left=self._left(),
            count=counts["count"],
            round=counts["round"],
        )
        if last is not None:
            self._progress.update(self._task, last=last)

    def step_done(self, count: int = 1) -> None:
        if self._task is None:
            self.phase(MEASUREMENT, self._total - self._done)
        self._eta.advance(count)
        if self._eta.current == MEASUREMENT:
            self._done += count
        self._fill.finish(count)
        self._show()

    def point_done(self, point: PointResult) -> None:
        if self._task is None or self._eta.current != MEASUREMENT:
            self.phase(MEASUREMENT, self._total - self._done)
        self._eta.advance(1, point.freq_hz)
        self._done += 1
        self._fill.finish(1)
        self._show(last=describe_point(point))

    def round_start(self, readings: int, units: int) -> None:
        if self._task is None:
            self.phase(MEASUREMENT, self._total - self._done)
        self._fill.round_start(readings, units)
        self._show()

    def reading_done(self, count: int = 1) -> None:
        if self._task is None:
            return
        self._fill.reading_done(count)
        self._show()

    @property
    def shown(self) -> tuple[float, int, int]:
        """What the bar shows now: (completed, units finished, total) of the current phase."""
        return self._fill.shown, self._fill.finished, self._size

    def stop(self) -> None:
        if self._running:
            self._progress.stop()
            self._running = False
            self._task = None


class NullProgress:
    """Reports nothing (library use and tests); never asks for the forecast."""

    def start(
        self,
        total_points: int,
        *,
        done_points: int = 0,
        label: str = "",
        forecast: ForecastSource | None = None,
    ) -> None:
        return None

    def phase(self, name: str, total: int) -> None:
        return None

    def step_done(self, count: int = 1) -> None:
        return None

    def point_done(self, point: PointResult) -> None:
        return None

    def round_start(self, readings: int, units: int) -> None:
        return None

    def reading_done(self, count: int = 1) -> None:
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

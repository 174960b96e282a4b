"""The progress display: calibration as its own phase, and a time-left estimate that rests on
the plan's forecast until real timings exist (fake clocks; no timing races)."""

from __future__ import annotations

import io

import pytest
from _sequencer_helpers import ideal_session, make_plan

from noisebench.running.progress import (
    CALIBRATION,
    DUT_GAIN,
    MEASUREMENT,
    ROUND_SHARE,
    Eta,
    LogProgress,
    RichProgress,
    RoundFill,
    WorkForecast,
)
from noisebench.running.sequencer import Sequencer


class FakeClock:
    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


FORECAST = WorkForecast(
    units={CALIBRATION: 4, DUT_GAIN: 1, MEASUREMENT: 4},
    seconds_per_unit={CALIBRATION: 2.0},
    point_s={1e9: 5.0, 2e9: 5.0, 3e9: 10.0, 4e9: 10.0},
)


def test_first_estimate_is_the_forecast_then_scaled_by_real_timings():
    clock = FakeClock()
    eta = Eta(clock)
    eta.plan(FORECAST)
    assert eta.remaining_s() == pytest.approx(4 * 2.0 + 30.0)  # nothing done: the forecast
    eta.phase(CALIBRATION, 4)
    clock.t += 8.0  # two calibrated frequencies took twice their forecast
    eta.advance(2)
    assert eta.remaining_s() == pytest.approx((2 * 2.0 + 30.0) * 2.0)
    clock.t += 8.0
    eta.advance(2)
    eta.phase(DUT_GAIN, 1)
    clock.t += 50.0  # the DUT gain has no forecast: its time does not change the scale
    assert eta.remaining_s() == pytest.approx(30.0 * 2.0)
    eta.advance(1)
    eta.phase(MEASUREMENT, 4)
    assert eta.remaining_s() == pytest.approx(60.0)  # what a first point would be told
    clock.t += 20.0  # the 10 s point, at the same 2x
    eta.advance(1, 3e9)
    assert eta.remaining_s() == pytest.approx((5.0 + 5.0 + 10.0) * 2.0)
    # the old estimate (mean wall time per point since the start, calibration included)
    # would have said 86 s x 3 = 258 s here, 6.5x the 40 s left


def test_without_a_forecast_each_phase_times_itself():
    clock = FakeClock()
    eta = Eta(clock)
    eta.plan(None)
    eta.phase(CALIBRATION, 10)
    assert eta.remaining_s() is None
    clock.t += 30.0
    eta.advance(5)
    assert eta.remaining_s() == pytest.approx(30.0)  # this phase only: 6 s per unit
    clock.t += 30.0
    eta.advance(5)
    eta.phase(MEASUREMENT, 4)
    assert eta.remaining_s() is None  # the calibration's 60 s never inflate the points
    clock.t += 2.0
    eta.advance(1, 1e9)
    assert eta.remaining_s() == pytest.approx(6.0)


class Recorder:
    """A progress display that writes down what the sequencer told it."""

    def __init__(self) -> None:
        self.events: list[tuple] = []
        self.forecast: WorkForecast | None = None

    def start(self, total_points, *, done_points=0, label="", forecast=None):
        self.forecast = forecast() if forecast else None
        self.events.append(("start", total_points, done_points))

    def phase(self, name, total):
        self.events.append(("phase", name, total))

    def step_done(self, count=1):
        self.events.append(("step", count))

    def point_done(self, point):
        self.events.append(("point", point.freq_hz))

    def round_start(self, readings, units):
        self.events.append(("round", readings, units))

    def reading_done(self, count=1):
        self.events.append(("reading", count))

    def stop(self):
        self.events.append(("stop",))


@pytest.mark.parametrize("method", ["y_factor", "gain"])
def test_calibration_is_its_own_phase_before_the_points(tmp_path, method):
    freqs = [1e9, 1.5e9, 2e9]
    plan = make_plan(method, freqs_hz=freqs)
    recorder = Recorder()
    Sequencer(plan, ideal_session(plan), progress=recorder).run(tmp_path / "run")
    events = recorder.events
    assert events[0] == ("start", 3, 0) and events[-1] == ("stop",)
    assert events[1] == ("phase", CALIBRATION, 3)
    measuring = events.index(("phase", MEASUREMENT, 3))
    steps = [e for e in events[2:measuring] if e[0] == "step"]
    phases = [e[1] for e in events if e[0] == "phase"]
    assert sum(e[1] for e in steps) == 3 + (DUT_GAIN in phases)  # + one DUT-gain step
    assert [e for e in events[:measuring] if e[0] == "point"] == []  # no point during it
    assert [e[1] for e in events[measuring:] if e[0] == "point"] == freqs
    # the first estimate's source: the plan's forecast of the points still to do
    forecast = recorder.forecast
    assert forecast is not None and sorted(forecast.point_s) == freqs
    assert forecast.units[CALIBRATION] == 3 and forecast.seconds_per_unit[CALIBRATION] > 0


def test_log_lines_show_the_phases_and_time_left(tmp_path, caplog):
    plan = make_plan("gain", freqs_hz=[1e9, 2e9])
    with caplog.at_level("INFO", logger="noisebench.running.progress"):
        Sequencer(plan, ideal_session(plan), progress=LogProgress()).run(tmp_path / "run")
    lines = [r.getMessage() for r in caplog.records if r.name == "noisebench.running.progress"]
    assert lines[0] == "gain TEST-LNA: 2 points to measure"
    assert lines[1].startswith("calibration: 2 to do, ~") and lines[1].endswith(" left")
    points = [x for x in lines if x.startswith("point ")]
    assert points[0].startswith("point 1/2 1 GHz: NF ") and "left" in points[0]
    assert points[1].startswith("point 2/2 2 GHz: NF ") and "gain 25.00 dB" in points[1]


def test_round_fill_moves_through_a_round_and_never_back():
    # fake events: 4 points in a sweep-level round of 8 readings, a second round of 8 for the
    # two that missed their target, then the last two finish
    fill = RoundFill(0, 4)
    shown = [fill.shown]
    fill.round_start(8, 4)
    for _ in range(8):
        fill.reading_done()
        shown.append(fill.shown)
    assert shown[1:] == sorted(shown[1:]) and len(set(shown)) == 9  # each reading moves it
    assert shown[-1] == pytest.approx(ROUND_SHARE * 4)  # a share of the room, no point yet
    fill.finish(2)
    assert fill.shown == pytest.approx(2.0)
    fill.round_start(8, 2)
    for _ in range(8):
        before = fill.shown
        fill.reading_done()
        assert before < fill.shown < 4  # never a point shown done before it is
    fill.finish(2)
    assert (fill.shown, fill.finished) == (4.0, 4)
    assert fill.round_text() == "round 2: 8/8 readings"


class _Watched(RichProgress):
    """The live bar on a string, writing down what it shows after every event."""

    def __init__(self, clock: FakeClock) -> None:
        super().__init__(io.StringIO(), clock=clock)
        self.seen: list[tuple[str, str, float, int, int]] = []

    def _show(self, last: str | None = None) -> None:
        super()._show(last)
        self.seen.append((self._eta.current, self._fill.round_text(), *self.shown))


def test_sweep_level_rounds_move_the_bar_before_any_point_ends(tmp_path):
    freqs = (1.0e9, 1.5e9, 2.0e9, 2.5e9, 3.0e9, 3.5e9)
    plan = make_plan("y_factor", freqs_hz=freqs, target=0.08, switching={"mode": "per_sweep"})
    progress = _Watched(FakeClock())  # a clock that never moves: no timing in the test
    Sequencer(plan, ideal_session(plan), progress=progress).run(tmp_path / "run")
    measuring = [s for s in progress.seen if s[0] == MEASUREMENT]
    shown = [s[2] for s in measuring]
    assert shown == sorted(shown)  # never goes back
    assert measuring[-1][2:] == (6.0, 6, 6)  # ends at N/N
    # the sweep-level rounds: the bar moves while no point has finished yet
    moving = [s for s in measuring if s[3] == 0 and s[2] > 0]
    assert len(moving) >= 4 * (len(freqs) - 1) - 1
    # the bar's fraction is never ahead of the points that can still finish in a round
    assert all(s[2] <= s[4] for s in measuring)
    rounds = {s[1].split(":")[0] for s in measuring if s[1]}
    assert len(rounds) >= 2  # the adaptive averaging took more than one round

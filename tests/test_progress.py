"""The progress display: calibration as its own phase, and a time-left estimate that rests on
the plan's forecast until real timings exist (fake clocks; no timing races)."""

from __future__ import annotations

import pytest
from _sequencer_helpers import ideal_session, make_plan

from noisebench.running.progress import (
    CALIBRATION,
    DUT_GAIN,
    MEASUREMENT,
    Eta,
    LogProgress,
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

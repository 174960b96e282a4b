"""Drift between the calibration and the measurement: what cannot be seen in the readings is
bounded by a calibration age limit (``[calibration] max_age_s``) that is checked when each
group is measured, on the bench's own clock when it keeps one (a simulated bench: the decision
repeats exactly), and a point measured on an expired calibration is refused with the fix.

Behaviour tests only: no outside value is checked here; an age limit on a calibration is
common practice, its length is the plan's."""

from __future__ import annotations

from datetime import timedelta

from _sequencer_helpers import ideal_session, make_plan

from noisebench.running.calibration import CalibrationEntry, CalibrationKind
from noisebench.running.sequencer import Sequencer

FREQS = (1e9, 2e9, 3e9, 4e9)


def test_a_calibration_older_than_max_age_at_measurement_is_refused_with_the_fix(tmp_path):
    # per group: every group is calibrated first, then measured one after the other; with an
    # age limit of 1 simulated second (the run takes 2.5) calibrations expire on the way
    plan = make_plan(
        "y_factor",
        freqs_hz=FREQS,
        switching={"mode": "per_group"},
        calibration={"max_age_s": 1.0},
    )
    session = ideal_session(plan, seed=2)
    record = Sequencer(plan, session).run(tmp_path / "run")
    skipped = record.info.notes.get("skipped_points", [])
    measured = [p.freq_hz for p in record.points]
    assert skipped, measured
    assert len(measured) + len(skipped) == len(FREQS)
    for s in skipped:
        assert s["stage"] == "measurement"
        assert "beyond calibration.max_age_s = 1 s" in s["reason"]
        assert "--resume" in s["reason"]
    # checked on the simulated clock (the wall clock of this fast run would never expire it)
    assert session.instrument_time_s() > 1.0


def test_age_counts_the_bench_clock_of_this_session_only():
    from noisebench.bench.acquisition import AcquisitionSettings
    from noisebench.science.density import NoiseDensity

    d = NoiseDensity(freq_hz=1e9, density_w_per_hz=1e-20, u_density_w_per_hz=1e-22)
    entry = CalibrationEntry(
        kind=CalibrationKind.FLOOR,
        settings=AcquisitionSettings(
            center_hz=1e9,
            span_hz=0.0,
            rbw_hz=1e6,
            points=1,
            detector="rms",
            averaging_scale="power",
            averages=1,
        ),
        freqs_hz=[1e9],
        densities={"floor": [d]},
        measured_at_clock=("bench-a", 100.0),
    )
    later = entry.measured_at + timedelta(seconds=5)
    # the same clock: its time counts (simulated hours age a calibration by hours)
    assert entry.age_s(later, clock=("bench-a", 7300.0)) == 7200.0
    # another session's clock (a new simulated bench starts again at 0): wall time
    assert entry.age_s(later, clock=("bench-b", 7300.0)) == 5.0
    assert entry.age_s(later) == 5.0

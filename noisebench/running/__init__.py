"""Running a measurement: plans, sequencer, calibration, safety checks, forecast, progress."""

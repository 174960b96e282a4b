"""First time-left estimate of a run against the time the run really took (wall clock).

Runs the demo's two plans (56 points, simulated bench in process) with a progress display
that records every estimate, then prints, per method, estimate / actual time left for

- naive baseline: the old display's first estimate, the mean wall time per finished point
  since the run began (calibration included) times the points left, after the first point;
- forecast: the new display's estimates (``running/progress.Eta``): at the start (the
  forecast's instrument time alone), after the first calibrated frequency (scaled by real
  timings), at the start of the measurement and after the first point.

A ratio of 1 is a perfect estimate. Usage: ``python scripts/bench_progress_eta.py [points]``.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

from noisebench.frontends.demo import fresh_run_folder, write_demo_files
from noisebench.running.plan import load_plan
from noisebench.running.progress import MEASUREMENT, Eta
from noisebench.running.sequencer import run_plan


class Recording:
    def __init__(self) -> None:
        self.eta = Eta()
        self.log: list[tuple[str, float, float | None]] = []  # (event, t, estimate)
        self.total = 0
        self.points = 0
        self.t0 = 0.0

    def _note(self, what: str) -> None:
        self.log.append((what, time.monotonic(), self.eta.remaining_s()))

    def start(self, total_points, *, done_points=0, label="", forecast=None):
        self.eta = Eta()
        self.eta.plan(forecast() if forecast else None)
        self.total, self.t0 = total_points, time.monotonic()
        self._note("start")

    def phase(self, name, total):
        self.eta.phase(name, total)
        self._note(f"phase {name}")

    def step_done(self, count=1):
        self.eta.advance(count)
        self._note(f"step {self.eta.current}")

    def point_done(self, point):
        if self.eta.current != MEASUREMENT:
            self.eta.phase(MEASUREMENT, self.total)
        self.eta.advance(1, point.freq_hz)
        self.points += 1
        self._note("point")

    def round_start(self, readings, units):
        pass

    def reading_done(self, count=1):
        pass

    def stop(self):
        self.log.append(("stop", time.monotonic(), 0.0))


def main(points: int = 56) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        plans = write_demo_files(Path(tmp), points=points, seed=1)
        for method, path in plans.items():
            rec = Recording()
            run_plan(load_plan(path), folder=fresh_run_folder(Path(tmp), method), progress=rec)
            end = rec.log[-1][1]

            def ratio(
                index: int, estimate: float | None, rec: Recording = rec, end: float = end
            ) -> str:
                left = end - rec.log[index][1]
                return "-" if estimate is None or left <= 0 else f"{estimate / left:.2f}"

            first_point = next(i for i, e in enumerate(rec.log) if e[0] == "point")
            t_point = rec.log[first_point][1]
            naive = (t_point - rec.t0) * (rec.total - 1)
            first_step = next(i for i, e in enumerate(rec.log) if e[0].startswith("step"))
            measuring = next(i for i, e in enumerate(rec.log) if e[0] == f"phase {MEASUREMENT}")
            print(
                f"{method:>9}: run {end - rec.t0:.1f} s wall; estimate / actual time left: "
                f"naive after point 1 {ratio(first_point, naive)}; "
                f"forecast at start {ratio(0, rec.log[0][2])}, "
                f"after 1st calibration step {ratio(first_step, rec.log[first_step][2])}, "
                f"at measurement start {ratio(measuring, rec.log[measuring][2])}, "
                f"after point 1 {ratio(first_point, rec.log[first_point][2])}"
            )


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 56)

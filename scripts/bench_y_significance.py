"""The Y-factor significance rule (``methods/_common.check_y_significant``) over many seeds.

Runs a 3-point Y-factor sweep on the simulated bench per seed and counts measured and refused
points, and the looks the rule refused on the way (the sequencer then averages on):

- ``weak``: a live source and a DUT with 0 dB gain and a 20 dB noise figure, read from one
  average on (span 2 MHz, RBW 1 MHz): many first looks are within 4 u(Y) of Y = 1. No point
  may be refused (a live source averages on until its Y is significant).
- ``dead``: the source never switches (``demo-lna-dead-source``'s fault). Every point must be
  refused; a number would need (Y - 1)/u(Y) >= 4 by chance, at most 3.2e-5 per look.

Measured in the run that landed the rule (2 cores shared):
seeds 1-100:  weak 300 of 300 points measured, 0 refused, 352 refused looks averaged on (14 s);
              dead 0 of 300 points measured, 300 refused (11 s).
seeds 1-1000: weak 3000 of 3000 measured, 0 refused, 3425 refused looks averaged on (508 s);
              dead 0 of 3000 measured, 3000 refused (274 s).

Run:  python scripts/bench_y_significance.py [seeds]
"""

from __future__ import annotations

import logging
import sys
import tempfile
import time
from pathlib import Path

from noisebench.bench.registry import simulated_session
from noisebench.errors import YNotSignificantError
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.science.methods import yfactor
from noisebench.sims.bench import SimulatedBench

FREQS = [4e9, 5e9, 6e9]
WEAK_DUT = {"dut__gain_db": [0.0] * 14, "dut__nf_db": [20.0] * 14}


def _plan():
    return parse_plan(
        {
            "method": "y_factor",
            "dut": {"id": "WEAK-1"},
            "bench": {"analyzer": {"resource": "sim://demo-lna?seed=1", "compression_dbm": -3.0}},
            "acquisition": {
                "attenuation_db": 0,
                "target_u_nf_db": 0.5,
                "time_limit_s": 20,
                "min_averages": 1,
                "span_hz": 2e6,
                "rbw_hz": 1e6,
            },
            "sweep": {"freqs_hz": FREQS},
            "expect": {"dut_gain_db": 20.0},
        }
    )


def run(case: str, seeds: int) -> tuple[int, int, int, float]:
    """(points measured, points refused, refused looks, seconds) over ``seeds`` runs."""
    looks = [0]
    original = yfactor.check_y_significant

    def counting(*args, **kwargs):
        try:
            original(*args, **kwargs)
        except YNotSignificantError:
            looks[0] += 1
            raise

    yfactor.check_y_significant = counting  # type: ignore[assignment]
    measured = refused = 0
    t0 = time.perf_counter()
    try:
        for seed in range(1, seeds + 1):
            if case == "weak":
                sim = SimulatedBench.from_scenario("demo-lna", seed=seed, ideal=True, **WEAK_DUT)
            else:
                sim = SimulatedBench.from_scenario("demo-lna-dead-source", seed=seed, ideal=True)
            plan = _plan()
            with tempfile.TemporaryDirectory() as folder:
                record = Sequencer(plan, simulated_session(sim, plan.bench)).run(Path(folder))
            measured += len(record.points)
            refused += len(record.info.notes.get("skipped_points", []))
    finally:
        yfactor.check_y_significant = original  # type: ignore[assignment]
    return measured, refused, looks[0], time.perf_counter() - t0


def main() -> None:
    logging.disable(logging.WARNING)
    seeds = int(sys.argv[1]) if len(sys.argv) > 1 else 100
    for case in ("weak", "dead"):
        measured, refused, looks, seconds = run(case, seeds)
        print(
            f"{case}: {seeds} seeds, {measured} of {measured + refused} points measured, "
            f"{refused} refused, {looks} refused looks ({seconds:.0f} s)"
        )


if __name__ == "__main__":
    main()

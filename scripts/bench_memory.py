"""Peak memory of a long sweep on the simulated bench (prints what one run measured).

    python scripts/bench_memory.py [--points 1001 10001] [--method gain y_factor]

Each method and size runs in a fresh child process (both methods unless ``--method`` names
one: the gain method with a constant gain and a 5 s time limit per point, the Y-factor method
at 0 dB attenuation with 20 s, which its calibration needs for a usable Y at this RBW; 1-2 GHz,
points shared by traces up to 20 MHz wide, target 0.3 dB, no plots or report; the
calibration never ages out, so no point is skipped for a stale floor: with the default hour,
a 1 001-point sweep's first groups outlived their floor calibration and 28 % of the points
were skipped; the demo's spur at 1.8 GHz still refuses one group of 200 at 10 001 points
and groups near it in a Y-factor sweep, and growth is counted per point measured), which
reports its peak resident set size (``resource.getrusage``, kilobytes on Linux) before and
after the run. The script prints, per method, the peak per size, the growth of the run's own
memory from the smallest to the largest size, and that growth per added point next to the
flat-memory target with their ratio: flat memory means the growth per point stays far below
what keeping every trace would cost.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time

CHILD = r"""
import json, resource, sys, tempfile, time
from pathlib import Path
from noisebench.bench.registry import simulated_session
from noisebench.running.plan import parse_plan
from noisebench.results.store import RunWriter
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

n, method = int(sys.argv[1]), sys.argv[2]
plan = parse_plan({
    "method": method,
    "bench": {"analyzer": {"resource": "sim://demo-lna", "compression_dbm": 30.0,
                           "max_input_dbm": 40.0}},
    "acquisition": {"rbw_hz": 30e3, "span_hz": 60e3, "target_u_nf_db": 0.3,
                    "max_trace_span_hz": 20e6, "min_band_fill": 0.01,
                    **({"time_limit_s": 5} if method == "gain" else
                       {"time_limit_s": 20, "attenuation_db": 0})},
    "sweep": {"segments": [{"start_hz": 1e9, "stop_hz": 2e9, "points": n}]},
    **({"gain": {"source": "constant", "value_db": 20.0}} if method == "gain" else {}),
    "expect": {"dut_gain_db": 20.0},
    "calibration": {"max_age_s": 1e9},  # no point skipped for a stale floor
    "output": {"plots": False, "report": False},
})
sim = SimulatedBench.from_scenario("demo-lna", seed=1)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
marks = {}
finish = RunWriter.finish

def timed_finish(self, *args, **kwargs):  # the peak while measuring, before the files
    marks["measured_kb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    marks["journal_bytes"] = (self.folder / "points.jsonl").stat().st_size
    return finish(self, *args, **kwargs)

RunWriter.finish = timed_finish
t0 = time.perf_counter()
with tempfile.TemporaryDirectory() as tmp:
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(Path(tmp) / "run")
    points = len(record.points)
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"points": points, "before_kb": before, "peak_kb": after,
                  "seconds": time.perf_counter() - t0, **marks}))
"""

TARGET_KB_PER_POINT = 1.0
"""Flat memory: the run's peak grows by at most 1 kB per added point (a point's own journal
line is about 2.3 kB and its share of the calibration about 1 kB; holding either per point
is not flat)."""


def _measure(method: str, sizes: list[int]) -> int:
    rows = []
    print(f"{method}:")
    for n in sizes:
        t0 = time.perf_counter()
        out = subprocess.run(
            [sys.executable, "-c", CHILD, str(n), method],
            capture_output=True,
            text=True,
            check=False,
        )
        if out.returncode != 0:
            print(out.stderr[-2000:])
            return 1
        row = json.loads(out.stdout.strip().splitlines()[-1])
        if not row["points"]:
            print(f"  {n} points requested, none measured: the plan does not fit the bench")
            return 1
        rows.append(row)
        print(
            f"  {n:>6} points requested, {row['points']} measured in {row['seconds']:.1f} s "
            f"({time.perf_counter() - t0:.1f} s with start-up): peak RSS "
            f"{row['peak_kb'] / 1024:.1f} MiB (after imports {row['before_kb'] / 1024:.1f} MiB)"
        )
    first, last = rows[0], rows[-1]
    run_first = first["peak_kb"] - first["before_kb"]
    run_last = last["peak_kb"] - last["before_kb"]
    added = max(last["points"] - first["points"], 1)
    per_point = (run_last - run_first) / added
    measuring = (
        (last["measured_kb"] - last["before_kb"]) - (first["measured_kb"] - first["before_kb"])
    ) / added
    journal = last["journal_bytes"] / 1024 / last["points"]
    print(
        f"  run memory (peak minus after imports): {run_first / 1024:.1f} MiB at "
        f"{first['points']} points, {run_last / 1024:.1f} MiB at {last['points']} points: "
        f"{per_point:.2f} kB per added point (peak RSS ratio "
        f"{last['peak_kb'] / first['peak_kb']:.2f}x for {last['points'] / first['points']:.1f}x "
        f"the points)"
    )
    print(
        f"  while measuring (peak before results.json is written): {measuring:.2f} kB per "
        f"added point; the journal holds {journal:.2f} kB per point"
    )
    verdict = "met" if per_point <= TARGET_KB_PER_POINT else "NOT met"
    print(
        f"  {method} growth per added point: {per_point:.2f} kB = "
        f"{per_point / TARGET_KB_PER_POINT:.1f}x the flat-memory target of "
        f"{TARGET_KB_PER_POINT:g} kB ({verdict})"
    )
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, nargs="+", default=[1001, 10001])
    parser.add_argument(
        "--method",
        nargs="+",
        choices=["gain", "y_factor"],
        default=["gain", "y_factor"],
        help="y_factor: the sweep-level hot/cold schedule (its readings span the sweep)",
    )
    args = parser.parse_args(argv)
    for method in args.method:
        if _measure(method, args.points):
            return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())

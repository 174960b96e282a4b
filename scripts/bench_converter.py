"""Accuracy of converter (mixer / downconverter) measurements on the simulated bench.

Prints, from one run on this machine, for each sweep mode (fixed LO, fixed IF, explicit
triples) and each method (Y-factor with the analyzer calibrated at the IF; gain method with the
conversion gain from a file), through the whole sequencer:

- bias (mean error against the simulator's truth), scatter (standard deviation of the errors)
  against the stated statistical uncertainty (RMS of u_nf_db), and coverage: how often the
  truth lies within 1 and 2 stated standard uncertainties (68.3 % and 95.4 % expected);
- for both the SSB and the DSB figure (the image response is stated from a table of the
  simulator's true image rejection, so the SSB/DSB split is exact and only noise remains);
- the special cases: a converter with equal responses (SSB - DSB expected 3.01 dB) and one
  with no image response (expected 0 dB), measured SSB - DSB with its scatter;
- the conversion gain of the README's example plan (fixed IF, one IF calibration shared by
  every point) on the ideal and on the full demo bench: bias, the run-to-run scatter of the
  per-run mean error (the shared calibration) against the within-run scatter, and coverage of
  the statistical ``u_gain_db`` and of ``u_gain_db_with_enr`` (ENR at RF, image and IF added).

The bench is ideal (no ENR calibration error, no mismatch, no level error, cables without
loss, no compression), so the stated uncertainty is the whole uncertainty and coverage tests it.
The truth is computed by the simulator from the multiple-response definition
(``ConverterModel.ssb_dsb_truth``), independently of the methods.

Usage: ``python scripts/bench_converter.py [--seeds N] [--quick]``.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from noisebench.bench.registry import simulated_session
from noisebench.running.plan import load_plan, parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

LO_DBM = 10.0
IDEAL = {
    "input_cable__loss_db": [0.0],
    "input_cable__sqrt_f_scaling": False,
    "output_cable__loss_db": [0.0],
    "output_cable__sqrt_f_scaling": False,
    "dut__gain_ripple_db": 0.0,
    "dut__output_p1db_dbm": 40.0,
    "analyzer__mixer_p1db_dbm": 30.0,
    "interference": {"tones": [], "combs": [], "mains_sideband_dbc": None},
}

RF_SWEEP = [2.0e9 + 0.1e9 * i for i in range(9)]
MODES = {
    "fixed_lo": ({"mode": "fixed_lo", "lo_hz": 1.9e9}, RF_SWEEP),
    "fixed_if": ({"mode": "fixed_if", "if_hz": 0.4e9, "sideband": "upper"}, RF_SWEEP),
    "triples": (
        {
            "mode": "triples",
            "triples": [
                [2.1e9, 1.7e9, 0.4e9],
                [2.3e9, 1.8e9, 0.5e9],
                [2.45e9, 3.05e9, 0.6e9],  # RF below the LO: lower sideband
                [2.6e9, 2.0e9, 0.6e9],
                [2.75e9, 3.25e9, 0.5e9],
                [2.9e9, 2.2e9, 0.7e9],
            ],
        },
        None,
    ),
}


def make_sim(seed: int, **overrides) -> SimulatedBench:
    return SimulatedBench.from_scenario(
        "demo-downconverter", seed=seed, ideal=True, **(IDEAL | overrides)
    )


def plan_points(conversion: dict, rf: list[float] | None) -> list[tuple[float, float]]:
    """(RF, LO) of each point of a conversion section."""
    if conversion["mode"] == "triples":
        return [(t[0], t[1]) for t in conversion["triples"]]
    if conversion["mode"] == "fixed_lo":
        return [(f, conversion["lo_hz"]) for f in rf]  # type: ignore[union-attr]
    return [(f, f - conversion["if_hz"]) for f in rf]  # type: ignore[union-attr]


def write_tables(sim: SimulatedBench, points, folder: Path) -> tuple[Path, Path]:
    """The image rejection and conversion gain the plan states: the simulator's truth."""
    rej = ["freq_hz,image_rejection_db"]
    gain = ["freq_hz,gain_db"]
    for rf, lo in sorted(points):
        t = sim.converter_truth(rf, lo, LO_DBM)
        rej.append(f"{rf!r},{min(t['image_rejection_db'], 200.0):.9f}")  # 200 dB: none
        gain.append(f"{rf!r},{t['gain_signal_db']:.9f}")
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "image.csv").write_text("\n".join(rej) + "\n")
    (folder / "gain.csv").write_text("\n".join(gain) + "\n")
    return folder / "image.csv", folder / "gain.csv"


def make_plan(method: str, conversion: dict, rf: list[float] | None, folder: Path, target: float):
    data = {
        "method": method,
        "bench": {
            "analyzer": {
                "resource": "sim://demo-downconverter",
                "compression_dbm": 30.0,
                "max_input_dbm": 40.0,
            }
        },
        "conversion": {
            **conversion,
            "image_rejection_db": str(folder / "image.csv"),
            "lo_leakage_dbm": -30.0,
            "lo": {"source": "generator", "level_dbm": LO_DBM, "settle_time_s": 0.05},
        },
        "acquisition": {
            "attenuation_db": 0,
            "target_u_nf_db": target,
            "time_limit_s": 30.0,
            "max_averages": 100_000,
        },
        "expect": {"dut_gain_db": 18.0},
        "output": {"plots": False, "report": False},
    }
    if rf is not None:
        data["sweep"] = {"freqs_hz": rf}
    if method == "gain":
        data["gain"] = {"source": "file", "file": str(folder / "gain.csv"), "u_gain_db": 0.0}
    return parse_plan(data)


def run(method: str, mode: str, seed: int, workdir: Path, target: float, tag="", **overrides):
    conversion, rf = MODES[mode]
    sim = make_sim(seed, **overrides)
    folder = workdir / f"{mode}_{method}_{seed}{tag}"
    write_tables(sim, plan_points(conversion, rf), folder)
    plan = make_plan(method, conversion, rf, folder, target)
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(folder / "run")
    rows = []
    for p in record.points:
        c = p.conversion
        t = sim.converter_truth(c.rf_hz, c.lo_hz, LO_DBM)
        rows.append(
            (
                c.nf_ssb_db - t["nf_ssb_db"],
                c.nf_dsb_db - t["nf_dsb_db"],
                p.u_nf_db,
                c.nf_ssb_db - c.nf_dsb_db,
                t["nf_ssb_db"] - t["nf_dsb_db"],
            )
        )
    skipped = record.info.notes.get("skipped_points", [])
    return rows, skipped


def summary(rows: list[tuple]) -> str:
    a = np.asarray(rows, dtype=float)
    out = []
    u_rms = math.sqrt(float(np.mean(a[:, 2] ** 2)))
    for name, col in (("SSB", 0), ("DSB", 1)):
        e = a[:, col]
        z = np.abs(e / a[:, 2])
        out.append(
            f"{name} bias {e.mean():+.4f} dB (+/- {e.std(ddof=1) / math.sqrt(e.size):.4f}), "
            f"scatter {e.std(ddof=1):.4f} vs stated {u_rms:.4f} dB, "
            f"within 1u {100 * np.mean(z <= 1):.1f} %, 2u {100 * np.mean(z <= 2):.1f} %"
        )
    return f"n={a.shape[0]:3d}  " + "\n         ".join(out)


EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "downconverter_simulated.toml"


def demo_gain(seeds: int, ideal: bool, workdir: Path) -> str:
    """Conversion-gain errors of the README example over seeds (see the module docstring)."""
    plan = load_plan(EXAMPLE)
    errors, u_stat, u_all, run_means = [], [], [], []
    for seed in range(1, seeds + 1):
        sim = SimulatedBench.from_scenario("demo-downconverter", seed=seed, ideal=ideal)
        record = Sequencer(plan, simulated_session(sim, plan.bench)).run(
            workdir / f"gain_{int(ideal)}_{seed}"
        )
        run = []
        for p in record.points:
            c = p.conversion
            run.append(p.gain_db - sim.converter_truth(c.rf_hz, c.lo_hz, LO_DBM)["gain_signal_db"])
            u_stat.append(p.u_gain_db)
            u_all.append(p.notes["u_gain_db_with_enr"])
        errors += run
        run_means.append(float(np.mean(run)))
    e, us, ua = np.asarray(errors), np.asarray(u_stat), np.asarray(u_all)
    within = e - np.repeat(run_means, e.size // len(run_means))
    u_bias = np.std(run_means, ddof=1) / math.sqrt(seeds)
    return (
        f"n={e.size} bias {e.mean():+.3f} dB (+/- {u_bias:.3f}"
        f" from {seeds} runs), scatter of run means {np.std(run_means, ddof=1):.3f} dB, within a "
        f"run {within.std(ddof=1):.3f} dB; stated u_gain {math.sqrt(np.mean(us**2)):.3f} dB: 2u "
        f"{100 * np.mean(np.abs(e) <= 2 * us):.1f} %; with ENR {math.sqrt(np.mean(ua**2)):.3f} "
        f"dB: 2u {100 * np.mean(np.abs(e) <= 2 * ua):.1f} %"
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=8)
    parser.add_argument("--quick", action="store_true", help="3 seeds, a looser target")
    args = parser.parse_args(argv)
    seeds = 3 if args.quick else args.seeds
    target = 0.1 if args.quick else 0.05
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        workdir = Path(tmp)
        print(f"converter accuracy on the ideal simulated bench, target {target} dB, {seeds} seeds")
        for mode in MODES:
            for method in ("y_factor", "gain"):
                rows, skipped = [], []
                for seed in range(seeds):
                    r, s = run(method, mode, 100 + seed + (method == "gain") * 50, workdir, target)
                    rows += r
                    skipped += s
                print(f"{mode:9s} {method:8s} {summary(rows)}")
                if skipped:
                    print(f"          skipped {len(skipped)} point(s): {skipped[0]['reason']}")
        # special cases: equal responses and no image response
        flat = {
            "dut__freq_hz": [1.0e9, 3.5e9],
            "dut__gain_db": [20.0, 20.0],
            "dut__nf_db": [5.0, 5.0],
        }
        narrow = {
            "dut__freq_hz": [1.85e9, 3.0e9],  # images (fixed LO 1.9 GHz) all below 1.85 GHz
            "dut__gain_db": [20.0, 20.0],
            "dut__nf_db": [5.0, 5.0],
        }
        for label, overrides, expected in (
            ("equal responses", flat, 10 * math.log10(2)),
            ("no image response", narrow, 0.0),
        ):
            rows = []
            for seed in range(seeds):
                rows += run(
                    "y_factor", "fixed_lo", 300 + seed, workdir, target, label[:2], **overrides
                )[0]
            a = np.asarray(rows)
            print(
                f"{label:18s} SSB-DSB measured {a[:, 3].mean():.4f} dB (expected {expected:.4f}),"
                f" SSB error {a[:, 0].mean():+.4f} dB, DSB error {a[:, 1].mean():+.4f} dB"
                f" (stated u {math.sqrt(float(np.mean(a[:, 2] ** 2))):.4f} dB per point)"
            )
        for label, ideal in (("ideal bench", True), ("demo bench", False)):
            print(f"example gain, {label:11s} {demo_gain(3 * seeds, ideal, workdir)}")
    print(f"host time {time.perf_counter() - started:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())

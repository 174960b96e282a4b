"""Measured conversion gain (generator at the RF, analyzer at the IF) on the simulated bench.

Prints, from one run on this machine:

- the measured gain (between the THROUGH planes) against the simulator's truth
  (``converter_truth``: conversion gain minus the input cable at the RF) over seeds, on the
  ideal and on the full demo bench: bias, scatter, stated u and its non-flatness part;
- a generator whose level rises ``--slope`` dB/GHz: the error of the IF reference, of the RF
  reference and of the default blend (equal declared flatness), against what the derivation
  of ``running/conversion_gain.py`` predicts (IF: slope x (RF - IF); RF: 0; blend: half);
- the gain method's SSB NF with that gain, through the whole sequencer on the example plan
  (``examples/downconverter_gain_measured.toml``, three RF points) on the ideal bench: error
  against the truth (mean, scatter) and z = error / u_nf_db.

Usage: ``python scripts/bench_conversion_gain.py [--seeds N]``.
"""

from __future__ import annotations

import argparse
import math
import tempfile
from pathlib import Path

import numpy as np

from noisebench.bench.registry import simulated_session
from noisebench.running.conversion_gain import ConversionGainPlan, measure_conversion_gain
from noisebench.running.gain_measurement import GainMeasurementPlan
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the tomli backport
    import tomli as tomllib

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
RF = [2.0e9, 2.2e9, 2.4e9, 2.6e9, 2.8e9]
IF_HZ = 0.4e9


def measure(bench: SimulatedBench, u_g: float = 0.3, u_a: float = 0.3):
    """(points, errors against the truth) of one conversion-gain measurement."""
    cable = bench.output_cable

    def lout(f: float) -> float:
        return 10 * math.log10(float(cable.loss_lin(np.asarray([f]))[0]))

    tone = GainMeasurementPlan(
        freqs_hz=sorted(set(RF) | {IF_HZ}),
        expected_gain_db=24.0,
        dut_p1db_out_dbm=10.0,
        analyzer_max_input_dbm=-13.1,
        attenuation_db=0.0,
        preamp=False,
        generator_max_dbm=-10.0,
    )
    plan = ConversionGainPlan(
        tone=tone,
        rf_hz=RF,
        lo_hz=[f - IF_HZ for f in RF],
        if_hz=[IF_HZ] * len(RF),
        output_loss_rf_db=[lout(f) for f in RF],
        output_loss_if_db=[lout(IF_HZ)] * len(RF),
        u_generator_flatness_db=u_g,
        u_analyzer_flatness_db=u_a,
    )

    def set_lo(f: float) -> None:
        bench.lo_generator.set_cw(f, 10.0)
        bench.lo_generator.set_output(True)

    result = measure_conversion_gain(
        bench.analyzer, bench.generator, plan, lambda s: bench.set_path(s.value), set_lo
    )
    truths = []
    for p in result.points:
        t = bench.converter_truth(p.rf_hz, p.lo_hz, 10.0)
        truths.append(t["gain_signal_db"] - t["input_loss_rf_db"])
    return result.points, np.array(truths)


def gain_over_seeds(seeds: int) -> None:
    print(f"measured conversion gain vs truth, {seeds} seeds x {len(RF)} RF points (dB)")
    for ideal in (True, False):
        errors, u, nonflat = [], [], []
        for seed in range(1, seeds + 1):
            bench = SimulatedBench.from_scenario("demo-downconverter", seed=seed, ideal=ideal)
            points, truth = measure(bench)
            errors += [p.gain_db - t for p, t in zip(points, truth, strict=True)]
            u += [p.u_gain_db for p in points]
            for p in points:
                parts = {k: v for k, v in p.uncertainty_db.items() if k != "flatness"}
                nonflat.append(math.sqrt(sum(v * v for v in parts.values())))
        e = np.array(errors)
        print(
            f"  {'ideal' if ideal else 'demo '} bench: bias {e.mean():+.4f}, scatter "
            f"{e.std(ddof=1):.4f}, max |error| {np.abs(e).max():.4f}; stated u "
            f"{np.mean(u):.3f} (without the declared flatness {np.mean(nonflat):.3f})"
        )


def generator_slope(slope: float) -> None:
    bench = SimulatedBench.from_scenario(
        "demo-downconverter", seed=1, ideal=True, generator__level_slope_db_per_ghz=slope
    )
    points, truth = measure(bench)
    print(f"generator flatness {slope:+.2f} dB/GHz (ideal bench, seed 1), errors in dB:")
    print("   RF (GHz)   IF ref  predicted   RF ref   blend  predicted  flag")
    for p, t in zip(points, truth, strict=True):
        predicted = slope * (p.rf_hz - p.if_hz) / 1e9
        print(
            f"   {p.rf_hz / 1e9:8.2f} {p.gain_if_reference_db - t:+8.4f} {predicted:+10.4f} "
            f"{p.gain_rf_reference_db - t:+8.4f} {p.gain_db - t:+7.4f} {predicted / 2:+10.4f}  "
            f"{','.join(p.flags) or '-'}"
        )


def nf_over_seeds(seeds: int) -> None:
    data = tomllib.loads((EXAMPLES / "downconverter_gain_measured.toml").read_text())
    data["output"] = {"plots": False, "report": False}
    data.pop("uncertainty")
    data["sweep"]["segments"][0].update(start_hz=2.2e9, stop_hz=2.6e9, points=3)
    plan = parse_plan(data, base_dir=EXAMPLES)
    errors, z = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(1, seeds + 1):
            sim = SimulatedBench.from_scenario("demo-downconverter", seed=seed, ideal=True)
            record = Sequencer(plan, simulated_session(sim, plan.bench)).run(Path(tmp) / f"{seed}")
            for p in record.points:
                t = sim.converter_truth(p.freq_hz, p.conversion.lo_hz, 10.0)
                errors.append(p.nf_db - t["nf_ssb_db"])
                z.append(errors[-1] / p.u_nf_db)
    e, zz = np.array(errors), np.array(z)
    print(
        f"SSB NF with the measured gain (ideal bench, {seeds} seeds x 3 points): error mean "
        f"{e.mean():+.4f} dB, scatter {e.std(ddof=1):.4f} dB; z scatter {zz.std(ddof=1):.2f}, "
        f"largest |z| {np.abs(zz).max():.2f}"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=8)
    parser.add_argument("--slope", type=float, default=0.25, help="generator flatness, dB/GHz")
    args = parser.parse_args()
    gain_over_seeds(args.seeds)
    generator_slope(args.slope)
    nf_over_seeds(args.seeds)


if __name__ == "__main__":
    main()

"""Write simulated hot/cold SigMF recordings of the invented demo LNA, for the sampled examples.

    python examples/sampled/make_recordings.py        # about 40 MB into examples/sampled/recordings

What it does, as an operator with a software-defined receiver would: measure the receiver's
scale with a generator tone of known level (stored as scale.json and inside every recording),
then record, at each frequency, the noise source straight into the receiver (THROUGH), the DUT
with the source cold and hot, and the receiver input terminated, each for 0.3 s of settled
samples (ci16, 2 MS/s). It also writes the noise source's ENR table and the DUT gain a network
analyzer would have given (for the gain method). The bench is the simulator's demo-lna
scenario, seed 1: every number is invented.
"""

from __future__ import annotations

from pathlib import Path

from noisebench.bench.registry import simulated_enr_table
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.samples import SimSampleReceiver, calibrate_tone_scale, record_sigmf

HERE = Path(__file__).resolve().parent
FREQS_HZ = [1.0e9, 2.0e9, 3.0e9, 4.0e9]
SECONDS_PER_STATE = 0.3


def main() -> None:
    sim = SimulatedBench.from_scenario("demo-lna", seed=1)
    receiver = SimSampleReceiver(sim, seed=1)
    scale = calibrate_tone_scale(receiver, 1.5e9, -60.0)
    scale.save(HERE / "scale.json")
    samples = int(SECONDS_PER_STATE * receiver.spec.sample_rate_hz)
    paths = record_sigmf(
        receiver,
        HERE / "recordings",
        FREQS_HZ,
        samples_per_state=samples,
        scale=scale,
        datatype="ci16_le",
    )
    simulated_enr_table(sim).to_csv(HERE / "enr.csv")
    truth = sim.truth(FREQS_HZ)
    rows = [f"{f:.6g},{g:.4f},0.05" for f, g in zip(FREQS_HZ, truth["gain_db"], strict=True)]
    (HERE / "dut_gain.csv").write_text(
        "# description: DUT gain as a network analyzer measured it (simulated, invented)\n"
        "freq_hz,gain_db,u_gain_db\n" + "\n".join(rows) + "\n",
        encoding="utf-8",
    )
    print(f"receiver scale: {scale.describe()}")
    for path in paths:
        print(f"wrote {path.relative_to(HERE)}")


if __name__ == "__main__":
    main()

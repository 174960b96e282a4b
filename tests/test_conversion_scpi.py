"""A converter measured over pyvisa-py against the SCPI simulator, the LO from the simulator's
LO generator (examples/downconverter_scpi_simulator.toml with the test server's ports)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import run_plan
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the tomli backport
    import tomli as tomllib

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def test_example_runs_over_scpi_with_the_lo_generator(tmp_path):
    data = tomllib.loads((EXAMPLES / "downconverter_scpi_simulator.toml").read_text())
    data["output"] = {"plots": False, "report": False}
    data["sweep"]["segments"][0].update(start_hz=2.2e9, stop_hz=2.6e9, points=3)
    bench = SimulatedBench.from_scenario("demo-downconverter", seed=1)
    with SimServer(bench) as server:
        data["bench"]["analyzer"]["resource"] = server.resource("analyzer")
        data["bench"]["lo"]["resource"] = server.resource("lo")
        plan = parse_plan(data, base_dir=EXAMPLES)
        record, _ = run_plan(plan, folder=tmp_path / "run", outputs=False)
        lo_commands = [c for who, c in server.command_log if who == "lo"]
        lo_on_after = bench.lo_generator.output_on
    assert record.info.status == "complete" and len(record.points) == 3
    assert record.info.identities["lo_generator"] == bench.lo_generator.identity
    # the LO went through its own port: tuned to 1.9 GHz at 10 dBm, on, and off at the end
    joined = ";".join(lo_commands).upper()
    assert "OUTP" in joined and bench.lo_generator.freq_hz == 1.9e9
    assert bench.lo_generator.level_dbm == 10.0
    assert not lo_on_after
    # a fixed LO: one trace covers the three IF points (100 MHz apart, 10 MHz bands)
    assert {p.conversion.lo_hz for p in record.points} == {1.9e9}
    np.testing.assert_allclose([p.conversion.if_hz for p in record.points], [0.3e9, 0.5e9, 0.7e9])
    for p in record.points:
        truth = bench.converter_truth(p.freq_hz, 1.9e9, 10.0)
        # the non-ideal bench (ENR table error, mismatch, level error) within a generous bound
        assert abs(p.nf_db - truth["nf_ssb_db"]) < 0.5
        assert p.conversion.sideband == "upper"

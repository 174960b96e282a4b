"""Shared builders for the sequencer, resume and CLI tests (simulated benches and plans)."""

from __future__ import annotations

from typing import Any

from noisebench.bench.registry import BenchSession, simulated_session
from noisebench.running.plan import Plan, parse_plan

# A bench whose truth the methods can recover exactly: no ENR calibration error, no
# reflections (mismatch changes a DUT's NF), flat known gain, no absolute level error (the
# gain method reads absolute densities), constant cable losses the plan declares.
IDEAL_OVERRIDES: dict[str, Any] = {
    "noise_source__calibration_error_db": [0.0] * 16,
    "dut__input_reflection": {"magnitude": 0.0},
    "dut__output_reflection": {"magnitude": 0.0},
    "noise_source__cold_reflection": {"magnitude": 0.0},
    "noise_source__hot_reflection": {"magnitude": 0.0},
    "analyzer__input_reflection": {"magnitude": 0.0},
    "analyzer__amplitude_error_db": 0.0,
    "input_cable__loss_db": [0.3],
    "input_cable__sqrt_f_scaling": False,
    "output_cable__loss_db": [0.5],
    "output_cable__sqrt_f_scaling": False,
    "dut__gain_db": [25.0] * 14,
    "dut__gain_ripple_db": 0.0,
}
IDEAL_INPUT_LOSS_DB = 0.3
IDEAL_OUTPUT_LOSS_DB = 0.5
IDEAL_GAIN_DB = 25.0


def ideal_sim(seed: int = 1, **extra: Any):
    from noisebench.sims.bench import SimulatedBench

    return SimulatedBench.from_scenario("demo-lna", seed=seed, **{**IDEAL_OVERRIDES, **extra})


def plan_dict(
    method: str = "y_factor", *, freqs_hz=(1e9, 2e9, 3e9, 4e9), target: float = 0.1, **sections: Any
) -> dict[str, Any]:
    """A plan for the ideal demo-lna bench; ``sections`` update the top-level tables."""
    data: dict[str, Any] = {
        "method": method,
        "dut": {"id": "TEST-LNA"},
        "bench": {"analyzer": {"resource": "sim://demo-lna?seed=1", "compression_dbm": -3.0}},
        "acquisition": {"attenuation_db": 0, "target_u_nf_db": target, "time_limit_s": 20},
        "sweep": {"freqs_hz": list(freqs_hz)},
        "expect": {"dut_gain_db": 20.0},
        "corrections": {
            "input_loss": IDEAL_INPUT_LOSS_DB,
            "output_loss": IDEAL_OUTPUT_LOSS_DB if method == "gain" else 0.0,
        },
    }
    if method == "gain":
        data["gain"] = {"source": "constant", "value_db": IDEAL_GAIN_DB}
    for key, value in sections.items():
        if isinstance(value, dict) and isinstance(data.get(key), dict):
            data[key] = {**data[key], **value}
        else:
            data[key] = value
    return data


def ideal_session(plan: Plan, seed: int = 1, **extra: Any) -> BenchSession:
    return simulated_session(ideal_sim(seed, **extra), plan.bench)


def make_plan(method: str = "y_factor", **kwargs: Any) -> Plan:
    return parse_plan(plan_dict(method, **kwargs))

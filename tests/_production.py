"""Shared helpers of the production tests (station, database, pytest plugin): small plans on
an exactly known simulated bench, and the NF the bench should read for a unit.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from noisebench.bench.registry import simulated_session
from noisebench.running.plan import Plan, parse_plan

FREQS_HZ = (1.0e9, 2.0e9)
NF_LIMIT_DB = 1.3
T0_K = 290.0


def small_plan(
    folder: Path,
    *,
    nf_max_db: float = NF_LIMIT_DB,
    rbw_hz: float = 1e6,
    limits: bool = True,
    uncertainty: bool | dict[str, Any] = True,
    **extra: Any,
) -> Plan:
    """A two-point Y-factor plan on sim://demo-lna with budget inputs and an NF mask
    (``uncertainty`` a dict: those budget inputs instead of the default ones)."""
    data: dict[str, Any] = {
        "method": "y_factor",
        "name": "station test plan",
        "bench": {"analyzer": "sim://demo-lna?seed=1"},
        "acquisition": {
            "rbw_hz": rbw_hz,
            "span_hz": 4 * rbw_hz,
            "attenuation_db": 0.0,
            "min_averages": 8,
            "max_averages": 400,
            "target_u_nf_db": 0.05,
            "time_limit_s": 10.0,
        },
        "sweep": {"freqs_hz": list(FREQS_HZ)},
        "output": {"plots": False, "report": True},
    }
    if isinstance(uncertainty, dict):
        data["uncertainty"] = uncertainty
    elif uncertainty:
        data["uncertainty"] = {"enr_db": 0.05, "cold_temperature_k": 0.5, "linearity_db": 0.01}
    if limits:
        data["limits"] = {
            "bands": [
                {"name": "1-2 GHz", "start_hz": 0.9e9, "stop_hz": 2.1e9, "nf_max_db": nf_max_db}
            ]
        }
    data.update(extra)
    return parse_plan(data, base_dir=folder)


def exact_sim(seed: int = 1) -> Any:
    """demo-lna with an exact ENR table and a matched DUT: the NF read is the cascade's."""
    from noisebench.sims.bench import SimulatedBench

    return SimulatedBench.from_scenario(
        "demo-lna",
        seed=seed,
        noise_source__calibration_error_scale=0.0,
        dut__input_reflection__magnitude=0.0,
        dut__output_reflection__magnitude=0.0,
    )


def session_on(sim: Any, plan: Plan) -> Any:
    return simulated_session(sim, plan.bench)


def expected_nf_db(sim: Any, freq_hz: Any) -> np.ndarray:
    """NF (dB) the plan reads for the unit now in ``sim``: input cable + DUT, matched.

    The input cable is not de-embedded by the plan, so it is part of what is measured:
    F = F_cable + L (F_dut - 1) with F_cable = 1 + (L - 1) T_cable / T0
    (reference: Friis 1944 and the passive-loss noise factor, docs/references.md §3).
    """
    truth = sim.truth(np.atleast_1d(freq_hz))
    loss = 10 ** (truth["input_loss_db"] / 10)
    f_dut = 10 ** (truth["nf_db"] / 10)
    f_cable = 1 + (loss - 1) * truth["ambient_k"] / T0_K  # cable at the bench's ambient
    return 10 * np.log10(f_cable + loss * (f_dut - 1))

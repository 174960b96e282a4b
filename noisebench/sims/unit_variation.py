"""Invented unit-to-unit spread of a simulated DUT, seeded from each serial, and its
installation in a running simulated bench (station mode on a simulated bench)."""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

logger = logging.getLogger(__name__)


# =========================================================================== simulated units


class UnitVariation(BaseModel):
    """Invented unit-to-unit spread of a simulated DUT (dB), seeded from each serial.

    For each unit: an NF offset ~ N(0, ``nf_sigma_db``), an NF tilt ~ N(0,
    ``nf_tilt_sigma_db``) (the change at the band edges, opposite signs, zero at the centre),
    a gain offset ~ N(0, ``gain_sigma_db``), and with probability ``weak_fraction`` an extra
    ``weak_nf_db`` of NF (a weak input stage). ``seed`` selects another population from the
    same serials. Passive DUTs get the gain (loss) offset only.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    nf_sigma_db: float = Field(default=0.10, ge=0, le=5)
    nf_tilt_sigma_db: float = Field(default=0.05, ge=0, le=5)
    gain_sigma_db: float = Field(default=0.40, ge=0, le=10)
    weak_fraction: float = Field(default=0.15, ge=0, le=1)
    weak_nf_db: float = Field(default=0.6, ge=0, le=20)
    seed: int = Field(default=0, ge=0)

    def offsets(self, serial: str) -> UnitOffsets:
        """The deterministic offsets of unit ``serial``."""
        digest = hashlib.sha256(serial.encode("utf-8")).digest()
        words = [int.from_bytes(digest[i : i + 4], "big") for i in range(0, 16, 4)]
        rng = np.random.default_rng(np.random.SeedSequence([self.seed, *words]))
        z_nf, z_tilt, z_gain = rng.standard_normal(3)
        weak = bool(rng.random() < self.weak_fraction)
        return UnitOffsets(
            serial=serial,
            nf_offset_db=float(z_nf * self.nf_sigma_db),
            nf_tilt_db=float(z_tilt * self.nf_tilt_sigma_db),
            gain_offset_db=float(z_gain * self.gain_sigma_db),
            weak=weak,
            weak_nf_db=self.weak_nf_db if weak else 0.0,
        )


@dataclass(frozen=True)
class UnitOffsets:
    """The changes (dB) one simulated unit makes to the scenario's DUT tables."""

    serial: str
    nf_offset_db: float
    nf_tilt_db: float
    gain_offset_db: float
    weak: bool
    weak_nf_db: float

    def nf_change_db(self, freq_hz: np.ndarray, band_hz: tuple[float, float]) -> np.ndarray:
        """NF change (dB) at ``freq_hz``: offset + weak excess + tilt (-1 .. +1 across band)."""
        f = np.asarray(freq_hz, dtype=float)
        lo, hi = band_hz
        x = (2.0 * (f - lo) / (hi - lo) - 1.0) if hi > lo else np.zeros_like(f)
        return self.nf_offset_db + self.weak_nf_db + self.nf_tilt_db * x

    def to_dict(self) -> dict[str, Any]:
        return {
            "serial": self.serial,
            "nf_offset_db": self.nf_offset_db,
            "nf_tilt_db": self.nf_tilt_db,
            "gain_offset_db": self.gain_offset_db,
            "weak": self.weak,
            "weak_nf_db": self.weak_nf_db,
        }


MIN_SIMULATED_NF_DB = 0.05


def unit_dut_table(dut: Any, offsets: UnitOffsets) -> dict[str, Any]:
    """The ``[dut]`` overrides of one unit for a scenario's DUT spec (``sims.scenario``)."""
    freq = np.asarray(dut.freq_hz, dtype=float)
    gain = np.asarray(dut.gain_db, dtype=float) + offsets.gain_offset_db
    table: dict[str, Any] = {"name": f"{dut.name} #{offsets.serial}"}
    if dut.nf_db is not None:
        band = (float(freq[0]), float(freq[-1]))
        nf = np.asarray(dut.nf_db, dtype=float) + offsets.nf_change_db(freq, band)
        table["nf_db"] = [float(v) for v in np.maximum(nf, MIN_SIMULATED_NF_DB)]
    else:
        gain = np.minimum(gain, 0.0)  # a passive DUT never gains
    table["gain_db"] = [float(v) for v in gain]
    return table


def apply_simulated_unit(sim: Any, base_scenario: Any, offsets: UnitOffsets) -> Any:
    """Install unit ``offsets`` (relative to ``base_scenario``) in the running simulator.

    The unit's scenario is built through the simulator's validated scenario overrides; its
    DUT model replaces the bench's (``SimulatedBench.replace_dut``). Returns
    the unit's scenario.
    """
    from noisebench.sims.scenario import scenario_from_dict

    data = base_scenario.model_dump()
    data["dut"] = {**data["dut"], **unit_dut_table(base_scenario.dut, offsets)}
    scenario = scenario_from_dict(data, source=f"unit {offsets.serial}")
    install_scenario_dut(sim, scenario)
    logger.debug("simulated unit %s installed: %s", offsets.serial, offsets)
    return scenario


def install_scenario_dut(sim: Any, scenario: Any) -> None:
    """Make the running simulator's DUT the one of ``scenario`` (nothing else changes)."""
    sim.replace_dut(scenario.dut)

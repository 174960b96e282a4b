"""The simulated bench as a model for forecasts (:func:`noisebench.running.forecast.forecast_plan`):
its analyzer (applied settings, time per average), the noise source's settling time and
temperatures, and the densities the analyzer will display (from the simulator's truth)."""

from __future__ import annotations

from typing import Any

import numpy as np

from noisebench.bench.instruments import Analyzer


class SimulatedBenchModel:
    """A :class:`~noisebench.running.forecast.BenchModel` backed by a ``SimulatedBench``."""

    def __init__(self, sim: Any) -> None:
        self.sim = sim

    @property
    def analyzer(self) -> Analyzer:
        return self.sim.analyzer

    @property
    def settle_time_s(self) -> float:
        return float(self.sim.noise_source.settle_time_s)

    def source_temperature_k(self, y_factor: bool) -> float:
        """The source's physical temperature (Y-factor) or the termination's (ambient), K."""
        if y_factor:
            return float(self.sim.noise_source.cold_temperature_k)
        return float(self.sim.ambient_k)

    def expected_readings(
        self, freq_hz: float, y_factor: bool
    ) -> tuple[dict[str, float], float | None, float, float]:
        """(displayed densities W/Hz by reading name, ENR dB or None, DUT path gain dB, source
        temperature K) at ``freq_hz``."""
        truth = self.sim.truth(freq_hz)

        def get(name: str) -> float:
            return float(np.asarray(truth[name]).ravel()[0])

        if not y_factor:
            readings = {
                "dut": get("displayed_dut_cold_w_per_hz"),
                "floor": get("displayed_termination_cold_w_per_hz"),
            }
            ts, enr = get("ambient_k"), None
        else:
            readings = {
                "hot": get("displayed_dut_hot_w_per_hz"),
                "cold": get("displayed_dut_cold_w_per_hz"),
                "hot_cal": get("displayed_through_hot_w_per_hz"),
                "cold_cal": get("displayed_through_cold_w_per_hz"),
            }
            ts, enr = get("cold_k"), get("enr_table_db")
        gain = get("gain_db") - get("input_loss_db") - get("output_loss_db")
        return readings, enr, gain, ts

    def expected_conversion(
        self, rf_hz: float, lo_hz: float, lo_dbm: float | None
    ) -> dict[str, float]:
        """The simulator's converter truth at (RF, LO): Te_SSB, conversion gain, image
        rejection, the analyzer's Te at the IF and the ENR table at RF, image and IF."""
        return dict(self.sim.converter_truth(rf_hz, lo_hz, lo_dbm))

"""A forecast whose bench model gives no ENR for a Y-factor plan names the missing input."""

from __future__ import annotations

import pytest
from _sequencer_helpers import ideal_sim, make_plan

from noisebench.errors import InputError
from noisebench.running.forecast import forecast_plan
from noisebench.sims.forecast_model import SimulatedBenchModel


class _ModelWithoutEnr(SimulatedBenchModel):
    """The simulated model, but answering "ENR unknown" (None), as the protocol allows."""

    def expected_readings(self, freq_hz, y_factor):
        readings, _, gain_db, source_k = super().expected_readings(freq_hz, y_factor)
        return readings, None, gain_db, source_k


def test_y_factor_forecast_without_enr_names_the_field():
    plan = make_plan("y_factor", freqs_hz=[1.5e9, 2e9], target=0.05)
    with pytest.raises(InputError) as info:  # was a TypeError from float(None)
        forecast_plan(plan, model=_ModelWithoutEnr(ideal_sim(seed=3)))
    assert info.value.field == "expect.enr_db"
    assert "Y-factor" in str(info.value)


def test_the_same_model_with_its_enr_forecasts():
    plan = make_plan("y_factor", freqs_hz=[1.5e9, 2e9], target=0.05)
    forecast = forecast_plan(plan, model=SimulatedBenchModel(ideal_sim(seed=3)))
    assert [round(p.freq_hz) for p in forecast.points] == [1_500_000_000, 2_000_000_000]
    assert all(0 < p.u_nf_db <= 0.05 for p in forecast.points)

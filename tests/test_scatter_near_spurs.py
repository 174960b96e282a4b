"""The trace scatter-state check near spur lines (a demo regression).

Reported: the demo's 3.3 GHz calibration was refused with "the analyzer is probably not
averaging as reported" although the analyzer averaged as reported: a comb of three lines
1.25 MHz apart (1 MHz RBW) covers about half of the 10 MHz trace, and the check judged the
lines' skirts as noise scatter. The traces come from the simulator, whose noise synthesis
shares no code with the estimator.
"""

from __future__ import annotations

import numpy as np
import pytest

from noisebench.bench.acquisition import AcquisitionRequest
from noisebench.errors import MeasurementError
from noisebench.science.estimator import estimate_density
from noisebench.sims.bench import SimulatedBench

COMB_HZ = 3.3e9  # the demo scenario's comb sits at 3.30125-3.30375 GHz


def _termination_trace(seed: int, averages: int, points: int, claimed: int | None = None):
    bench = SimulatedBench.from_scenario("demo-lna", seed=seed)
    bench.set_path("termination")
    bench.analyzer.configure(
        AcquisitionRequest(
            center_hz=COMB_HZ, span_hz=10e6, rbw_hz=1e6, averages=averages, points=points
        )
    )
    trace = bench.analyzer.acquire_trace()
    truth = float(np.squeeze(bench.truth(COMB_HZ)["displayed_termination_cold_w_per_hz"]))
    if claimed is not None:  # the analyzer says it averaged `claimed` traces
        settings = trace.settings.model_copy(update={"averages": claimed})
        trace = trace.model_copy(update={"settings": settings})
    return trace, truth


@pytest.mark.parametrize("averages", [30, 78, 300])
@pytest.mark.parametrize("points", [42, 101])
def test_lines_covering_half_a_short_trace_are_not_taken_for_missing_averaging(averages, points):
    for seed in range(4):
        trace, truth = _termination_trace(seed, averages, points)
        d = estimate_density(trace)
        assert d.excluded_freq_hz, "the comb is found and excluded"
        # the density from the points clear of the comb is the analyzer's own noise; 4.5 u
        # bounds a Gaussian error with probability 7e-6 per trace
        assert abs(d.density_w_per_hz - truth) <= 4.5 * d.u_density_w_per_hz, seed


@pytest.mark.parametrize("points", [42, 101, 401])
def test_missing_averaging_is_still_refused_beside_the_same_lines(points):
    """One trace read as 300 averages scatters 17x more than claimed: refused with its cause,
    the comb in the trace notwithstanding (lines are told from noise by standing out from the
    scatter observed clear of them, not from the claimed one)."""
    for seed in range(6):
        trace, _ = _termination_trace(seed, 1, points, claimed=300)
        with pytest.raises(MeasurementError, match="averaging left off"):
            estimate_density(trace)


def test_a_trace_without_lines_is_judged_as_before():
    """No line found: the whole-trace ratio decides, as it always did (one trace read as 30
    averages, away from the comb, scatters 5.5x more than claimed)."""
    bench = SimulatedBench.from_scenario("demo-lna", seed=3)
    bench.set_path("termination")
    bench.analyzer.configure(
        AcquisitionRequest(center_hz=2e9, span_hz=100e6, rbw_hz=1e6, averages=1, points=101)
    )
    trace = bench.analyzer.acquire_trace()
    said = trace.settings.model_copy(update={"averages": 30})
    with pytest.raises(MeasurementError, match="averaging left off"):
        estimate_density(trace.model_copy(update={"settings": said}))

"""A dead noise source never gives a number (project issue 10): hot - cold that is not
statistically significant means no usable Y-factor, on every Y-factor path.

Design rule (``Y_SIGNIFICANCE_SIGMAS`` in science/methods/_common.py): Y - 1 below 4 u(Y) is
refused; u(Y)/Y = sqrt(u_h^2/h^2 + u_c^2/c^2) (first-order propagation of a ratio,
JCGM 100:2008 eq. 10). A dead source reads Y - 1 ~ N(0, u(Y)): it passes with probability
3.2e-5 (one-sided normal tail at 4, scipy.stats.norm.sf).
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm

from noisebench.errors import YNotSignificantError
from noisebench.frontends import cli
from noisebench.results.store import load_run
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import calibrate_point, y_factor_point
from noisebench.science.methods._common import Y_SIGNIFICANCE_SIGMAS, y_significance
from noisebench.science.methods.converter import converter_y_factor_point
from noisebench.sims.bench import SimulatedBench

sys.path.insert(0, str(Path(__file__).parent))
from test_dead_dut import _plan  # noqa: E402

F = 2e9
TC = 296.0


def _d(value: float, rel_u: float, freq_hz: float = F) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=value, u_density_w_per_hz=value * rel_u)


def test_the_design_rate_is_the_documented_tail():
    # scipy's normal survival function at the threshold: a dead source gets through this often
    assert norm.sf(Y_SIGNIFICANCE_SIGMAS) == pytest.approx(3.17e-5, rel=1e-2)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(
    cold=st.floats(1e-22, 1e-15),
    rel_u=st.floats(1e-4, 0.3),
    z=st.floats(-10.0, Y_SIGNIFICANCE_SIGMAS * 0.999),
    enr_db=st.floats(3.0, 30.0),
)
def test_a_dead_or_weak_source_never_gives_a_number(cold, rel_u, z, enr_db):
    u_rel_y = math.hypot(rel_u, rel_u)  # both readings with the same relative u
    # Y - 1 = z u(Y) = z Y u_rel_y  ->  Y = 1 / (1 - z u_rel_y)
    y = 1.0 / (1.0 - z * u_rel_y)
    if not (y > 0 and math.isfinite(y)):
        return
    hot_d, cold_d = _d(cold * y, rel_u), _d(cold, rel_u)
    assert y_significance(hot_d, cold_d) < Y_SIGNIFICANCE_SIGMAS
    with pytest.raises(YNotSignificantError, match="no usable Y-factor"):
        calibrate_point(hot_d, cold_d, enr_db, cold_temperature_k=TC)
    with pytest.raises(YNotSignificantError, match="powered"):
        y_factor_point(hot_d, cold_d, enr_db, cold_temperature_k=TC)
    with pytest.raises(YNotSignificantError, match="RF port"):
        converter_y_factor_point(
            _d(cold * y, rel_u, 100e6),
            _d(cold, rel_u, 100e6),
            rf_hz=2.1e9,
            lo_hz=2.0e9,
            enr_rf_db=enr_db,
            enr_image_db=None,
            cold_temperature_k=TC,
            image_rejection_db=None,
        )


def test_an_ordinary_low_y_is_not_refused():
    """A 10 dB-NF attenuator-like DUT with a 5 dB ENR source: Y = (Th + Te)/(Tc + Te) =
    1.31 (docs/references.md §5); with 1 % density uncertainty (Y - 1)/u(Y) = 16.6."""
    te = 290.0 * 9.0
    th = 290.0 * 10**0.5 + TC
    y = (th + te) / (TC + te)
    hot_d, cold_d = _d(1e-20 * y, 0.01), _d(1e-20, 0.01)
    z = y_significance(hot_d, cold_d)
    assert z == pytest.approx((y - 1) / (y * math.sqrt(2) * 0.01), rel=1e-12)
    assert z > 2 * Y_SIGNIFICANCE_SIGMAS  # refused with probability < norm.sf(4) = 3.2e-5
    point = y_factor_point(hot_d, cold_d, 5.0, cold_temperature_k=TC)
    assert point.nf_db == pytest.approx(10.0, abs=0.01)


def test_run_with_a_dead_noise_source_gives_no_number(tmp_path, capsys, monkeypatch):
    """Seed 4 of the demo bench with a stuck (never switching) source gave 42.5 dB at 1 GHz
    before: its hot reading came out above the cold one by chance."""
    sim = SimulatedBench.from_scenario("demo-lna", seed=4)
    sim.noise_source.stuck = True
    monkeypatch.setattr(
        "noisebench.bench.registry.open_bench",
        lambda section, **_: __import__(
            "noisebench.bench.registry", fromlist=["x"]
        ).simulated_session(sim, section),
    )
    folder = tmp_path / "run"
    code = cli.main(["-q", "run", str(_plan(tmp_path, "y_factor")), "--out", str(folder)])
    err = capsys.readouterr().err
    assert code == cli.EXIT_MEASUREMENT
    assert "no usable Y-factor" in err and "powered" in err and "ENR table" in err
    record = load_run(folder)
    assert record.points == []
    assert record.verdict is not None and record.verdict["unit"] == "indeterminate"


pytest_plugins = ["pytester"]


def test_pytest_plugin_never_passes_with_a_dead_noise_source(pytester, monkeypatch):
    monkeypatch.setenv("PYTEST_DISABLE_PLUGIN_AUTOLOAD", "1")
    sim = SimulatedBench.from_scenario("demo-lna", seed=4)
    sim.noise_source.stuck = True
    from noisebench.bench import registry

    monkeypatch.setattr(
        registry, "open_bench", lambda section, **_: registry.simulated_session(sim, section)
    )
    plan = _plan(pytester.path, "y_factor", bench="sim://demo-lna?seed=4")
    plan.rename(pytester.path / "plan.toml")
    pytester.makepyfile(
        test_unit="""
        from noisebench.frontends.pytest_plugin import assert_verdict

        def test_whole_plan(nb_run_plan):
            assert_verdict(nb_run_plan(), "pass")

        def test_one_point(nb_measure_point):
            nb_measure_point(1.0e9)
        """
    )
    result = pytester.runpytest(
        "-p",
        "noisebench.frontends.pytest_plugin",
        "-p",
        "no:cacheprovider",
        "--nb-plan",
        "plan.toml",
    )
    result.assert_outcomes(failed=2)
    result.stdout.fnmatch_lines(["*no usable Y-factor*"])

"""Example: the production checks of an LNA written as ordinary pytest tests.

Run (the plugin loads by its entry point once noisebench is installed; before that add
``-p noisebench.frontends.pytest_plugin``)::

    pytest examples/user_tests                                  # invented simulated bench
    pytest examples/user_tests --nb-bench "sim://demo-lna?seed=7"
    pytest examples/user_tests --nb-plan my_plan.toml --nb-bench TCPIP0::10.0.0.5::5025::SOCKET

The plan (``lna_plan.toml`` next to this file, see ``conftest.py``) holds the sweep, the
uncertainty inputs and the limit mask; the tests only say what must hold. Every run folder
(results, report) is listed in the test report as the user property ``nb_run``.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from noisebench.drivers import ScpiGenerator
from noisebench.frontends.pytest_plugin import assert_verdict, replay_dialogue
from noisebench.science.point import PointFlag

HERE = Path(__file__).resolve().parent
NF_MAX_DB = 1.6  # the plan's mask, repeated for the spot checks below
GAIN_MIN_DB = 21.0


def test_bench_answers_and_is_safe(nb_bench):
    """Every instrument identifies itself and the noise source is off between tests."""
    identities = nb_bench.bench.identities()
    assert identities["analyzer"].strip()
    assert nb_bench.bench.noise_source is not None
    assert not nb_bench.bench.noise_source.is_hot


def test_lna_meets_its_noise_figure_and_gain_mask(nb_run_plan, nb_plan):
    """The whole plan: every point inside the mask with its expanded uncertainty."""
    record = nb_run_plan()
    assert [p.freq_hz for p in record.points] == [p.freq_hz for p in nb_plan.points()]
    assert len(record.budgets) == len(record.points)  # every point has its budget
    assert_verdict(record, "pass")


def test_every_point_reached_its_target_uncertainty(nb_run_plan, nb_plan):
    """No point ran out of time before its statistical uncertainty target."""
    record = nb_run_plan()
    target = nb_plan.acquisition.target_u_nf_db
    for point in record.points:
        assert PointFlag.TIME_LIMIT not in point.flags
        assert point.u_nf_db <= target


@pytest.mark.parametrize("freq_hz", [1.0e9, 2.0e9])
def test_spot_noise_figure_and_gain(nb_measure_point, freq_hz):
    """One frequency at a time: NF and gain with a 2-sigma margin on the statistical part."""
    point = nb_measure_point(freq_hz)
    assert point.freq_hz == freq_hz
    assert point.nf_db + 2 * point.u_nf_db < NF_MAX_DB
    assert point.gain_db is not None and point.gain_db - 2 * (point.u_gain_db or 0.0) > GAIN_MIN_DB


def test_my_generator_profile_dialogue():
    """Our own generator profile sends exactly these commands (no hardware needed)."""
    profile = HERE / "my_generator.toml"
    with replay_dialogue(
        [
            ("*IDN?", "Fictional Labs,SG-9,1234,1.0"),
            ("*CLS", None),
            ("OUTPut:STATe?", "0"),
            ("SOURce:FREQuency:CW 1500000000", None),
            ("SYSTem:ERRor?", '0,"No error"'),
            ("SOURce:POWer:LEVel -30.00", None),
            ("SYSTem:ERRor?", '0,"No error"'),
            ("SOURce:FREQuency:CW?", "1500000000"),
            ("SOURce:POWer:LEVel?", "-30.00"),
            ("SYSTem:ERRor?", '0,"No error"'),
        ],
        lambda transport: ScpiGenerator(transport, profile),
    ) as generator:
        generator.set_cw(1.5e9, -30.0)
    assert generator.frequency_hz == 1.5e9
    assert generator.level_dbm == -30.0

"""The README's library example runs exactly as written and gives the right answer."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from noisebench.science.density import NoiseDensity
from noisebench.science.methods import calibrate_point, y_factor_point

README = Path(__file__).resolve().parents[1] / "README.md"


def _example() -> str:
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), re.S)
    assert blocks, "README.md must hold the python library example"
    return blocks[0]


def test_readme_example_runs_and_recovers_the_simulated_truth(capsys):
    ns: dict = {}
    exec(compile(_example(), str(README), "exec"), ns)  # noqa: S102 - our own README
    printed = capsys.readouterr().out
    point, bench = ns["point"], ns["bench"]
    assert re.fullmatch(r"NF \d+\.\d\d dB ± \d+\.\d\d dB, gain \d+\.\d\d dB\n", printed)

    # What the same method returns from the simulator's noiseless displayed densities: the
    # example's result may differ from it only by the jitter the method itself states.
    truth = bench.truth(2e9)

    def dens(key: str) -> NoiseDensity:
        return NoiseDensity(
            freq_hz=2e9, density_w_per_hz=float(truth[key][0]), u_density_w_per_hz=0.0
        )

    enr_db, tc_k = ns["enr_db"], ns["tc_k"]
    cal = calibrate_point(
        dens("displayed_through_hot_w_per_hz"),
        dens("displayed_through_cold_w_per_hz"),
        enr_db,
        cold_temperature_k=tc_k,
    )
    expected = y_factor_point(
        dens("displayed_dut_hot_w_per_hz"),
        dens("displayed_dut_cold_w_per_hz"),
        enr_db,
        cold_temperature_k=tc_k,
        calibration=cal,
    )
    # 4.5 standard uncertainties: a false alarm about once in 150 000 runs (normal law)
    assert point.nf_db == pytest.approx(expected.nf_db, abs=4.5 * point.u_nf_db)
    assert point.gain_db == pytest.approx(expected.gain_db, abs=4.5 * point.u_gain_db)

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
    exec(compile(_example(), str(README), "exec"), ns)  # our own README, run as written
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


def test_readme_sweep_runs_as_written_and_agrees_with_the_simulated_truth(
    tmp_path, monkeypatch, capsys
):
    import shutil

    import noisebench as nb

    blocks = re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), re.S)
    assert len(blocks) >= 2, "README.md must hold the five-line sweep"
    sweep = blocks[1]
    assert len([line for line in sweep.splitlines() if line.strip()]) <= 5 + 1  # + its import
    shutil.copytree(README.parent / "examples", tmp_path / "examples")
    monkeypatch.chdir(tmp_path)  # as from the repository folder, without writing into it
    ns: dict = {}
    exec(compile(sweep, str(README), "exec"), ns)  # our own README, run as written
    lines = capsys.readouterr().out.splitlines()
    record, folder = ns["record"], ns["folder"]
    assert len(lines) == len(record.points[::11]) >= 5
    for line in lines:
        assert re.fullmatch(r"\d\.\d\d GHz  NF \d+\.\d\d ± \d+\.\d\d dB  G \d+\.\d", line)
    assert record.info.status == "complete" and 50 <= len(record.points) <= 56
    assert (folder / "results.csv").is_file() and (folder / "report.html").is_file()
    # the simulator's true DUT NF: every point within 4 combined standard uncertainties of its
    # budget (4 u: a false alarm about once in 16 000 points, normal law)
    truth = nb.SimulatedBench.from_scenario("demo-lna", seed=1).truth(
        [p.freq_hz for p in record.points]
    )
    budgets = {b["freq_hz"]: b for b in record.budgets}
    for point, nf in zip(record.points, truth["nf_db"], strict=True):
        u = budgets[point.freq_hz]["u_combined_db"]
        assert abs(point.nf_db - float(nf)) < 4 * u, (point.freq_hz, point.nf_db, float(nf), u)

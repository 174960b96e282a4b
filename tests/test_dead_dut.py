"""A dead, unpowered or disconnected DUT never passes: end to end on the simulated bench.

The scenario ``demo-lna-unpowered`` is the demo bench with its LNA switched off (``powered =
false``: the unit only isolates, about 40 dB, as an unpowered amplifier does). Each front end
(`noisebench run`, `noisebench station`, the pytest plugin) and both methods (and the gain
method with a stated, not measured, gain) must end without a PASS.
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import pytest

from noisebench.frontends import cli
from noisebench.results.store import load_run
from noisebench.sims.bench import SimulatedBench

pytest_plugins = ["pytester"]

DEAD = "sim://demo-lna-unpowered?seed=4"
ENR_CSV = Path(__file__).resolve().parents[1] / "examples" / "enr_demo_source.csv"

COMMON = """\
[dut]
id = "DEAD-1"
[bench]
analyzer = {{ resource = "{bench}", compression_dbm = -3.0 }}
{extra_bench}
[acquisition]
rbw_hz = 1e6
span_hz = 6e6
attenuation_db = 0
target_u_nf_db = 0.2
time_limit_s = 3
[sweep]
freqs_hz = [1e9, 2e9]
[expect]
dut_gain_db = 20.0
[limits]
[[limits.bands]]
start_hz = 0.5e9
stop_hz = 6e9
nf_max_db = 2.2
gain_min_db = 19.0
[output]
plots = false
report = false
"""

METHODS = {
    "y_factor": ('method = "y_factor"\n', f'[enr]\ntable = "{ENR_CSV.as_posix()}"\n', ""),
    "gain_measured": (
        'method = "gain"\n',
        '[gain]\nsource = "measure"\nmax_gain_db = 30.0\ndut_p1db_out_dbm = 14.0\n',
        'generator = { resource = "sim", max_level_dbm = -10.0 }\n'
        'noise_source = { drive = "auto" }',
    ),
    "gain_stated": ('method = "gain"\n', '[gain]\nsource = "constant"\nvalue_db = 25.0\n', ""),
}


def _plan(folder: Path, method: str, bench: str = DEAD) -> Path:
    head, tail, extra_bench = METHODS[method]
    text = head + COMMON.format(bench=bench, extra_bench=extra_bench) + tail
    if method == "gain_stated":  # a stated gain cannot be held to a gain limit (refused)
        text = text.replace("gain_min_db = 19.0\n", "")
    path = folder / f"{method}.toml"
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def station_outcomes(plan: Path, folder: Path, serials: tuple[str, ...], capsys) -> list[str]:
    """Run ``noisebench station`` on ``plan`` for units ``serials`` (lot LX, no database) and
    return each unit's outcome from the station summary."""
    units = [arg for serial in serials for arg in ("--unit", f"SN:{serial};LOT:LX")]
    code = cli.main(
        ["station", str(plan), *units, "--no-db", "--folder", str(folder)]
        + ["--station-id", "bench-9"]
    )
    capsys.readouterr()
    assert code in (cli.EXIT_OK, cli.EXIT_MEASUREMENT)
    summary = json.loads((folder / "station_summary.json").read_text(encoding="utf-8"))
    return [u.get("outcome") or u.get("verdict") for u in summary["units"]]


def run_plugin(pytester: pytest.Pytester, plan: Path, test_unit: str, *options: str):
    """Run ``test_unit`` (a user's test file) under the noisebench pytest plugin with ``plan``
    as ``--nb-plan`` and any further ``options``; the plugin is loaded explicitly, nothing
    else autoloads."""
    plan.rename(pytester.path / "plan.toml")
    pytester.makepyfile(test_unit=test_unit)
    return pytester.runpytest(
        "-p",
        "noisebench.frontends.pytest_plugin",
        "-p",
        "no:cacheprovider",
        "--nb-plan",
        "plan.toml",
        *options,
    )


def test_the_unpowered_scenario_only_attenuates():
    dead = SimulatedBench.from_scenario("demo-lna-unpowered", seed=1)
    alive = SimulatedBench.from_scenario("demo-lna", seed=1)
    truth = dead.truth(2e9)
    assert float(truth["gain_db"][0]) == pytest.approx(-40.0)
    # a passive network at ambient (296 K): F = 1 + (L - 1) 296 / 290 (Friis, passive loss)
    assert float(truth["te_k"][0]) == pytest.approx((1e4 - 1) * 296.0, rel=1e-9)
    assert dead.scenario.noise_source == alive.scenario.noise_source  # only the DUT changed


@pytest.mark.parametrize("method", sorted(METHODS))
def test_run_never_passes_a_dead_dut(tmp_path, method, capsys):
    folder = tmp_path / "run"
    code = cli.main(["-q", "run", str(_plan(tmp_path, method)), "--out", str(folder)])
    err = capsys.readouterr().err
    record = load_run(folder)
    assert record.verdict is not None, "a run with limits always has a verdict"
    assert record.verdict["unit"] in ("fail", "indeterminate")
    if not record.points:  # every point refused: the message names the likely cause
        assert code == cli.EXIT_MEASUREMENT
        assert "powered" in err or "unpowered" in err


def test_station_never_passes_a_dead_dut(tmp_path, capsys):
    folder = tmp_path / "station"
    outcomes = station_outcomes(_plan(tmp_path, "gain_stated"), folder, ("D1", "D2"), capsys)
    assert len(outcomes) == 2 and "pass" not in outcomes


def test_pytest_plugin_never_passes_a_dead_dut(pytester: pytest.Pytester, monkeypatch):
    monkeypatch.setenv("PYTEST_DISABLE_PLUGIN_AUTOLOAD", "1")
    plan = _plan(pytester.path, "y_factor", bench="sim://demo-lna?seed=1")
    unit = """
        import pytest
        from noisebench.frontends.pytest_plugin import assert_verdict

        def test_whole_plan(nb_run_plan):
            assert_verdict(nb_run_plan(), "pass")

        def test_one_point(nb_measure_point):
            # a dead DUT passes about 1e-4 of the source's excess noise, far below the reading
            # noise, so which outcome a run gets depends on the draws (the schedule's order
            # changes them); every outcome of the class is correct and the test accepts
            # exactly that class: refused by the physics (hot not above cold, or a noise
            # temperature far below zero, each naming the DUT's power), or a number that
            # can never pass: Y too small, and a noise figure far above any LNA's or flagged
            # negative_te (never PASS)
            try:
                point = nb_measure_point(2.0e9)
            except AssertionError as exc:
                assert "DUT is powered" in str(exc)
                return
            flags = {f.value for f in point.flags}
            assert "y_too_small" in flags
            assert point.nf_db > 20.0 or "negative_te" in flags
        """
    result = run_plugin(pytester, plan, unit, "--nb-bench", DEAD)
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(["*unit verdict is *, expected PASS*"])


def test_calibration_flags_reach_the_csv_the_report_and_the_database(tmp_path, capsys):
    """Reported: a calibration that hit its time limit only printed a warning; the points
    measured with it did not say so. Now results.csv, report.html and the database carry
    ``cal_time_limit`` on every point that used it."""
    import csv
    import sqlite3

    from noisebench.results.database import ResultsDatabase

    plan = tmp_path / "plan.toml"
    plan.write_text(
        "\n".join(
            [
                'method = "y_factor"',
                "[dut]",
                'id = "CALTL-1"',
                "[bench]",
                'analyzer = { resource = "sim://demo-lna?seed=1", compression_dbm = -3.0 }',
                "[acquisition]",
                "rbw_hz = 1e6",
                "span_hz = 6e6",
                "attenuation_db = 0",
                "target_u_nf_db = 0.01",  # far below what 0.5 s can reach
                "time_limit_s = 0.5",
                "[sweep]",
                "freqs_hz = [1e9, 2e9]",
                "[enr]",
                f'table = "{ENR_CSV.as_posix()}"',
                "[output]",
                "plots = false",
            ]
        ),
        encoding="utf-8",
    )
    folder = tmp_path / "run"
    assert cli.main(["-q", "run", str(plan), "--out", str(folder)]) == cli.EXIT_OK
    capsys.readouterr()
    with open(folder / "results.csv", encoding="utf-8", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == 2
    assert all("cal_time_limit" in row["flags"].split(";") for row in rows)
    assert "cal_time_limit" in (folder / "report.html").read_text(encoding="utf-8")
    url = tmp_path / "results.sqlite"
    with ResultsDatabase(url) as db:
        db.store_run(load_run(folder))
    with sqlite3.connect(url) as con:
        flags = [row[0] for row in con.execute("SELECT flags FROM points ORDER BY freq_hz")]
    assert len(flags) == 2 and all("cal_time_limit" in f.split(";") for f in flags)


def _plan_with(tmp_path: Path, replace: tuple[str, str]) -> Path:
    path = _plan(tmp_path, "y_factor", bench="sim://demo-lna?seed=1")
    text = path.read_text(encoding="utf-8")
    assert replace[0] in text
    path.write_text(text.replace(*replace), encoding="utf-8")
    return path


def test_a_celsius_temperature_is_refused_by_validate_and_run(tmp_path, capsys):
    # reported: source_temperature_k = 23 (meant 23 degC): validate ok, run exit 0, NF 2.5 dB off
    plan = _plan_with(tmp_path, ("[expect]", "[corrections]\nsource_temperature_k = 23\n[expect]"))
    assert cli.main(["validate", str(plan)]) == cli.EXIT_INPUT
    err = capsys.readouterr().err
    assert "corrections.source_temperature_k: 23 K is below the plausible 200 K" in err
    assert "23 degC would be 296.15 K" in err
    folder = tmp_path / "run"
    assert cli.main(["-q", "run", str(plan), "--out", str(folder)]) == cli.EXIT_INPUT
    assert not folder.exists()  # refused before any instrument was touched


@pytest.mark.parametrize(
    "replace",
    [
        ("rbw_hz = 1e6", "rbw_hz = 1"),  # 1 meant as 1 MHz
        ("freqs_hz = [1e9, 2e9]", "[[sweep.segments]]\nfreqs_hz = [1e9]\nrbw_hz = 1"),
    ],
)
def test_an_rbw_in_mhz_is_refused(tmp_path, capsys, replace):
    plan = _plan_with(tmp_path, replace)
    assert cli.main(["validate", str(plan)]) == cli.EXIT_INPUT
    err = capsys.readouterr().err
    assert "rbw_hz: 1 Hz resolves the 6 MHz span into 6e+06 cells" in err

"""A gain limit is never judged against a gain that was stated instead of measured.

Reported: the gain method with ``[gain] source = "constant"`` (or ``"file"``) reports the stated
gain as the point's ``gain_db``; a ``[limits]`` minimum gain then passed trivially, whatever the
unit did (an unpowered amplifier included). The rule (flag policy in DEVELOPERS.md): a plan that
holds a gain limit with a stated gain is refused by ``validate``/``run``/``station``/the pytest
plugin, naming the limit and the fix; the points of a stated-gain run carry
``gain_not_measured`` (results.csv, database), and ``judge`` makes every gain and flatness check
of such a point INDETERMINATE (a FAIL included: the stated number says nothing about the unit),
so a record judged by any other path (a Plan built in Python, a re-judged stored run) cannot
pass a gain limit either. The NF check is unaffected.
"""

from __future__ import annotations

import csv
import json
import sqlite3
import textwrap
from pathlib import Path

import pytest

from noisebench.frontends import cli
from noisebench.results.database import ResultsDatabase
from noisebench.results.production import apply_budgets_and_verdict
from noisebench.results.store import load_run
from noisebench.running.plan import Plan, load_plan
from noisebench.science.limits import LimitMask, Verdict, judge
from noisebench.science.point import Method, PointFlag, PointResult

pytest_plugins = ["pytester"]

ALIVE = "sim://demo-lna?seed=2"

PLAN = """\
method = "gain"
[dut]
id = "STATED-1"
[bench]
analyzer = {{ resource = "{bench}", compression_dbm = -3.0 }}
[acquisition]
rbw_hz = 1e6
span_hz = 6e6
attenuation_db = 0
target_u_nf_db = 0.2
time_limit_s = 3
[sweep]
freqs_hz = [1e9, 2e9]
[gain]
{gain}
[limits]
[[limits.bands]]
start_hz = 0.5e9
stop_hz = 6e9
nf_max_db = 6.0
{gain_limit}
[output]
plots = false
report = false
"""

CONSTANT = 'source = "constant"\nvalue_db = 25.0'


def _plan(folder: Path, *, gain: str = CONSTANT, gain_limit: str = "gain_min_db = 19.0") -> Path:
    path = folder / "plan.toml"
    text = PLAN.format(bench=ALIVE, gain=gain, gain_limit=gain_limit)
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def _point(freq_hz: float, gain_db: float, flags: list[PointFlag]) -> PointResult:
    return PointResult(
        freq_hz=freq_hz,
        method=Method.GAIN,
        nf_db=1.0,
        te_k=75.0,
        gain_db=gain_db,
        u_nf_db=0.01,
        u_te_k=0.7,
        u_gain_db=0.01,
        flags=flags,
    )


BAND = {"start_hz": 0.5e9, "stop_hz": 6e9, "nf_max_db": 2.0}


@pytest.mark.parametrize(
    ("limit", "gain_db"),
    [
        ({"gain_min_db": 19.0}, 25.0),  # would PASS trivially
        ({"gain_min_db": 30.0}, 25.0),  # would FAIL on an assumed number
        ({"gain_max_db": 30.0}, 25.0),
    ],
)
def test_a_gain_check_on_a_stated_gain_is_indeterminate(limit, gain_db):
    mask = LimitMask.from_dict({"bands": [{**BAND, **limit}]})
    measured = judge([_point(1e9, gain_db, [])], None, mask)
    assert measured.unit in (Verdict.PASS, Verdict.FAIL)  # a measured gain is judged
    stated = judge([_point(1e9, gain_db, [PointFlag.GAIN_NOT_MEASURED])], None, mask)
    assert stated.unit is Verdict.INDETERMINATE
    nf_check, gain_check = stated.points[0].checks
    assert nf_check.quantity == "nf_db" and nf_check.verdict is Verdict.PASS  # NF unaffected
    assert gain_check.verdict is Verdict.INDETERMINATE
    assert gain_check.value == gain_db  # the stated value is still shown
    assert '[gain] source = "measure"' in gain_check.note


def test_flatness_of_stated_gains_is_indeterminate():
    mask = LimitMask.from_dict({"bands": [{**BAND, "flatness_db": 1.0}]})
    flag = [PointFlag.GAIN_NOT_MEASURED]
    clean = judge([_point(1e9, 25.0, []), _point(2e9, 25.2, [])], None, mask)
    assert clean.unit is Verdict.PASS
    stated = judge([_point(1e9, 25.0, flag), _point(2e9, 25.2, flag)], None, mask)
    assert stated.unit is Verdict.INDETERMINATE
    flat = stated.bands[0].flatness
    assert flat is not None and flat.quantity == "flatness_db"
    assert flat.verdict is Verdict.INDETERMINATE and "stated" in flat.note


@pytest.mark.parametrize(
    "gain_limit", ["gain_min_db = 19.0", "gain_max_db = 30.0", "flatness_db = 1.0"]
)
def test_validate_and_run_refuse_a_gain_limit_on_a_stated_gain(tmp_path, capsys, gain_limit):
    plan = _plan(tmp_path, gain_limit=gain_limit)
    key = gain_limit.split(" ")[0]
    assert cli.main(["validate", str(plan)]) == cli.EXIT_INPUT
    err = capsys.readouterr().err
    assert f"limits.bands[0].{key}" in err and 'source = "measure"' in err
    out = tmp_path / "run"
    assert cli.main(["-q", "run", str(plan), "--out", str(out)]) == cli.EXIT_INPUT
    assert f"limits.bands[0].{key}" in capsys.readouterr().err
    assert not (out / "results.csv").exists()


def test_a_gain_file_is_stated_too(tmp_path, capsys):
    (tmp_path / "gain.csv").write_text("freq_hz,gain_db\n1e8,25\n1e10,25\n", encoding="utf-8")
    plan = _plan(tmp_path, gain='source = "file"\nfile = "gain.csv"')
    assert cli.main(["validate", str(plan)]) == cli.EXIT_INPUT
    assert 'source = "file"' in capsys.readouterr().err


def test_station_refuses_a_gain_limit_on_a_stated_gain(tmp_path, capsys):
    folder = tmp_path / "station"
    args = ["station", str(_plan(tmp_path)), "--unit", "SN:S1", "--no-db"]
    code = cli.main([*args, "--folder", str(folder), "--station-id", "bench-9"])
    assert code == cli.EXIT_INPUT
    assert "limits.bands[0].gain_min_db" in capsys.readouterr().err
    summary = folder / "station_summary.json"
    if summary.exists():  # nothing was judged, so nothing passed
        units = json.loads(summary.read_text(encoding="utf-8"))["units"]
        assert all((u.get("outcome") or u.get("verdict")) != "pass" for u in units)


def test_pytest_plugin_refuses_the_plan_and_a_python_plan_never_passes_gain(
    pytester: pytest.Pytester, monkeypatch
):
    monkeypatch.setenv("PYTEST_DISABLE_PLUGIN_AUTOLOAD", "1")
    _plan(pytester.path)
    nf_only = _plan(pytester.path, gain_limit="")
    nf_only.rename(pytester.path / "nf_only.toml")
    _plan(pytester.path)
    pytester.makepyfile(
        test_unit="""
        import pytest
        from noisebench.running.plan import Plan, load_plan

        def test_the_plan_file_is_refused(nb_run_plan):
            # the plugin turns the plan's problem into a one-line test failure
            with pytest.raises(pytest.fail.Exception, match=r"limits\\.bands\\[0\\]\\.gain_min_db"):
                nb_run_plan("plan.toml")

        def test_a_plan_built_in_python_is_judged_indeterminate(nb_run_plan):
            # the schema alone (no cross-field check) lets the gain limit through: the flag
            # policy still keeps the gain check from passing
            data = load_plan("nf_only.toml").model_dump(mode="json", exclude_none=True)
            data["limits"]["bands"][0]["gain_min_db"] = 19.0
            plan = Plan.model_validate(data)
            plan.with_base_dir(load_plan("nf_only.toml").base_dir)
            record = nb_run_plan(plan)
            assert record.verdict["unit"] == "indeterminate"
            gain_checks = [
                c for p in record.verdict["points"] for c in p["checks"]
                if c["quantity"] == "gain_db"
            ]
            assert gain_checks and all(c["verdict"] == "indeterminate" for c in gain_checks)
            assert all("gain_not_measured" in p.flags for p in record.points)
        """
    )
    result = pytester.runpytest(
        "-p", "noisebench.frontends.pytest_plugin", "-p", "no:cacheprovider", "--nb-bench", ALIVE
    )
    result.assert_outcomes(passed=2)


def test_stated_gain_points_carry_the_flag_into_csv_and_a_rejudged_verdict_into_the_db(
    tmp_path, capsys
):
    nf_only = _plan(tmp_path, gain_limit="")
    folder = tmp_path / "run"
    assert cli.main(["-q", "run", str(nf_only), "--out", str(folder)]) == cli.EXIT_OK
    capsys.readouterr()
    with open(folder / "results.csv", encoding="utf-8", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == 2
    assert all("gain_not_measured" in row["flags"].split(";") for row in rows)
    assert all(float(row["gain_db"]) == pytest.approx(25.0) for row in rows)
    record = load_run(folder)
    assert record.verdict is not None and record.verdict["unit"] == "pass"  # NF only: judged
    # the stored run re-judged with a gain limit (a Plan made in Python skips the cross-check)
    plan = load_plan(nf_only)
    data = plan.model_dump(mode="json", exclude_none=True)
    data["limits"]["bands"][0]["gain_min_db"] = 19.0
    gain_plan = Plan.model_validate(data)
    gain_plan.with_base_dir(plan.base_dir)
    rejudged = apply_budgets_and_verdict(record, gain_plan)
    assert rejudged.verdict is not None and rejudged.verdict["unit"] == "indeterminate"
    url = tmp_path / "results.sqlite"
    with ResultsDatabase(url) as db:
        db.store_run(rejudged)
    with sqlite3.connect(url) as con:
        (verdict,) = con.execute("SELECT verdict FROM runs").fetchone()
        flags = [row[0] for row in con.execute("SELECT flags FROM points")]
    assert verdict == "indeterminate"
    assert len(flags) == 2 and all("gain_not_measured" in f for f in flags)


def test_a_measured_gain_keeps_its_gain_limit(tmp_path):
    plan = _plan(
        tmp_path,
        gain='source = "measure"\nmax_gain_db = 30.0\ndut_p1db_out_dbm = 14.0',
    )
    text = plan.read_text(encoding="utf-8").replace(
        "compression_dbm = -3.0 }",
        'compression_dbm = -3.0 }\ngenerator = { resource = "sim", max_level_dbm = -10.0 }',
    )
    plan.write_text(text, encoding="utf-8")
    assert load_plan(plan).limits is not None  # accepted: the gain is measured

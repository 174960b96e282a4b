"""Production: station runs of simulated units into SQLite and a real PostgreSQL, the
``station`` / ``db`` commands, budgets and verdicts of finished runs, narrowed plans."""

from __future__ import annotations

import argparse
import io
import json
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from _postgres import fresh_database
from _production import FREQS_HZ, exact_sim, session_on, small_plan

from noisebench.errors import InputError
from noisebench.frontends.dbcli import DB_ENV, register
from noisebench.frontends.station import Station, StationSettings, UnitVariation, units_from_lines
from noisebench.results.database import SCHEMA_VERSION, ResultsDatabase
from noisebench.results.production import (
    INCOMPLETE_NOTE,
    apply_budgets_and_verdict,
    failing_points,
    plan_for_frequencies,
)
from noisebench.results.store import load_run
from noisebench.running.calibration import CalibrationStore
from noisebench.running.plan import PlanError, parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.science.point import Method, PointResult

VARIATION = UnitVariation(nf_sigma_db=0.2, weak_fraction=0.3, weak_nf_db=1.0)
LOT_LINES = [
    "SN:PA1;LOT:LA;PN:LNA-2",
    "SN:PA2;LOT:LA;PN:LNA-2",
    "SN:PA3;LOT:LA;PN:LNA-2",
    "SN:PB1;LOT:LB;PN:LNA-2",
    "SN:PB2;LOT:LB;PN:LNA-2",
    "SN:PA1;LOT:LA;PN:LNA-2",
]


# =========================================================================== station -> database


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    """One simulated bench, plan and calibration store shared by the station runs below."""
    folder = tmp_path_factory.mktemp("production")
    plan = small_plan(folder)
    return {
        "folder": folder,
        "plan": plan,
        "sim": (sim := exact_sim(seed=11)),
        "session": session_on(sim, plan),
        "store": CalibrationStore(),
    }


def _station_run(bench, name: str, database_url: str | None):
    settings = StationSettings(
        station_id=f"st-{name}",
        operator="op",
        unit_variation=VARIATION,
        folder=bench["folder"] / name,
        database_url=database_url,
    )
    with Station(
        bench["plan"], settings, session=bench["session"], calibrations=bench["store"]
    ) as station:
        summary = station.run(units_from_lines(LOT_LINES))
    return summary


@pytest.fixture(scope="module")
def sqlite_run(bench):
    summary = _station_run(bench, "sqlite", None)  # default: station.sqlite in the folder
    return summary, Path(summary.folder) / "station.sqlite"


@pytest.fixture(scope="module")
def pg_url(postgres_server):
    """A database of this module's own on the session's PostgreSQL server (conftest.py)."""
    return fresh_database(postgres_server, "nb_production")


def _point_rows(db: ResultsDatabase) -> dict[tuple[str, float], tuple]:
    """(run id, freq) -> (expanded U, verdict, budget terms) straight from the tables."""
    import sqlalchemy as sa

    query = sa.text(
        "SELECT r.run_id, p.freq_hz, p.expanded_u_nf_db, p.verdict, "
        "(SELECT COUNT(*) FROM budget_terms t WHERE t.point_fk = p.id) "
        "FROM points p JOIN runs r ON r.id = p.run_fk"
    )
    with db.engine.connect() as con:
        return {(run, float(f)): (u, v, n) for run, f, u, v, n in con.execute(query)}


def _check_database(db: ResultsDatabase, summary) -> None:
    records = {u.run_id: load_run(Path(u.folder)) for u in summary.units}
    assert sorted(db.run_ids()) == sorted(records)
    assert db.count("units") == 5 and db.count("stations") == 1
    # every point's verdict and expanded uncertainty is the run's, with its budget terms
    rows = _point_rows(db)
    for run_id, record in records.items():
        for point in record.points:
            u, verdict, terms = rows[(run_id, point.freq_hz)]
            budget = record.budget_at(point.freq_hz)
            assert u == pytest.approx(budget["U_expanded_db"], rel=1e-12)
            assert verdict == record.verdict_at(point.freq_hz)["verdict"]
            assert terms == len(budget["contributions"]) > 0
    # yield per lot: the station's latest attempt per serial, counted as the database does
    latest = summary.latest()
    for lot in ("LA", "LB"):
        outcomes = Counter(u.outcome for u in latest if u.lot == lot)
        (row,) = db.yield_by_lot(lot)
        assert (row.units, row.passed, row.failed, row.indeterminate) == (
            sum(outcomes.values()),
            outcomes["pass"],
            outcomes["fail"],
            outcomes["indeterminate"],
        )
    # NF statistics over the latest runs, against numpy on the same numbers
    latest_records = [records[u.run_id] for u in latest]
    for stats in db.nf_statistics():
        nfs = np.array(
            [p.nf_db for r in latest_records for p in r.points if p.freq_hz == stats.freq_hz]
        )
        assert stats.count == len(nfs) == 5
        assert stats.mean_nf_db == pytest.approx(np.mean(nfs), rel=1e-12)  # numpy
        assert stats.std_nf_db == pytest.approx(np.std(nfs, ddof=1), rel=1e-9)  # numpy
    # the re-tested unit has both runs, newest first
    history = db.unit_history("PA1", "LNA-2")
    assert [h.run_id for h in history] == [summary.units[5].run_id, summary.units[0].run_id]
    assert all(h.station == summary.station_id for h in history)


def test_station_writes_verdicts_and_budgets_into_sqlite(sqlite_run):
    summary, path = sqlite_run
    assert path.is_file() and summary.database.startswith("sqlite:///")
    assert summary.counts()["error"] == 0 and not summary.not_stored()
    with ResultsDatabase(path) as db:
        _check_database(db, summary)


def test_station_writes_verdicts_and_budgets_into_postgresql(bench, pg_url, sqlite_run):
    """The SQLite station run (``sqlite_run``) calibrates the shared bench first, so this run
    reuses that calibration whichever order the tests are selected in."""
    summary = _station_run(bench, "postgres", pg_url)
    assert summary.database.startswith("postgresql+psycopg://")
    assert not summary.not_stored()
    assert all(u.calibrated_groups == 0 for u in summary.units)  # the bench stayed calibrated
    with ResultsDatabase(pg_url) as db:
        _check_database(db, summary)


def test_db_import_into_postgresql_skips_runs_already_stored(sqlite_run, pg_url):
    import sqlalchemy as sa

    engine = sa.create_engine(pg_url, isolation_level="AUTOCOMMIT")
    with engine.connect() as con:
        con.execute(sa.text('DROP DATABASE IF EXISTS "nb_import"'))
        con.execute(sa.text('CREATE DATABASE "nb_import"'))
    engine.dispose()
    url = pg_url.rsplit("/", 1)[0] + "/nb_import"
    summary, _ = sqlite_run
    code, out = _cli("db", "import", summary.folder, "--db", url)
    assert code == 0 and "6 run(s) stored, 0 already in the database" in out
    code, out = _cli("db", "import", summary.folder, "--db", url)
    assert "0 run(s) stored, 6 already in the database" in out
    with ResultsDatabase(url) as db:
        _check_database(db, summary)


# =========================================================================== commands


def _cli(*argv: str) -> tuple[int, str]:
    """Parse like the noisebench CLI (register() on its sub-commands) and run the handler."""
    parser = argparse.ArgumentParser(prog="noisebench")
    register(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(list(argv))
    out = io.StringIO()
    return args.func(args, out), out.getvalue()


def test_db_queries_print_tables_and_json(sqlite_run, monkeypatch):
    summary, path = sqlite_run
    with ResultsDatabase(path) as db:
        lots = {y.lot: y for y in db.yield_by_lot()}
        stats = db.nf_statistics()
    code, out = _cli("db", "yield", "--db", str(path))
    assert code == 0
    header, rule, *rows = out.splitlines()
    assert header.split() == [
        "lot",
        "units",
        "pass",
        "fail",
        "indeterminate",
        "not",
        "judged",
        "yield",
    ]
    la = lots["LA"]
    assert rows[0].split()[:6] == [
        "LA",
        "3",
        str(la.passed),
        str(la.failed),
        str(la.indeterminate),
        "0",
    ]
    assert rows[0].endswith(f"{100 * la.yield_fraction:.1f} %")
    monkeypatch.setenv(DB_ENV, str(path))  # the environment names the database
    _, out = _cli("db", "yield", "--json", "--lot", "LB")
    (entry,) = json.loads(out)
    assert entry["lot"] == "LB" and entry["yield_fraction"] == pytest.approx(
        lots["LB"].yield_fraction
    )
    _, out = _cli("db", "stats", "--json")
    assert [s["freq_hz"] for s in json.loads(out)] == [s.freq_hz for s in stats]
    _, out = _cli("db", "stats")
    assert "1 GHz" in out and f"{stats[0].mean_nf_db:.3f}" in out
    _, out = _cli("db", "history", "PA1")
    assert out.splitlines()[2].startswith(summary.units[5].run_id)  # newest first
    _, out = _cli("db", "history", "NOPE")
    assert "no runs of unit 'NOPE'" in out
    _, out = _cli("db", "info")
    assert f"schema version {SCHEMA_VERSION}" in out and "runs          6" in out


def test_db_commands_refuse_a_missing_database(tmp_path, monkeypatch):
    monkeypatch.delenv(DB_ENV, raising=False)
    with pytest.raises(InputError, match=f"no results database given.*{DB_ENV}"):
        _cli("db", "yield")
    with pytest.raises(InputError, match="no database file"):
        _cli("db", "stats", "--db", str(tmp_path / "absent.sqlite"))
    assert not (tmp_path / "absent.sqlite").exists()  # a query never creates a database
    with pytest.raises(InputError, match="holds no run"):
        _cli("db", "import", str(tmp_path), "--db", str(tmp_path / "new.sqlite"))


def test_db_import_can_judge_again_with_another_plan(sqlite_run, tmp_path, bench):
    summary, _ = sqlite_run
    strict = tmp_path / "strict.toml"
    strict.write_text(_plan_toml(nf_max_db=0.1), encoding="utf-8")
    target = tmp_path / "rejudged.sqlite"
    code, out = _cli("db", "import", summary.folder, "--db", str(target), "--plan", str(strict))
    assert code == 0 and out.count("verdict fail") == 6
    with ResultsDatabase(target) as db:
        assert {y.lot: (y.units, y.failed) for y in db.yield_by_lot()} == {
            "LA": (3, 3),
            "LB": (2, 2),
        }


def _plan_toml(*, nf_max_db: float) -> str:
    return f"""\
method = "y_factor"
station = "cli-station"
[bench]
analyzer = "sim://demo-lna?seed=5"
[acquisition]
rbw_hz = 1e6
span_hz = 4e6
attenuation_db = 0.0
min_averages = 8
max_averages = 400
target_u_nf_db = 0.05
[sweep]
freqs_hz = [1.0e9, 2.0e9]
[uncertainty]
enr_db = 0.05
[limits]
[[limits.bands]]
start_hz = 0.9e9
stop_hz = 2.1e9
nf_max_db = {nf_max_db}
[output]
plots = false
report = false
"""


def test_station_command_measures_the_units_it_is_given(tmp_path, capsys):
    plan = tmp_path / "plan.toml"
    plan.write_text(_plan_toml(nf_max_db=1.3), encoding="utf-8")
    folder = tmp_path / "station"
    code, out = _cli(
        "station",
        str(plan),
        "--unit",
        "SN:C1;LOT:LC",
        "--unit",
        "C2",
        "--lot",
        "LD",
        "--folder",
        str(folder),
        "--operator",
        "bob",
    )
    assert code == 0
    assert "station cli-station: plan" in out  # the plan's station is the default id
    assert "C1 (lot LC): " in out and "C2 (lot LD): " in out
    assert "Station cli-station, operator bob: 2 unit(s), 2 run(s)" in out
    with ResultsDatabase(folder / "station.sqlite") as db:
        assert db.count("runs") == 2
        assert sorted(y.lot for y in db.yield_by_lot()) == ["LC", "LD"]
    with pytest.raises(InputError, match="cannot be combined with --unit"):
        _cli("station", str(plan), "--units", "x.txt", "--unit", "C3")
    with pytest.raises(InputError, match="cannot be combined with --db"):
        _cli("station", str(plan), "--no-db", "--db", "x.sqlite", "--unit", "C3")


# =========================================================================== budgets and verdicts


@pytest.fixture(scope="module")
def judged_run(tmp_path_factory):
    """A finished run whose budgets and verdict the sequencer computed."""
    folder = tmp_path_factory.mktemp("judged")
    plan = small_plan(
        folder,
        nf_max_db=1.6,
        uncertainty={"enr_db": 0.05, "linearity_db": 0.01, "coverage_factor": 3.0},
    )
    record = Sequencer(plan, session_on(exact_sim(seed=21), plan)).run(folder / "run")
    assert len(record.budgets) == len(FREQS_HZ) and record.verdict is not None
    return plan, record


def test_budgets_and_verdict_are_recomputed_as_the_sequencer_did(judged_run):
    plan, record = judged_run
    bare = record.model_copy(update={"budgets": [], "verdict": None})
    applied = apply_budgets_and_verdict(bare, plan)
    assert applied.budgets == record.budgets
    assert applied.verdict == record.verdict
    for budget in applied.budgets:  # expanded U = k u_c with the plan's k (JCGM 100:2008, 6.2)
        assert budget["k"] == 3.0
        assert budget["U_expanded_db"] == pytest.approx(3.0 * budget["u_combined_db"])
    assert apply_budgets_and_verdict(applied, plan) == applied  # idempotent


def test_an_incomplete_run_never_passes(judged_run):
    plan, record = judged_run
    assert record.verdict["unit"] == "pass"
    partial = record.model_copy(
        update={"points": record.points[:1], "budgets": [], "verdict": None}
    )
    judged = apply_budgets_and_verdict(partial, plan)
    assert judged.verdict["unit"] == "indeterminate"
    assert judged.verdict["points"][0]["verdict"] == "pass"  # the measured point itself passes
    assert INCOMPLETE_NOTE.format(missing=1, total=2) in judged.verdict["notes"]
    strict = small_plan(plan.base_dir, nf_max_db=0.1)
    assert apply_budgets_and_verdict(partial, strict).verdict["unit"] == "fail"  # fail stays


def test_a_run_without_any_point_is_indeterminate_not_unjudged(judged_run):
    plan, record = judged_run
    empty = record.model_copy(update={"points": [], "budgets": [], "verdict": None})
    verdict = apply_budgets_and_verdict(empty, plan).verdict
    assert verdict["unit"] == "indeterminate" and verdict["points"] == []
    assert INCOMPLETE_NOTE.format(missing=2, total=2) in verdict["notes"]


def test_a_point_without_a_budget_is_judged_on_its_statistics_and_warned(judged_run):
    plan, record = judged_run
    odd = PointResult(
        freq_hz=1.5e9, method=Method.Y_FACTOR, nf_db=1.0, te_k=75.1, u_nf_db=0.05, u_te_k=3.0
    )  # no densities: no budget can be made
    with_odd = record.model_copy(update={"points": [*record.points, odd]})
    judged = apply_budgets_and_verdict(with_odd, plan)
    assert len(judged.budgets) == len(FREQS_HZ)
    assert any("no uncertainty budget at 1.5 GHz" in w for w in judged.warnings)
    entry = judged.verdict_at(1.5e9)
    assert entry["U_nf_db"] == pytest.approx(3.0 * 0.05)  # k * u_nf_db, k from the plan
    assert any("without a budget" in note for note in judged.verdict["notes"])


def test_without_the_sections_nothing_is_changed(judged_run):
    plan, record = judged_run
    bare = small_plan(plan.base_dir, limits=False, uncertainty=False)
    assert apply_budgets_and_verdict(record, bare) == record
    with pytest.raises(InputError, match="must be a RunRecord"):
        apply_budgets_and_verdict({"points": []}, plan)


def test_failing_points_lists_only_what_did_not_pass(judged_run):
    plan, record = judged_run
    assert failing_points(record) == []
    strict = apply_budgets_and_verdict(record, small_plan(plan.base_dir, nf_max_db=0.1))
    failing = failing_points(strict)
    assert [p["freq_hz"] for p in failing] == list(FREQS_HZ)
    assert all(
        c["verdict"] == "fail" and c["quantity"] == "nf_db" for p in failing for c in p["checks"]
    )


# =========================================================================== narrowed plans


def test_a_narrowed_plan_keeps_the_settings_of_each_frequency(tmp_path):
    plan = parse_plan(
        {
            "method": "y_factor",
            "bench": {"analyzer": "sim://demo-lna?seed=1"},
            "acquisition": {"rbw_hz": 1e6, "span_hz": 4e6},
            "sweep": {
                "freqs_hz": [0.5e9],
                "segments": [
                    {"start_hz": 1e9, "stop_hz": 2e9, "points": 3, "rbw_hz": 2e6, "span_hz": 8e6},
                    {"freqs_hz": [3e9], "rbw_hz": 3e5, "span_hz": 1.2e6},
                ],
            },
        },
        base_dir=tmp_path,
    )
    narrowed = plan_for_frequencies(plan, [4e9, 3e9, 1.25e9, 0.5e9])
    rbw = {p.freq_hz: p.policy.rbw_hz for p in narrowed.points()}
    assert rbw == {0.5e9: 1e6, 1.25e9: 2e6, 3e9: 3e5, 4e9: 1e6}
    assert [p.freq_hz for p in plan_for_frequencies(plan, 1.5e9).points()] == [1.5e9]
    assert plan.freqs_hz().tolist() == [0.5e9, 1e9, 1.5e9, 2e9, 3e9]  # the original is kept


def test_a_narrowed_plan_is_checked_like_a_loaded_one(tmp_path):
    enr = tmp_path / "enr.csv"
    enr.write_text("freq_hz,enr_db,u_enr_db\n1e9,15.2,0.1\n3e9,14.9,0.1\n", encoding="utf-8")
    plan = parse_plan(
        {
            "method": "y_factor",
            "bench": {"analyzer": "TCPIP0::127.0.0.1::5025::SOCKET"},
            "enr": {"table": "enr.csv"},
            "sweep": {"freqs_hz": [1e9, 2e9]},
        },
        base_dir=tmp_path,
    )
    with pytest.raises(PlanError, match="enr.table: enr.csv covers 1 GHz to 3 GHz"):
        plan_for_frequencies(plan, [2e9, 5e9])
    with pytest.raises(PlanError, match="is listed twice"):
        plan_for_frequencies(plan, [2e9, 2e9])
    for bad, field in (
        ([], "freqs_hz"),
        ([1e9, -1.0], "freqs_hz[1]"),
        ([float("nan")], "freqs_hz[0]"),
        ([True], "freqs_hz[0]"),
    ):
        with pytest.raises(InputError) as info:
            plan_for_frequencies(plan, bad)
        assert info.value.field == field


def test_the_commands_run_under_the_noisebench_cli(monkeypatch, capsys, tmp_path):
    """Hooked into noisebench.frontends.cli (as the lead will: register() on its sub-commands),
    errors
    end as one line on stderr with the CLI's exit code."""
    from noisebench.frontends import cli

    original = cli.build_parser

    def build() -> argparse.ArgumentParser:
        parser = original()
        action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
        if "db" not in action.choices:  # not hooked in yet
            register(action)
        return parser

    monkeypatch.setattr(cli, "build_parser", build)
    monkeypatch.delenv(DB_ENV, raising=False)
    out = io.StringIO()
    assert cli.main(["db", "yield"], out=out) == cli.EXIT_INPUT
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [
        f"noisebench: error: --db: no results database given (pass --db "
        f"sqlite:///station.sqlite (or a path), or set {DB_ENV})"
    ]
    plan = tmp_path / "plan.toml"
    plan.write_text(_plan_toml(nf_max_db=1.3), encoding="utf-8")
    code = cli.main(
        [
            "station",
            str(plan),
            "--unit",
            "GOOD1",
            "--unit",
            "BAD\x1bUNIT",
            "--folder",
            str(tmp_path / "st"),
        ],
        out=out,
    )
    assert code == cli.EXIT_INPUT
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "line 2: unit: control character '\\x1b'" in err[0]
    assert not (tmp_path / "st" / "units").exists()  # nothing measured before the list is good

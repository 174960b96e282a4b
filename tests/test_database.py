"""Results database on SQLite and on a real PostgreSQL server.

The statistics are checked against numpy on the same numbers (source of the reference values:
``np.mean`` and ``np.std(ddof=1)``, the sample standard deviation).
"""

from __future__ import annotations

import multiprocessing as mp
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from _postgres import fresh_database

from noisebench.errors import InputError
from noisebench.results.database import SCHEMA_VERSION, DatabaseError, ResultsDatabase
from noisebench.results.store import RunInfo, RunRecord
from noisebench.science.point import Method, PointFlag, PointResult

FREQS = (1.0e9, 2.0e9, 3.0e9)
T_START = datetime(2026, 5, 4, 8, 0, tzinfo=timezone.utc)


def make_record(
    run_id: str,
    serial: str,
    nfs: tuple[float, ...],
    *,
    lot: str = "L1",
    verdict: str | None = "pass",
    minutes: int = 0,
    station: str = "st-1",
    status: str = "complete",
) -> RunRecord:
    points = [
        PointResult(
            freq_hz=f,
            method=Method.Y_FACTOR,
            nf_db=nf,
            te_k=290 * (10 ** (nf / 10) - 1),
            gain_db=20.0 + i,
            y_db=10.0,
            u_nf_db=0.03,
            u_te_k=2.0,
            flags=[PointFlag.SPURS_EXCLUDED] if i == 0 else [],
        )
        for i, (f, nf) in enumerate(zip(FREQS, nfs, strict=True))
    ]
    info = RunInfo(
        run_id=run_id,
        method=Method.Y_FACTOR,
        dut_id=serial,
        operator="op",
        station=station,
        started_at=T_START + timedelta(minutes=minutes),
        ended_at=T_START + timedelta(minutes=minutes + 1),
        status=status,
        notes={"lot": lot, "part_number": "LNA-1"},
    )
    budgets = [
        {
            "freq_hz": f,
            "method": "gum",
            "k": 2.0,
            "u_combined_db": 0.1,
            "U_expanded_db": 0.2,
            "contributions": [
                {
                    "name": "enr",
                    "u": 0.1,
                    "unit": "dB",
                    "sensitivity": 0.99,
                    "contribution_db": 0.099,
                }
            ],
        }
        for f in FREQS
    ]
    v = (
        None
        if verdict is None
        else {
            "unit": verdict,
            "points": [{"freq_hz": f, "verdict": verdict} for f in FREQS],
            "limits": [],
        }
    )
    return RunRecord(info=info, points=points, budgets=budgets, verdict=v)


def _fill(db: ResultsDatabase) -> None:
    # Unit A: failed first, passed on the re-test (latest counts); B failed; C in lot L2 passed.
    db.store_run(make_record("r1", "A", (1.0, 1.2, 1.4), verdict="fail", minutes=0))
    db.store_run(make_record("r2", "A", (0.9, 1.1, 1.3), verdict="pass", minutes=10))
    db.store_run(make_record("r3", "B", (1.5, 1.6, 1.7), verdict="fail", minutes=20))
    db.store_run(make_record("r4", "C", (0.8, 1.0, 1.2), lot="L2", verdict="pass", minutes=30))
    db.store_run(
        make_record("r5", "D", (0.7, 0.7, 0.7), verdict=None, minutes=40, status="interrupted")
    )


def _check_queries(db: ResultsDatabase) -> None:
    yields = {y.lot: y for y in db.yield_by_lot()}
    assert (yields["L1"].units, yields["L1"].passed, yields["L1"].failed) == (2, 1, 1)
    assert yields["L1"].yield_fraction == pytest.approx(0.5)
    assert (yields["L2"].units, yields["L2"].passed) == (1, 1)
    assert "D" not in [h.run_id for h in db.unit_history("D") if h.status == "complete"]

    stats = {s.freq_hz: s for s in db.nf_statistics()}
    latest = np.array([(0.9, 1.1, 1.3), (1.5, 1.6, 1.7), (0.8, 1.0, 1.2)])  # A(r2), B, C
    for i, f in enumerate(FREQS):
        assert stats[f].count == 3
        assert stats[f].mean_nf_db == pytest.approx(np.mean(latest[:, i]))
        assert stats[f].std_nf_db == pytest.approx(np.std(latest[:, i], ddof=1))
        assert stats[f].max_nf_db == pytest.approx(latest[:, i].max())
    only_l2 = db.nf_statistics(lot="L2")
    assert [s.count for s in only_l2] == [1, 1, 1]

    history = db.unit_history("A")
    assert [h.run_id for h in history] == ["r2", "r1"]  # newest first
    assert history[0].verdict == "pass" and history[1].max_nf_db == pytest.approx(1.4)
    assert history[0].min_gain_db == pytest.approx(20.0) and history[0].station == "st-1"
    assert db.count("budget_terms") == 5 * 3
    assert db.count("points") == 15 and db.count("units") == 4 and db.count("stations") == 1


def test_sqlite_store_and_queries(tmp_path):
    with ResultsDatabase(tmp_path / "results.sqlite") as db:
        _fill(db)
        _check_queries(db)
        assert db.schema_version == SCHEMA_VERSION
    # reopening the file keeps everything
    with ResultsDatabase(f"sqlite:///{tmp_path / 'results.sqlite'}") as db:
        assert db.run_ids() == ["r1", "r2", "r3", "r4", "r5"]


def test_same_run_twice_is_refused(tmp_path):
    with ResultsDatabase(tmp_path / "r.sqlite") as db:
        rec = make_record("dup", "A", (1.0, 1.0, 1.0))
        db.store_run(rec)
        with pytest.raises(InputError, match="run_id"):
            db.store_run(rec)
        assert db.count("runs") == 1


def test_schema_version_mismatch_is_refused(tmp_path):
    path = tmp_path / "old.sqlite"
    ResultsDatabase(path).close()
    import sqlite3

    con = sqlite3.connect(path)
    con.execute("UPDATE schema_info SET version = 99")
    con.commit()
    con.close()
    with pytest.raises(DatabaseError, match="schema version 99"):
        ResultsDatabase(path)


def test_bad_url_names_the_field():
    with pytest.raises(InputError, match="database.url"):
        ResultsDatabase("nosuchdialect://x")


def _writer(args: tuple[str, int, int]) -> int:
    url, worker, n = args
    db = ResultsDatabase(url)
    for i in range(n):
        # every worker also writes the SAME shared unit, to race the get-or-create
        serial = "shared" if i % 2 == 0 else f"w{worker}-u{i}"
        db.store_run(
            make_record(
                f"w{worker}-r{i}", serial, (1.0, 1.1, 1.2), station=f"station-{worker}", minutes=i
            )
        )
    db.close()
    return n


def _concurrent(url: str, workers: int = 4, runs: int = 8) -> None:
    ResultsDatabase(url).close()  # create the schema once before the race
    ctx = mp.get_context("spawn")
    with ctx.Pool(workers) as pool:
        done = sum(pool.map(_writer, [(url, w, runs) for w in range(workers)]))
    with ResultsDatabase(url) as db:
        assert done == workers * runs
        assert db.count("runs") == workers * runs  # nothing lost
        assert db.count("points") == workers * runs * len(FREQS)
        assert db.count("stations") == workers
        # 'shared' exists once although every worker inserted it
        assert db.count("units") == 1 + workers * (runs // 2)
        assert len(db.unit_history("shared")) == workers * (runs // 2)


def test_sqlite_concurrent_writers_lose_nothing(tmp_path):
    _concurrent(f"sqlite:///{tmp_path / 'shared.sqlite'}")


@pytest.fixture(scope="module")
def pg_url(postgres_server):
    """The session's PostgreSQL server (conftest.py); each test makes its own database."""
    return postgres_server


def _fresh_pg(url: str, name: str) -> str:
    """A fresh database on the server so the PostgreSQL tests do not share rows."""
    return fresh_database(url, name)


def test_postgresql_store_and_queries(pg_url):
    with ResultsDatabase(_fresh_pg(pg_url, "nb_queries")) as db:
        _fill(db)
        _check_queries(db)


def test_postgresql_concurrent_writers_lose_nothing(pg_url):
    _concurrent(_fresh_pg(pg_url, "nb_concurrent"))


# -- several processes opening one FRESH database at the same moment (a line switched on together)
OPEN_WORKERS = 6
OPEN_ROUNDS = 2


def _opens_together(url_for_round) -> None:
    from _concurrent_open import open_together

    # the same worker processes open every round's fresh database together (one start-up)
    urls = [url_for_round(round_no) for round_no in range(OPEN_ROUNDS)]
    failures = open_together(urls, OPEN_WORKERS)
    assert failures == [], f"{len(failures)} failed opens:\n{failures[0]}"
    for url in urls:
        with ResultsDatabase(url) as db:
            assert db.schema_version == SCHEMA_VERSION
            assert db.count("runs") == OPEN_WORKERS  # every worker stored its run


def test_sqlite_fresh_database_opened_by_several_processes_at_once(tmp_path):
    _opens_together(lambda n: f"sqlite:///{tmp_path / f'fresh-{n}.sqlite'}")


def test_postgresql_fresh_database_opened_by_several_processes_at_once(pg_url):
    _opens_together(lambda n: _fresh_pg(pg_url, f"nb_fresh_{n}"))


# --------------------------------------------------------------------------- converters


def _converter_record(run_id: str, serial: str) -> RunRecord:
    from noisebench.science.point import ConversionInfo

    record = make_record(run_id, serial, (4.0, 4.2, 4.4), minutes=50)
    points = []
    for i, p in enumerate(record.points):
        rf, lo = p.freq_hz, p.freq_hz - 0.4e9
        conv = ConversionInfo(
            rf_hz=rf,
            lo_hz=lo,
            if_hz=0.4e9,
            image_hz=2 * lo - rf,
            sideband="upper",
            nf_type="ssb",
            nf_ssb_db=p.nf_db,
            nf_dsb_db=p.nf_db - 0.1 * (i + 1),
            te_ssb_k=p.te_k,
            te_dsb_k=p.te_k / 1.1,
            image_rejection_db=12.0 + i,
            image_correction_db=0.1 * (i + 1),
            gain_source="measured",
            measured_gain_db=20.0 + i,
            u_measured_gain_db=0.2,
        )
        points.append(p.model_copy(update={"conversion": conv}))
    return record.model_copy(update={"points": points})


def _check_converter_columns(db: ResultsDatabase) -> None:
    db.store_run(_converter_record("c1", "DC-1"))
    rows = db.conversion_points("c1")
    assert [r["rf_hz"] for r in rows] == list(FREQS)
    assert [r["lo_hz"] for r in rows] == [f - 0.4e9 for f in FREQS]
    assert [r["image_hz"] for r in rows] == [f - 0.8e9 for f in FREQS]
    assert {r["if_hz"] for r in rows} == {0.4e9} and {r["sideband"] for r in rows} == {"upper"}
    assert [r["nf_dsb_db"] for r in rows] == pytest.approx([3.9, 4.0, 4.1])
    assert [r["image_rejection_db"] for r in rows] == [12.0, 13.0, 14.0]
    assert {r["nf_type"] for r in rows} == {"ssb"}
    assert {r["gain_source"] for r in rows} == {"measured"}
    assert [r["measured_gain_db"] for r in rows] == [20.0, 21.0, 22.0]
    assert {r["u_measured_gain_db"] for r in rows} == {0.2}
    assert db.conversion_points("r1") == []  # an amplifier run has none


#: the columns each schema version added to ``points``
_ADDED_IN = {
    2: ResultsDatabase.CONVERSION_COLUMNS[:9],
    3: ("gain_source", "measured_gain_db", "u_measured_gain_db"),
}


def _make_version(db_url: str, version: int = 1) -> None:
    """A database as ``version`` wrote it: points without the columns later versions added."""
    import sqlalchemy as sa

    with ResultsDatabase(db_url) as db:
        _fill(db)
    engine = sa.create_engine(db_url)
    with engine.begin() as con:
        for later in range(version + 1, SCHEMA_VERSION + 1):
            for column in _ADDED_IN[later]:
                con.execute(sa.text("ALTER TABLE points DROP COLUMN " + column))
        con.execute(sa.text(f"UPDATE schema_info SET version = {int(version)}"))
    engine.dispose()


def _make_version_1(db_url: str) -> None:
    _make_version(db_url, 1)


@pytest.mark.parametrize("old_version", [1, 2])
def test_sqlite_converter_columns_and_migration_of_an_older_file(tmp_path, old_version):
    assert set(ResultsDatabase.CONVERSION_COLUMNS) == {c for v in _ADDED_IN.values() for c in v}
    with ResultsDatabase(tmp_path / "new.sqlite") as db:
        assert db.schema_version == SCHEMA_VERSION == 3
        _check_converter_columns(db)
    url = f"sqlite:///{tmp_path / 'old.sqlite'}"
    _make_version(url, old_version)
    with ResultsDatabase(url) as db:  # migrated on open, old runs kept
        assert db.schema_version == 3
        _check_queries(db)
        _check_converter_columns(db)


def test_postgresql_converter_columns_and_migration(pg_url):
    with ResultsDatabase(_fresh_pg(pg_url, "nb_converter")) as db:
        _check_converter_columns(db)
    url = _fresh_pg(pg_url, "nb_migrate")
    _make_version_1(url)
    with ResultsDatabase(url) as db:
        assert db.schema_version == 3
        _check_queries(db)
        _check_converter_columns(db)

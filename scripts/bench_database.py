"""Results-database queries at production scale on SQLite (prints what one run measured).

    python scripts/bench_database.py [--units 1000] [--points 201]

Fills a fresh SQLite file with ``units`` units of ``points`` frequencies each (three budget terms
per point, one unit in ten re-tested so "latest complete run" has work to do), then times
``noisebench db yield`` and ``noisebench db stats`` (the CLI handlers, opening the database as
a user would; best of three) at 10 %, 30 % and 100 % of the units, and prints the time against
the target of one second for the full size and how the time grows with the number of units.
The rows are inserted in bulk (a benchmark of the queries, not of ``store_run``).
"""

from __future__ import annotations

import argparse
import io
import json
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path
from types import SimpleNamespace

import numpy as np
from sqlalchemy import insert

from noisebench.frontends.dbcli import cmd_db_stats, cmd_db_yield
from noisebench.results import database as dbm

TARGET_S = 1.0
REPEATS = 3  # best of (the machine is shared)
T0 = datetime(2026, 5, 4, 8, 0, tzinfo=timezone.utc)


def fill(url: str, units: int, points: int, seed: int = 1) -> None:
    """Bulk-insert ``units`` units (1 in 10 with an earlier failed run) of ``points`` points."""
    rng = np.random.default_rng(seed)
    db = dbm.ResultsDatabase(url)
    freqs = np.linspace(1e9, 3e9, points)
    info = json.dumps({"note": "bulk-filled for the benchmark"})
    with db.engine.begin() as conn:
        conn.execute(insert(dbm._Station.__table__), [{"id": 1, "name": "bench-1"}])
        conn.execute(
            insert(dbm._Unit.__table__),
            [
                {"id": u + 1, "serial": f"SN{u:06d}", "part_number": "LNA-1", "lot": f"L{u % 7}"}
                for u in range(units)
            ],
        )
        run_rows, point_rows, term_rows = [], [], []
        run_id = point_id = 0
        for u in range(units):
            retest = u % 10 == 0
            for attempt in range(2 if retest else 1):
                run_id += 1
                nf = 1.5 + 0.2 * rng.standard_normal() + 0.1 * (freqs - 2e9) / 1e9
                verdict = (
                    "fail" if retest and attempt == 0 else ("pass" if nf.max() < 2 else "fail")
                )
                run_rows.append(
                    {
                        "id": run_id,
                        "run_id": f"run-{run_id:07d}",
                        "unit_id": u + 1,
                        "station_id": 1,
                        "method": "y_factor",
                        "operator": "op",
                        "status": "complete",
                        "verdict": verdict,
                        "started_at": T0 + timedelta(minutes=3 * u + attempt),
                        "ended_at": T0 + timedelta(minutes=3 * u + attempt + 1),
                        "info_json": info,
                    }
                )
                for f, v in zip(freqs, nf, strict=True):
                    point_id += 1
                    point_rows.append(
                        {
                            "id": point_id,
                            "run_fk": run_id,
                            "freq_hz": float(f),
                            "nf_db": float(v),
                            "u_nf_db": 0.03,
                            "te_k": 290.0 * (10 ** (v / 10) - 1),
                            "gain_db": 20.0,
                            "y_db": 10.0,
                            "expanded_u_nf_db": 0.2,
                            "verdict": verdict,
                            "flags": "",
                        }
                    )
                    for name in ("enr", "statistics", "mismatch"):
                        term_rows.append(
                            {
                                "point_fk": point_id,
                                "name": name,
                                "standard_u": 0.05,
                                "unit": "dB",
                                "sensitivity": 1.0,
                                "contribution_db": 0.05,
                            }
                        )
        conn.execute(insert(dbm._Run.__table__), run_rows)
        conn.execute(insert(dbm._Point.__table__), point_rows)
        conn.execute(insert(dbm._BudgetTerm.__table__), term_rows)
    db.close()


def timed_cli(handler, url: str) -> tuple[float, str]:
    """Wall time of one CLI query handler, database opened inside as ``noisebench db`` does."""
    args = SimpleNamespace(db=url, lot=None, json=False)
    best = float("inf")
    for _ in range(REPEATS):
        out = io.StringIO()
        t0 = time.perf_counter()
        code = handler(args, out)
        best = min(best, time.perf_counter() - t0)
        if code != 0:
            raise SystemExit(f"{handler.__name__} failed: {out.getvalue()}")
    return best, out.getvalue()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--units", type=int, default=1000)
    parser.add_argument("--points", type=int, default=201)
    args = parser.parse_args(argv)
    sizes = sorted({max(1, args.units // 10), max(1, (3 * args.units) // 10), args.units})
    results: dict[str, list[tuple[int, float]]] = {"yield": [], "stats": []}
    with tempfile.TemporaryDirectory(prefix="nb_dbbench_") as tmp:
        for n in sizes:
            url = f"sqlite:///{Path(tmp) / f'db_{n}.sqlite'}"
            t0 = time.perf_counter()
            fill(url, n, args.points)
            fill_s = time.perf_counter() - t0
            timed_cli(cmd_db_yield, url)  # first open: schema check, page cache
            t_yield, _ = timed_cli(cmd_db_yield, url)
            t_stats, text = timed_cli(cmd_db_stats, url)
            results["yield"].append((n, t_yield))
            results["stats"].append((n, t_stats))
            print(
                f"{n:>6} units x {args.points} points (filled in {fill_s:.1f} s): "
                f"db yield {t_yield * 1e3:8.1f} ms   db stats {t_stats * 1e3:8.1f} ms   "
                f"({len(text.splitlines())} lines of output)"
            )
    for name, rows in results.items():
        (n0, t0_), (n1, t1) = rows[0], rows[-1]
        growth = (t1 / t0_) / (n1 / n0) if n1 > n0 else float("nan")
        print(
            f"db {name}: {t1:.3f} s for {n1} units (target < {TARGET_S:g} s: "
            f"{'met' if t1 < TARGET_S else 'NOT met'}); {n1 / n0:.0f}x the units took "
            f"{t1 / t0_:.1f}x the time (growth exponent {np.log(t1 / t0_) / np.log(n1 / n0):.2f},"
            f" ratio to linear {growth:.2f})"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Command-line commands for production: ``station`` and ``db`` (results database).

:func:`register` adds them to the ``noisebench`` parser's sub-commands; every handler has the
``cmd_*(args, out) -> exit code`` form of :mod:`noisebench.frontends.cli` and raises noisebench
errors
for the CLI to print as one line. Commands (ours)::

    noisebench station PLAN [--units FILE | --unit LINE ...] [--station-id ID] [--operator NAME]
                            [--folder DIR] [--db URL | --no-db] [--lot LOT] [--part-number PN]
                            [--max-cal-age S] [--nominal-units]
    noisebench db yield   [--db URL] [--lot LOT] [--json]     yield per lot (latest runs)
    noisebench db stats   [--db URL] [--lot LOT] [--json]     NF statistics per frequency
    noisebench db history SERIAL [--db URL] [--json]          every run of one unit
    noisebench db import  FOLDER... [--db URL] [--plan PLAN] [--lot LOT] [--station ID]
    noisebench db info    [--db URL]                          schema version and row counts

``--db`` takes an SQLAlchemy URL (``sqlite:///file.sqlite``, ``postgresql+psycopg://user@host/
db``) or a plain path to an SQLite file; without it ``NOISEBENCH_DB`` is used. ``station``
without ``--units``/``--unit`` prompts for serials (or barcode lines) until an empty line or
``q``. Exit codes as the CLI's: 0 the station loop ended normally (failing units are a normal
outcome, they are in the summary), 130 Ctrl-C, 4 the station stopped on a bench fault.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import re
import socket
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

from noisebench.errors import InputError
from noisebench.frontends.argtypes import (
    EPILOG,
    EXIT_INSTRUMENT,
    EXIT_INTERRUPTED,
    EXIT_OK,
    positive_seconds,
)

logger = logging.getLogger(__name__)

__all__ = [
    "DB_ENV",
    "register",
    "cmd_station",
    "cmd_db_yield",
    "cmd_db_stats",
    "cmd_db_history",
    "cmd_db_import",
    "cmd_db_info",
    "run_folders",
]

DB_ENV = "NOISEBENCH_DB"


# --------------------------------------------------------------------------- helpers


def _database_target(args: argparse.Namespace) -> str:
    target = getattr(args, "db", None) or os.environ.get(DB_ENV)
    if not target:
        raise InputError(
            "--db",
            "no results database given",
            fix=f"pass --db sqlite:///station.sqlite (or a path), or set {DB_ENV}",
        )
    return str(target)


def _open_database(args: argparse.Namespace, *, create: bool = False) -> Any:
    """The results database of ``--db``; a read command never creates a missing SQLite file."""
    from noisebench.results.database import ResultsDatabase

    target = _database_target(args)
    missing = _missing_sqlite_file(target)
    if not create and missing is not None:
        raise InputError(
            "--db",
            f"no database file {str(missing)!r}",
            fix="give an existing file, or an SQLAlchemy URL",
        )
    return ResultsDatabase(target)


def _missing_sqlite_file(target: str) -> Path | None:
    """The SQLite file a path or ``sqlite:///`` URL names, when it does not exist yet."""
    if "://" not in target:
        path = Path(target).expanduser()
        return None if path.is_file() else path
    try:
        from sqlalchemy.engine import make_url

        url = make_url(target)
    except Exception:  # noqa: BLE001 - a malformed URL is reported when it is opened
        return None
    if (
        not url.drivername.startswith("sqlite")
        or url.database in (None, "", ":memory:")
        or url.database.startswith("file:")
    ):
        return None
    path = Path(url.database).expanduser()
    return None if path.is_file() else path


def _print_json(data: Any, out: TextIO) -> None:
    print(json.dumps(data, indent=2, default=str), file=out)


def _table(rows: list[list[str]], header: list[str], out: TextIO) -> None:
    """Print an aligned plain-text table (first column left, the others right)."""
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]

    def line(cells: list[str]) -> str:
        return "  ".join(
            str(c).ljust(w) if i == 0 else str(c).rjust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        )

    print(line(header), file=out)
    print("  ".join("-" * w for w in widths), file=out)
    for row in rows:
        print(line(row), file=out)


def _num(value: float | None, digits: int = 3) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def _default_station_id(plan: Any) -> str:
    if plan.station:
        return str(plan.station)
    host = re.sub(r"[^A-Za-z0-9._-]", "-", socket.gethostname() or "").strip("-._")[:64]
    return host or "station"


# --------------------------------------------------------------------------- station


def _station_units(args: argparse.Namespace, settings: Any) -> Any:
    from noisebench.frontends.station import units_from_file, units_from_lines, units_from_prompt

    if args.units and args.unit:
        raise InputError(
            "--units",
            "cannot be combined with --unit",
            fix="list the units in the file, or give them with --unit",
        )
    if args.units:
        return units_from_file(args.units, lot=settings.lot, part_number=settings.part_number)
    if args.unit:
        return units_from_lines(
            args.unit, lot=settings.lot, part_number=settings.part_number, source="--unit"
        )
    return units_from_prompt(
        input,
        lot=settings.lot,
        part_number=settings.part_number,
        on_refused=lambda text: print(text, file=sys.stderr),
    )


def _station_settings(args: argparse.Namespace, plan: Any) -> Any:
    from noisebench.frontends.station import StationSettings, UnitVariation

    if args.no_db and args.db:
        raise InputError("--no-db", "cannot be combined with --db", fix="drop one of them")
    return StationSettings(
        station_id=args.station_id or _default_station_id(plan),
        operator=args.operator or plan.operator,
        folder=Path(args.folder) if args.folder else None,
        database_url=args.db or os.environ.get(DB_ENV),
        store=not args.no_db,
        calibration_max_age_s=args.max_cal_age,
        lot=args.lot,
        part_number=args.part_number,
        unit_variation=None if args.nominal_units else UnitVariation(),
    )


def cmd_station(args: argparse.Namespace, out: TextIO) -> int:
    """Measure a lot unit by unit (see :mod:`noisebench.frontends.station`)."""
    from noisebench.frontends.station import Station
    from noisebench.running.plan import load_plan
    from noisebench.running.progress import make_progress
    from noisebench.running.safety import cautions_text

    plan = load_plan(args.plan)
    settings = _station_settings(args, plan)
    units = _station_units(args, settings)
    with Station(
        plan, settings, progress=make_progress(), say=lambda text: print(text, file=out, flush=True)
    ) as station:
        if station.session.real_hardware:
            print("Safety cautions:\n" + cautions_text(), file=sys.stderr)
        print(
            f"station {settings.station_id}: plan {args.plan}, results in {station.folder}",
            file=out,
            flush=True,
        )
        summary = station.run(units)
    stopped = summary.stopped_by or ""
    if stopped.startswith("interrupted"):
        return EXIT_INTERRUPTED
    if stopped.startswith("error"):
        return EXIT_INSTRUMENT
    return EXIT_OK


# --------------------------------------------------------------------------- db queries


def cmd_db_yield(args: argparse.Namespace, out: TextIO) -> int:
    """Yield per lot from every unit's latest complete run."""
    with _open_database(args) as db:
        lots = db.yield_by_lot(args.lot)
    if args.json:
        _print_json(
            [
                {
                    **y.model_dump(),
                    "yield_fraction": None if y.units == y.not_judged else y.yield_fraction,
                }
                for y in lots
            ],
            out,
        )
        return EXIT_OK
    rows = [
        [
            str(y.lot or "-"),
            str(y.units),
            str(y.passed),
            str(y.failed),
            str(y.indeterminate),
            str(y.not_judged),
            "-" if y.units == y.not_judged else f"{100 * y.yield_fraction:.1f} %",
        ]
        for y in lots
    ]
    if not rows:
        print("no complete runs in the database", file=out)
        return EXIT_OK
    _table(rows, ["lot", "units", "pass", "fail", "indeterminate", "not judged", "yield"], out)
    return EXIT_OK


def cmd_db_stats(args: argparse.Namespace, out: TextIO) -> int:
    """NF mean / standard deviation / min / max per frequency over the latest runs."""
    from noisebench.running.progress import format_freq

    with _open_database(args) as db:
        stats = db.nf_statistics(lot=args.lot)
    if args.json:
        _print_json([s.model_dump() for s in stats], out)
        return EXIT_OK
    if not stats:
        print("no complete runs in the database", file=out)
        return EXIT_OK
    rows = [
        [
            format_freq(s.freq_hz),
            str(s.count),
            _num(s.mean_nf_db),
            _num(s.std_nf_db),
            _num(s.min_nf_db),
            _num(s.max_nf_db),
        ]
        for s in stats
    ]
    _table(rows, ["frequency", "units", "mean NF dB", "std dB", "min dB", "max dB"], out)
    return EXIT_OK


def cmd_db_history(args: argparse.Namespace, out: TextIO) -> int:
    """Every run of one unit, newest first."""
    with _open_database(args) as db:
        runs = db.unit_history(args.serial, args.part_number)
    if args.json:
        _print_json([r.model_dump(mode="json") for r in runs], out)
        return EXIT_OK
    if not runs:
        print(f"no runs of unit {args.serial!r}", file=out)
        return EXIT_OK
    rows = [
        [
            r.run_id,
            r.started_at.isoformat(timespec="seconds"),
            r.station or "-",
            r.method,
            r.status,
            r.verdict or "-",
            _num(r.max_nf_db),
            _num(r.min_gain_db, 2),
        ]
        for r in runs
    ]
    _table(
        rows,
        ["run", "started", "station", "method", "status", "verdict", "max NF dB", "min gain dB"],
        out,
    )
    return EXIT_OK


def cmd_db_info(args: argparse.Namespace, out: TextIO) -> int:
    """Database URL (no password), schema version and row counts."""
    from noisebench.frontends.station import safe_url

    with _open_database(args) as db:
        print(f"database {safe_url(db.url)}", file=out)
        print(f"schema version {db.schema_version}", file=out)
        for table in ("stations", "units", "runs", "points", "budget_terms"):
            print(f"{table:<13} {db.count(table)}", file=out)
    return EXIT_OK


# --------------------------------------------------------------------------- db import


def run_folders(paths: Sequence[str | Path]) -> list[Path]:
    """Run folders named by ``paths``: a run folder itself, or every run folder below one."""
    from noisebench.results.store import RUN_INFO_FILE

    found: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if not path.is_dir():
            raise InputError(
                "folder", f"{path} is not a folder", fix="give run folders or a station folder"
            )
        below = (
            [path]
            if (path / RUN_INFO_FILE).is_file()
            else sorted(p.parent for p in path.rglob(RUN_INFO_FILE))
        )
        if not below:
            raise InputError(
                "folder",
                f"{path} holds no run ({RUN_INFO_FILE})",
                fix="give run folders or a station folder",
            )
        found += [p for p in below if p not in found]
    return found


def cmd_db_import(args: argparse.Namespace, out: TextIO) -> int:
    """Store run folders (e.g. units a station could not store) in the database.

    With ``--plan`` each run's budgets and verdict are completed from that plan first.
    Runs already in the database are skipped.
    """
    from noisebench.results.store import load_run

    plan = None
    if args.plan:
        from noisebench.running.plan import load_plan

        plan = load_plan(args.plan)
    folders = run_folders(args.folders)
    stored = skipped = 0
    with _open_database(args, create=True) as db:
        known = set(db.run_ids())
        for folder in folders:
            record = load_run(folder)
            if record.info.run_id in known:
                skipped += 1
                print(f"skipped {folder} (run {record.info.run_id} already stored)", file=out)
                continue
            if plan is not None:
                from noisebench.results.production import apply_budgets_and_verdict

                record = apply_budgets_and_verdict(record, plan)
            db.store_run(record, lot=args.lot, station=args.station)
            known.add(record.info.run_id)
            stored += 1
            print(
                f"stored {folder} (run {record.info.run_id}, {record.info.status}, verdict "
                f"{(record.verdict or {}).get('unit', '-')})",
                file=out,
            )
    print(f"{stored} run(s) stored, {skipped} already in the database", file=out)
    return EXIT_OK


# --------------------------------------------------------------------------- parser


def _add_db_option(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--db", metavar="URL", help=f"SQLAlchemy URL or SQLite file (default: ${DB_ENV})"
    )


def _register_station(sub: Any) -> None:
    p = sub.add_parser(
        "station",
        help="production: measure a lot unit by unit",
        epilog=EPILOG,  # exit codes and the safety cautions, as for `run`
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Measure PLAN on unit after unit: serials (or barcode lines "
        "SN:<serial>;LOT:<lot>;PN:<part>) from --units/--unit or typed at the "
        "prompt until an empty line or q. Each unit gets its run folder, verdict, "
        "report and a database row; the calibration is reused while valid.",
    )
    p.add_argument("plan", help="plan file (.toml)")
    p.add_argument("--units", metavar="FILE", help="file of serials / barcode lines, one a line")
    p.add_argument(
        "--unit",
        action="append",
        metavar="LINE",
        help="a serial or barcode line (repeat for more units)",
    )
    p.add_argument(
        "--station-id",
        metavar="ID",
        help="station name (default: the plan's station, else the host name)",
    )
    p.add_argument("--operator", metavar="NAME", help="operator (default: the plan's)")
    p.add_argument(
        "--folder", metavar="DIR", help="station folder (default: <output folder>/station-<ID>)"
    )
    p.add_argument(
        "--db",
        metavar="URL",
        help=f"results database (default: ${DB_ENV}, else station.sqlite in the station folder)",
    )
    p.add_argument("--no-db", action="store_true", help="do not store runs in a database")
    p.add_argument("--lot", metavar="LOT", help="lot of units whose line names none")
    p.add_argument("--part-number", metavar="PN", help="part number of units whose line names none")
    p.add_argument(
        "--max-cal-age",
        type=positive_seconds,
        metavar="S",
        help="recalibrate when the calibration is older than S seconds "
        "(default: the plan's [calibration] max_age_s)",
    )
    p.add_argument(
        "--nominal-units",
        action="store_true",
        help="simulated bench: every unit is the scenario's nominal DUT "
        "(no unit-to-unit variation)",
    )
    p.set_defaults(func=cmd_station)


def _register_db(sub: Any) -> None:
    p = sub.add_parser(
        "db",
        help="query or fill the results database",
        description="Yield, NF statistics and unit history from the results "
        "database; import run folders into it.",
    )
    dbsub = p.add_subparsers(dest="db_command", metavar="DB_COMMAND", required=True)

    q = dbsub.add_parser("yield", help="yield per lot (each unit's latest complete run)")
    _add_db_option(q)
    q.add_argument("--lot", help="one lot only")
    q.add_argument("--json", action="store_true", help="JSON instead of a table")
    q.set_defaults(func=cmd_db_yield)

    q = dbsub.add_parser("stats", help="NF statistics per frequency (latest runs)")
    _add_db_option(q)
    q.add_argument("--lot", help="one lot only")
    q.add_argument("--json", action="store_true", help="JSON instead of a table")
    q.set_defaults(func=cmd_db_stats)

    q = dbsub.add_parser("history", help="every run of one unit, newest first")
    q.add_argument("serial", help="serial number")
    _add_db_option(q)
    q.add_argument("--part-number", metavar="PN", help="only this part number")
    q.add_argument("--json", action="store_true", help="JSON instead of a table")
    q.set_defaults(func=cmd_db_history)

    q = dbsub.add_parser("import", help="store run folders (or a station folder's runs)")
    q.add_argument("folders", nargs="+", metavar="FOLDER", help="run folder or station folder")
    _add_db_option(q)
    q.add_argument("--plan", metavar="PLAN", help="complete budgets and verdict from this plan")
    q.add_argument("--lot", help="lot (default: the run's notes)")
    q.add_argument("--station", metavar="ID", help="station (default: the run's)")
    q.set_defaults(func=cmd_db_import)

    q = dbsub.add_parser("info", help="schema version and row counts")
    _add_db_option(q)
    q.set_defaults(func=cmd_db_info)


def register(subparsers: Any) -> None:
    """Add the ``station`` and ``db`` commands to the CLI's ``add_subparsers()`` object."""
    _register_station(subparsers)
    _register_db(subparsers)

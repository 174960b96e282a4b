"""Results database: one SQLite file by default, any SQLAlchemy URL (PostgreSQL) for a fleet.

Tables: ``schema_info`` (version), ``stations``, ``units`` (serial, part number, lot), ``runs``,
``points`` and ``budget_terms`` (one row per uncertainty contribution of a point). A run is
written in ONE transaction, so a concurrent reader never sees half a run and a crashed writer
leaves nothing behind; stations and units are get-or-create under unique constraints, retried
when two stations insert the same unit at the same moment.

SQLAlchemy is used because the same ORM code runs on SQLite and PostgreSQL, handles connection
pooling and transactions, and turns the yield/statistics queries into portable SQL.

Typical use::

    db = ResultsDatabase("sqlite:///station.sqlite")     # or "postgresql+psycopg://..."
    db.store_run(record, lot="L24-07", station="bench-3")
    db.yield_by_lot()                                     # -> [LotYield(...)]

Size: one job, the results database: schema, writes and the production queries share the table
definitions and the session handling.
"""

from __future__ import annotations

import json
import logging
import math
import time
from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from pydantic import BaseModel

from noisebench.errors import InputError, NoisebenchError

log = logging.getLogger(__name__)

SCHEMA_VERSION = 3
"""1: the first schema; 2: per-point frequency plan of converter runs (``points.rf_hz`` ...),
added to a version-1 database in place when it is opened (``_migrate``)."""
_SCHEMA_ATTEMPTS = 20  # bounded retries of schema creation on engines without a schema lock
_SCHEMA_LOCK_KEY = 0x6E6F6973  # PostgreSQL advisory-lock key of noisebench's schema step


def _is_creation_race(exc: Exception) -> bool:
    """True if ``exc`` is another process creating the same table or row at the same moment."""
    message = str(getattr(exc, "orig", exc)).lower()
    return isinstance(exc, IntegrityError) or "already exists" in message or "locked" in message


try:  # SQLAlchemy is an optional extra ("db"); fail with a clear message when it is missing
    from sqlalchemy import (
        DateTime,
        Float,
        ForeignKey,
        Index,
        Integer,
        String,
        Text,
        UniqueConstraint,
        create_engine,
        event,
        func,
        insert,
        select,
        text,
    )
    from sqlalchemy.exc import IntegrityError, OperationalError, ProgrammingError
    from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column, relationship
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise ImportError(
        "the results database needs SQLAlchemy: pip install 'noisebench[db]'"
    ) from exc


class DatabaseError(NoisebenchError):
    """The results database refused an operation (wrong schema version, unreachable server)."""


class _Base(DeclarativeBase):
    pass


class _SchemaInfo(_Base):
    __tablename__ = "schema_info"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    version: Mapped[int] = mapped_column(Integer, nullable=False)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), nullable=False)


class _Station(_Base):
    __tablename__ = "stations"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True, nullable=False)


class _Unit(_Base):
    __tablename__ = "units"
    __table_args__ = (UniqueConstraint("serial", "part_number", name="uq_unit_serial_part"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    serial: Mapped[str] = mapped_column(String(200), nullable=False)
    part_number: Mapped[str] = mapped_column(String(200), nullable=False, default="")
    lot: Mapped[str | None] = mapped_column(String(200), nullable=True, index=True)


class _Run(_Base):
    __tablename__ = "runs"
    # the latest complete run of every unit: one index range per unit
    __table_args__ = (Index("ix_runs_unit_status_started", "unit_id", "status", "started_at"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[str] = mapped_column(String(100), unique=True, nullable=False)
    unit_id: Mapped[int | None] = mapped_column(ForeignKey("units.id"), index=True)
    station_id: Mapped[int | None] = mapped_column(ForeignKey("stations.id"), index=True)
    method: Mapped[str] = mapped_column(String(20), nullable=False)
    operator: Mapped[str | None] = mapped_column(String(200))
    status: Mapped[str] = mapped_column(String(20), nullable=False)
    verdict: Mapped[str | None] = mapped_column(String(20), index=True)
    started_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), nullable=False)
    ended_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    info_json: Mapped[str] = mapped_column(Text, nullable=False)
    points: Mapped[list[_Point]] = relationship(back_populates="run", cascade="all, delete-orphan")


class _Point(_Base):
    __tablename__ = "points"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_fk: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True, nullable=False)
    freq_hz: Mapped[float] = mapped_column(Float, nullable=False, index=True)
    nf_db: Mapped[float] = mapped_column(Float, nullable=False)
    u_nf_db: Mapped[float] = mapped_column(Float, nullable=False)
    te_k: Mapped[float] = mapped_column(Float, nullable=False)
    gain_db: Mapped[float | None] = mapped_column(Float)
    y_db: Mapped[float | None] = mapped_column(Float)
    expanded_u_nf_db: Mapped[float | None] = mapped_column(Float)
    verdict: Mapped[str | None] = mapped_column(String(20))
    flags: Mapped[str] = mapped_column(String(500), nullable=False, default="")
    # a frequency-converting DUT's point (schema 2; NULL for amplifiers): freq_hz is the RF
    rf_hz: Mapped[float | None] = mapped_column(Float)
    lo_hz: Mapped[float | None] = mapped_column(Float)
    if_hz: Mapped[float | None] = mapped_column(Float)
    image_hz: Mapped[float | None] = mapped_column(Float)
    sideband: Mapped[str | None] = mapped_column(String(10))
    nf_type: Mapped[str | None] = mapped_column(String(10))
    nf_ssb_db: Mapped[float | None] = mapped_column(Float)
    nf_dsb_db: Mapped[float | None] = mapped_column(Float)
    image_rejection_db: Mapped[float | None] = mapped_column(Float)
    # where a converter's conversion gain came from (schema 3): measured / file / constant
    gain_source: Mapped[str | None] = mapped_column(String(10))
    measured_gain_db: Mapped[float | None] = mapped_column(Float)
    u_measured_gain_db: Mapped[float | None] = mapped_column(Float)
    run: Mapped[_Run] = relationship(back_populates="points")
    terms: Mapped[list[_BudgetTerm]] = relationship(cascade="all, delete-orphan")


class _BudgetTerm(_Base):
    __tablename__ = "budget_terms"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    point_fk: Mapped[int] = mapped_column(ForeignKey("points.id"), index=True, nullable=False)
    name: Mapped[str] = mapped_column(String(200), nullable=False)
    standard_u: Mapped[float | None] = mapped_column(Float)
    unit: Mapped[str | None] = mapped_column(String(40))
    sensitivity: Mapped[float | None] = mapped_column(Float)
    contribution_db: Mapped[float | None] = mapped_column(Float)


# ---------------------------------------------------------------------------------------------
# query results


class LotYield(BaseModel):
    """First-pass yield of a lot: units whose latest complete run passed, over units judged."""

    lot: str | None
    units: int
    passed: int
    failed: int
    indeterminate: int
    not_judged: int

    @property
    def yield_fraction(self) -> float:
        judged = self.passed + self.failed + self.indeterminate
        return self.passed / judged if judged else float("nan")


class FrequencyStats(BaseModel):
    """NF statistics at one frequency over the latest complete run of every unit (dB)."""

    freq_hz: float
    count: int
    mean_nf_db: float
    std_nf_db: float
    min_nf_db: float
    max_nf_db: float


class UnitRun(BaseModel):
    """One run of a unit, newest first in :meth:`ResultsDatabase.unit_history`."""

    run_id: str
    started_at: datetime
    station: str | None
    method: str
    status: str
    verdict: str | None
    max_nf_db: float | None
    min_gain_db: float | None


# ---------------------------------------------------------------------------------------------


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cur = dbapi_connection.cursor()
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA busy_timeout=30000")
    cur.execute("PRAGMA foreign_keys=ON")
    cur.close()


def _as_url(target: str | Path) -> str:
    text = str(target)
    if "://" in text:
        return text
    return f"sqlite:///{Path(text).expanduser().resolve()}"


def _conversion_columns(conv: Any) -> dict[str, Any]:
    """The conversion columns of one point (all None for an amplifier)."""
    if conv is None:
        return {}
    get = conv.get if isinstance(conv, dict) else lambda k: getattr(conv, k, None)
    return {
        "rf_hz": _finite_or_none(get("rf_hz")),
        "lo_hz": _finite_or_none(get("lo_hz")),
        "if_hz": _finite_or_none(get("if_hz")),
        "image_hz": _finite_or_none(get("image_hz")),
        "sideband": get("sideband"),
        "nf_type": get("nf_type"),
        "nf_ssb_db": _finite_or_none(get("nf_ssb_db")),
        "nf_dsb_db": _finite_or_none(get("nf_dsb_db")),
        "image_rejection_db": _finite_or_none(get("image_rejection_db")),
        "gain_source": get("gain_source"),
        "measured_gain_db": _finite_or_none(get("measured_gain_db")),
        "u_measured_gain_db": _finite_or_none(get("u_measured_gain_db")),
    }


def _finite_or_none(value: Any) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


class ResultsDatabase:
    """A results database at ``url`` (SQLAlchemy URL, or a plain path for an SQLite file)."""

    def __init__(self, url: str | Path, *, create: bool = True, echo: bool = False) -> None:
        self.url = _as_url(url)
        kwargs: dict[str, Any] = {"echo": echo, "future": True}
        if self.url.startswith("sqlite"):
            kwargs["connect_args"] = {"timeout": 30}
        else:
            kwargs["pool_pre_ping"] = True
        try:
            self.engine = create_engine(self.url, **kwargs)
        except Exception as exc:  # bad URL or missing DB driver
            raise InputError(
                "database.url",
                f"cannot use {self._safe_url()!r}: {exc}",
                fix="use sqlite:///path.sqlite or postgresql+psycopg://user@host/db",
            ) from exc
        if self.url.startswith("sqlite"):
            event.listen(self.engine, "connect", _sqlite_pragmas)
        if create:
            self._create_or_check()

    def _safe_url(self) -> str:
        """The URL without its password, for messages."""
        try:
            from sqlalchemy.engine import make_url

            return make_url(self.url).render_as_string(hide_password=True)
        except Exception:  # noqa: BLE001
            return "<database url>"

    # -- schema ------------------------------------------------------------------------------
    def _create_or_check(self) -> None:
        """Create the schema if absent, then check its version: safe when many open at once.

        The whole step runs in ONE transaction that first takes a database-wide write lock
        (SQLite ``BEGIN IMMEDIATE``; a PostgreSQL transaction-level advisory lock), so the
        processes of a line switched on together create the tables one after the other: the
        first creates them, the others find them and only check the version. Engines without
        such a lock retry once the winner has finished.
        """
        for attempt in range(_SCHEMA_ATTEMPTS):
            try:
                with self.engine.connect() as conn:
                    self._lock_schema(conn)
                    _Base.metadata.create_all(conn)
                    self._add_missing_indexes(conn)
                    info = conn.execute(select(_SchemaInfo.version)).first()
                    if info is not None and int(info[0]) in (1, 2):
                        self._migrate(conn, int(info[0]))
                    if info is None:
                        conn.execute(
                            insert(_SchemaInfo).values(
                                id=1, version=SCHEMA_VERSION, created_at=datetime.now(timezone.utc)
                            )
                        )
                    conn.commit()
                break
            except (IntegrityError, ProgrammingError, OperationalError) as exc:
                # without a lock (another engine) a concurrent creator may win the race; once
                # it has committed, the next attempt finds the tables
                if attempt + 1 == _SCHEMA_ATTEMPTS or not _is_creation_race(exc):
                    raise DatabaseError(
                        f"cannot open the results database: {getattr(exc, 'orig', exc)}",
                        url=self._safe_url(),
                    ) from exc
                time.sleep(0.05 * (attempt + 1))
        version = self.schema_version
        if version != SCHEMA_VERSION:
            raise DatabaseError(
                f"database schema version {version} is not the supported "
                f"version {SCHEMA_VERSION}; migrate it or use a new database",
                url=self._safe_url(),
            )

    def _lock_schema(self, conn: Any) -> None:
        """Take the database-wide lock that serialises schema creation (see above)."""
        dialect = conn.dialect.name
        if dialect == "sqlite":
            conn.exec_driver_sql("BEGIN IMMEDIATE")  # waits up to the busy timeout
        elif dialect == "postgresql":
            conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _SCHEMA_LOCK_KEY})

    CONVERSION_COLUMNS: tuple[str, ...] = (
        "rf_hz",
        "lo_hz",
        "if_hz",
        "image_hz",
        "sideband",
        "nf_type",
        "nf_ssb_db",
        "nf_dsb_db",
        "image_rejection_db",
        "gain_source",
        "measured_gain_db",
        "u_measured_gain_db",
    )

    @classmethod
    def _migrate(cls, conn: Any, version: int) -> None:
        """Schema 1 or 2 -> 3, inside the schema lock: add the converter columns ``points``
        lacks (2 added the frequency plan and both figures, 3 the conversion gain's source
        and measured value).

        The DDL is compiled by SQLAlchemy from our own column definitions for the engine's
        dialect (no user text in it); existing rows get NULL (amplifier points, or converter
        points stored before the column existed)."""
        from sqlalchemy import inspect
        from sqlalchemy.schema import CreateColumn

        present = {c["name"] for c in inspect(conn).get_columns("points")}
        table = _Base.metadata.tables["points"]
        for name in cls.CONVERSION_COLUMNS:
            if name not in present:
                column = CreateColumn(table.c[name]).compile(dialect=conn.dialect)
                conn.exec_driver_sql("ALTER TABLE points ADD COLUMN " + str(column))
        conn.execute(_Base.metadata.tables["schema_info"].update().values(version=SCHEMA_VERSION))
        log.info("results database migrated from schema %d to %d", version, SCHEMA_VERSION)

    @staticmethod
    def _add_missing_indexes(conn: Any) -> None:
        """Indexes added after a database was created (query speed only, same schema
        version): created when missing, so an older file gets them on its next open."""
        for table in _Base.metadata.sorted_tables:
            for index in table.indexes:
                index.create(conn, checkfirst=True)

    @property
    def schema_version(self) -> int:
        with Session(self.engine) as s:
            return int(s.scalars(select(_SchemaInfo.version)).one())

    # -- writing -----------------------------------------------------------------------------
    def store_run(
        self,
        record: Any,
        *,
        lot: str | None = None,
        part_number: str = "",
        station: str | None = None,
        retries: int = 5,
    ) -> int:
        """Write a finished run (a ``RunRecord``) in one transaction; returns its database id.

        ``lot``/``part_number``/``station`` default to the run's info (``info.notes['lot']``,
        ``info.notes['part_number']``, ``info.station``). Storing the same ``run_id`` twice is
        refused with :class:`InputError` rather than silently duplicating.
        """
        info = record.info
        notes = dict(getattr(info, "notes", {}) or {})
        lot = lot if lot is not None else notes.get("lot")
        part_number = part_number or str(notes.get("part_number") or "")
        station = station if station is not None else getattr(info, "station", None)
        for attempt in range(retries):
            try:
                return self._store_once(record, lot, part_number, station)
            except IntegrityError as exc:
                if self._run_exists(info.run_id):
                    raise InputError(
                        "run_id",
                        f"run {info.run_id!r} is already stored",
                        fix="store each run once",
                    ) from exc
                log.debug("unique-constraint race on attempt %d, retrying", attempt + 1)
                time.sleep(0.05 * (attempt + 1))
            except OperationalError as exc:  # e.g. SQLite 'database is locked' beyond timeout
                log.warning("database busy (%s), retrying", exc.orig)
                time.sleep(0.2 * (attempt + 1))
        raise DatabaseError(
            f"could not store run {info.run_id!r} after {retries} attempts", url=self._safe_url()
        )

    def _run_exists(self, run_id: str) -> bool:
        with Session(self.engine) as s:
            return s.scalars(select(_Run.id).where(_Run.run_id == run_id)).first() is not None

    @staticmethod
    def _get_or_create_station(s: Session, name: str | None) -> _Station | None:
        if not name:
            return None
        row = s.scalars(select(_Station).where(_Station.name == name)).first()
        if row is None:
            row = _Station(name=name)
            with s.begin_nested():
                s.add(row)
        return row

    @staticmethod
    def _get_or_create_unit(
        s: Session, serial: str | None, part: str, lot: str | None
    ) -> _Unit | None:
        if not serial:
            return None
        row = s.scalars(
            select(_Unit).where(_Unit.serial == serial, _Unit.part_number == part)
        ).first()
        if row is None:
            row = _Unit(serial=serial, part_number=part, lot=lot)
            with s.begin_nested():
                s.add(row)
        elif lot and row.lot != lot:
            row.lot = lot
        return row

    def _store_once(self, record: Any, lot: str | None, part: str, station: str | None) -> int:
        info = record.info
        verdict = getattr(record, "verdict", None) or {}
        point_verdicts = {round(float(p["freq_hz"]), 3): p for p in verdict.get("points", [])}
        budgets = {
            round(float(b["freq_hz"]), 3): b for b in (getattr(record, "budgets", None) or [])
        }
        with Session(self.engine) as s, s.begin():
            st = self._get_or_create_station(s, station)
            unit = self._get_or_create_unit(s, info.dut_id, part, lot)
            run = _Run(
                run_id=info.run_id,
                unit_id=unit.id if unit else None,
                station_id=st.id if st else None,
                method=str(getattr(info.method, "value", info.method)),
                operator=info.operator,
                status=info.status,
                verdict=verdict.get("unit"),
                started_at=info.started_at,
                ended_at=info.ended_at,
                info_json=info.model_dump_json()
                if hasattr(info, "model_dump_json")
                else json.dumps(info, default=str),
            )
            for p in record.points:
                key = round(float(p.freq_hz), 3)
                pv = point_verdicts.get(key, {})
                budget = budgets.get(key, {})
                row = _Point(
                    freq_hz=float(p.freq_hz),
                    nf_db=float(p.nf_db),
                    u_nf_db=float(p.u_nf_db),
                    te_k=float(p.te_k),
                    gain_db=_finite_or_none(p.gain_db),
                    y_db=_finite_or_none(p.y_db),
                    expanded_u_nf_db=_finite_or_none(budget.get("U_expanded_db")),
                    verdict=pv.get("verdict"),
                    flags=";".join(str(getattr(f, "value", f)) for f in p.flags),
                    **_conversion_columns(getattr(p, "conversion", None)),
                )
                for term in budget.get("contributions", []):
                    row.terms.append(
                        _BudgetTerm(
                            name=str(term.get("name")),
                            standard_u=_finite_or_none(term.get("u")),
                            unit=term.get("unit"),
                            sensitivity=_finite_or_none(term.get("sensitivity")),
                            contribution_db=_finite_or_none(term.get("contribution_db")),
                        )
                    )
                run.points.append(row)
            s.add(run)
            s.flush()
            return int(run.id)

    # -- queries -----------------------------------------------------------------------------
    @staticmethod
    def _latest_complete_run_ids(lot: str | None = None):
        """Subquery of (run id, unit id) of the newest complete run of every unit (optionally
        of one lot). Only keys are read: no run's JSON is loaded for an aggregate."""
        newest = (
            select(_Run.unit_id, func.max(_Run.started_at).label("t"))
            .where(_Run.status == "complete", _Run.unit_id.is_not(None))
            .group_by(_Run.unit_id)
            .subquery()
        )
        q = select(_Run.id.label("run_id"), _Run.unit_id.label("unit_id")).join(
            newest, (_Run.unit_id == newest.c.unit_id) & (_Run.started_at == newest.c.t)
        )
        if lot is not None:
            q = q.join(_Unit, _Unit.id == _Run.unit_id).where(_Unit.lot == lot)
        return q.subquery()

    def yield_by_lot(self, lot: str | None = None) -> list[LotYield]:
        """Yield per lot from each unit's latest complete run (``lot`` to select one); the
        counting is one grouped query in the database."""
        latest = self._latest_complete_run_ids(lot)
        q = (
            select(_Unit.lot, _Run.verdict, func.count())
            .select_from(latest)
            .join(_Run, _Run.id == latest.c.run_id)
            .join(_Unit, _Unit.id == latest.c.unit_id)
            .group_by(_Unit.lot, _Run.verdict)
        )
        with Session(self.engine) as s:
            rows = s.execute(q).all()
        lots: dict[str | None, dict[str, int]] = {}
        for unit_lot, verdict, count in rows:
            counts = lots.setdefault(
                unit_lot,
                {"units": 0, "passed": 0, "failed": 0, "indeterminate": 0, "not_judged": 0},
            )
            counts["units"] += int(count)
            key = {"pass": "passed", "fail": "failed", "indeterminate": "indeterminate"}.get(
                verdict or "", "not_judged"
            )
            counts[key] += int(count)
        return [LotYield(lot=k, **v) for k, v in sorted(lots.items(), key=lambda kv: str(kv[0]))]

    def nf_statistics(self, *, lot: str | None = None) -> list[FrequencyStats]:
        """NF mean, standard deviation, min and max per frequency over units' latest runs.

        Aggregated in the database per stored frequency in one grouped pass (count, min, max
        and the first two sums of deviations from the overall mean, so the variance suffers no
        cancellation); frequencies equal to the millihertz are then merged with the pairwise
        update of Chan, Golub & LeVeque (1983)."""
        latest = self._latest_complete_run_ids(lot)
        in_latest = (
            select(_Point.freq_hz.label("f"), _Point.nf_db.label("nf"))
            .join(latest, _Point.run_fk == latest.c.run_id)
            .subquery()
        )
        with Session(self.engine) as s:
            shift = s.scalar(select(func.avg(in_latest.c.nf)))
            if shift is None:
                return []
            dev = in_latest.c.nf - float(shift)
            rows = s.execute(
                select(
                    in_latest.c.f,
                    func.count(),
                    func.sum(dev),
                    func.sum(dev * dev),
                    func.min(in_latest.c.nf),
                    func.max(in_latest.c.nf),
                ).group_by(in_latest.c.f)
            ).all()
        moments = []
        for f, n, s1, s2, lo, hi in rows:
            n, s1, s2 = int(n), float(s1), float(s2)
            mean_dev = s1 / n
            # sums of deviations from a shift near the mean: no cancellation to speak of
            moments.append((f, n, float(shift) + mean_dev, s2 - s1 * mean_dev, lo, hi))
        merged: dict[float, list[float]] = {}
        for f, n, mean, m2, lo, hi in moments:
            key = round(float(f), 3)
            if key not in merged:
                merged[key] = [n, mean, m2, float(lo), float(hi)]
                continue
            na, mean_a, m2_a, lo_a, hi_a = merged[key]
            total = na + n
            delta = mean - mean_a
            merged[key] = [
                total,
                mean_a + delta * n / total,
                m2_a + m2 + delta * delta * na * n / total,
                min(lo_a, float(lo)),
                max(hi_a, float(hi)),
            ]
        out = []
        for f in sorted(merged):
            n, mean, m2, lo, hi = merged[f]
            n = int(n)
            out.append(
                FrequencyStats(
                    freq_hz=f,
                    count=n,
                    mean_nf_db=mean,
                    std_nf_db=math.sqrt(max(m2, 0.0) / (n - 1)) if n > 1 else 0.0,
                    min_nf_db=lo,
                    max_nf_db=hi,
                )
            )
        return out

    def unit_history(self, serial: str, part_number: str | None = None) -> list[UnitRun]:
        """Every run of unit ``serial`` (any part number unless given), newest first."""
        with Session(self.engine) as s:
            q = select(_Unit.id).where(_Unit.serial == serial)
            if part_number is not None:
                q = q.where(_Unit.part_number == part_number)
            unit_ids = list(s.scalars(q))
            if not unit_ids:
                return []
            stations = dict(s.execute(select(_Station.id, _Station.name)).all())
            runs = s.scalars(
                select(_Run).where(_Run.unit_id.in_(unit_ids)).order_by(_Run.started_at.desc())
            ).all()
            out = []
            for r in runs:
                nfs = [p.nf_db for p in r.points]
                gains = [p.gain_db for p in r.points if p.gain_db is not None]
                out.append(
                    UnitRun(
                        run_id=r.run_id,
                        started_at=r.started_at,
                        station=None if r.station_id is None else stations.get(r.station_id),
                        method=r.method,
                        status=r.status,
                        verdict=r.verdict,
                        max_nf_db=max(nfs) if nfs else None,
                        min_gain_db=min(gains) if gains else None,
                    )
                )
            return out

    def conversion_points(self, run_id: str) -> list[dict[str, Any]]:
        """A converter run's frequency plan per point (RF order): the conversion columns;
        empty for an amplifier run."""
        columns = [getattr(_Point, name) for name in self.CONVERSION_COLUMNS]
        with Session(self.engine) as s:
            rows = s.execute(
                select(*columns)
                .join(_Run, _Point.run_fk == _Run.id)
                .where(_Run.run_id == run_id, _Point.rf_hz.is_not(None))
                .order_by(_Point.rf_hz)
            ).all()
        return [dict(zip(self.CONVERSION_COLUMNS, row, strict=True)) for row in rows]

    def run_ids(self) -> list[str]:
        with Session(self.engine) as s:
            return list(s.scalars(select(_Run.run_id).order_by(_Run.id)))

    def count(self, table: str) -> int:
        """Row count of one of the tables (for checks and the CLI)."""
        models = {
            "stations": _Station,
            "units": _Unit,
            "runs": _Run,
            "points": _Point,
            "budget_terms": _BudgetTerm,
        }
        if table not in models:
            raise InputError("table", f"unknown table {table!r}", fix=f"one of {sorted(models)}")
        with Session(self.engine) as s:
            return int(s.execute(select(func.count()).select_from(models[table])).scalar_one())

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self) -> ResultsDatabase:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


__all__: Sequence[str] = (
    "ResultsDatabase",
    "DatabaseError",
    "LotYield",
    "FrequencyStats",
    "UnitRun",
    "SCHEMA_VERSION",
)

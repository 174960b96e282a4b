"""ENR tables of noise sources: our own CSV format, strict validation, interpolation.

File format (UTF-8 text, ``\\n`` or ``\\r\\n`` line ends)::

    # serial: NS-0042
    # calibration_temperature_k: 296.5
    # nominal_drive_v: 28
    # calibrated: 2026-03-01
    freq_hz,enr_db,u_enr_db
    10e6,15.41,0.12
    1e9,15.20,0.10
    6e9,14.83,0.11

- Lines starting with ``#`` before the header are metadata ``# key: value`` (keys: lower-case
  letters, digits and ``_``; each key once) or plain comments (no ``key:``). Known keys:
  ``serial``, ``description``, ``calibrated`` (ISO date), ``calibrated_by``,
  ``calibration_temperature_k`` (K, the source's physical temperature during its calibration),
  ``nominal_drive_v`` (V, the drive the table holds for), ``enr_reference`` (``t0`` or
  ``absolute``, see :mod:`noisebench.science.methods.yfactor`) and ``uncertainty_k`` (the coverage
  factor
  of the ``u_enr_db`` column when the certificate gives expanded uncertainties: the column is
  divided by it on loading, so the table always holds standard uncertainties). Other keys are
  kept as text in ``metadata.extra``.
- The header names the columns with their units, in any order: one frequency column
  (``freq_hz``, ``freq_khz``, ``freq_mhz`` or ``freq_ghz``; converted to Hz on loading),
  ``enr_db``, and optionally ``u_enr_db`` (standard uncertainty, dB). Blank lines are ignored;
  ``#`` lines after the header are comments.
- A table without a frequency column holds one frequency-independent value (one data row).

Validation (every problem names the line and the field): frequencies finite, > 0, <= 1 THz,
strictly ascending; ENR finite and within -10..45 dB; uncertainty finite and >= 0; at least one
row. Why -10..45 dB: -10 dB is a hot temperature only 29 K above T0 (a barely heated load, Y
already too small to be useful) and 45 dB is 9 million K, beyond any practical noise source, so
a value outside is almost surely a linear ENR, a wrong column or a typo. A ``freq_hz`` column
whose values are all below 1 kHz is refused as a unit mix-up (MHz or GHz numbers under a Hz
header).

Interpolation is linear in dB versus linear frequency (common practice for ENR tables); the
uncertainty is interpolated the same way. Outside the table's range :meth:`EnrTable.at` refuses
unless ``extrapolate="clamp"``, which holds the edge value and flags the result.
"""

from __future__ import annotations

import logging
import math
import re
from datetime import date
from pathlib import Path
from typing import Any, Literal, NamedTuple

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from noisebench.errors import InputError
from noisebench.science.physics import FloatOrArray
from noisebench.science.ranges import check_range, frequency_column_problem
from noisebench.science.tables import FREQ_COLUMNS, META_LINE, read_table_text, separator_problem
from noisebench.user_files import MAX_TABLE_ROWS, list_problems

logger = logging.getLogger(__name__)

__all__ = ["ENR_MIN_DB", "ENR_MAX_DB", "EnrMetadata", "EnrTable", "EnrValue", "validate_enr_file"]

ENR_MIN_DB = -10.0
ENR_MAX_DB = 45.0
FREQ_MAX_HZ = 1e12
_EDGE_REL_TOL = 1e-9  # frequencies this close to a table edge count as inside

_KNOWN_COLUMNS = set(FREQ_COLUMNS) | {"enr_db", "u_enr_db"}

Extrapolate = Literal["refuse", "clamp"]


class EnrValue(NamedTuple):
    """ENR at the requested frequencies: dB, standard uncertainty in dB (None when the table
    has none), and whether the value was clamped outside the table's range."""

    enr_db: FloatOrArray
    u_enr_db: FloatOrArray | None
    extrapolated: bool | np.ndarray


class EnrMetadata(BaseModel):
    """What the table's ``# key: value`` lines say about the source and its calibration."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    serial: str | None = None
    description: str | None = None
    calibrated: date | None = None
    calibrated_by: str | None = None
    calibration_temperature_k: float | None = Field(default=None, gt=0)
    nominal_drive_v: float | None = Field(default=None, gt=0)
    enr_reference: Literal["t0", "absolute"] | None = None
    extra: dict[str, str] = Field(default_factory=dict)

    @field_validator("calibration_temperature_k")
    @classmethod
    def _plausible_temperature(cls, v: float | None) -> float | None:
        if v is None:
            return v
        return check_range("physical_temperature_k", "calibration_temperature_k", v)

    @field_validator("nominal_drive_v")
    @classmethod
    def _plausible_drive(cls, v: float | None) -> float | None:
        return v if v is None else check_range("drive_v", "nominal_drive_v", v)


def _unwrap(exc: ValidationError) -> InputError | None:
    """The InputError a validator raised inside pydantic, if any."""
    for err in exc.errors():
        inner = (err.get("ctx") or {}).get("error")
        if isinstance(inner, InputError):
            return inner
    return None


def _column_problems(
    freq_hz: list[float], enr_db: list[float], u_enr_db: list[float] | None
) -> list[tuple[int, str, str]]:
    """(row index, field, message) for every problem of the table's columns."""
    problems: list[tuple[int, str, str]] = []
    if not enr_db:
        return [(-1, "enr_db", "the table has no rows")]
    if freq_hz and len(freq_hz) != len(enr_db):
        return [(-1, "freq_hz", f"has {len(freq_hz)} values for {len(enr_db)} ENR values")]
    if not freq_hz and len(enr_db) != 1:
        return [
            (
                -1,
                "freq_hz",
                "is missing: only a single frequency-independent value may go without frequencies",
            )
        ]
    if u_enr_db is not None and len(u_enr_db) != len(enr_db):
        return [(-1, "u_enr_db", f"has {len(u_enr_db)} values for {len(enr_db)} ENR values")]
    for i, f in enumerate(freq_hz):
        if not math.isfinite(f) or f <= 0:
            problems.append((i, "freq_hz", f"must be finite and > 0 (got {f!r})"))
        elif f > FREQ_MAX_HZ:
            problems.append((i, "freq_hz", f"{f:.6g} Hz is above 1 THz: check the unit"))
        elif i and math.isfinite(freq_hz[i - 1]) and f <= freq_hz[i - 1]:
            prev = f"{freq_hz[i - 1]:.6g} Hz"
            msg = (
                f"repeats {prev}"
                if f == freq_hz[i - 1]
                else f"not sorted ascending (follows {prev})"
            )
            problems.append((i, "freq_hz", msg))
    for i, e in enumerate(enr_db):
        if not math.isfinite(e):
            problems.append((i, "enr_db", f"must be finite (got {e!r})"))
        elif not ENR_MIN_DB <= e <= ENR_MAX_DB:
            problems.append(
                (
                    i,
                    "enr_db",
                    f"{e:g} dB is outside the plausible {ENR_MIN_DB:g}.."
                    f"{ENR_MAX_DB:g} dB (a linear ENR or a wrong column?)",
                )
            )
    for i, u in enumerate(u_enr_db or []):
        if not math.isfinite(u) or u < 0:
            problems.append((i, "u_enr_db", f"must be finite and >= 0 (got {u!r})"))
    return problems


class EnrTable(BaseModel):
    """ENR of a noise source versus frequency (Hz, dB, standard uncertainty in dB).

    An empty ``freq_hz`` with one ``enr_db`` value is a frequency-independent table
    (:meth:`constant`).
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    freq_hz: list[float] = Field(default_factory=list)
    enr_db: list[float]
    u_enr_db: list[float] | None = None
    metadata: EnrMetadata = Field(default_factory=EnrMetadata)

    def __init__(self, **data: Any) -> None:
        try:
            super().__init__(**data)
        except ValidationError as exc:
            inner = _unwrap(exc)
            if inner is not None:
                raise inner from None
            raise

    @model_validator(mode="after")
    def _check(self) -> EnrTable:
        problems = _column_problems(self.freq_hz, self.enr_db, self.u_enr_db)
        if problems:
            i, fld, msg = problems[0]
            where = f"{fld}[{i}]" if i >= 0 else fld
            raise InputError(where, msg, fix="correct the ENR table")
        return self

    # ----------------------------------------------------------------- construction

    @classmethod
    def constant(cls, enr_db: float, u_enr_db: float | None = None, **metadata: Any) -> EnrTable:
        """A frequency-independent table (one value, dB; standard uncertainty in dB)."""
        return cls(
            enr_db=[float(enr_db)],
            u_enr_db=None if u_enr_db is None else [float(u_enr_db)],
            metadata=EnrMetadata(**metadata),
        )

    @classmethod
    def from_csv(cls, source: str | Path, *, name: str | None = None) -> EnrTable:
        """Load a table from a file path or from the CSV text itself (a ``str`` holding a
        newline is text). Raises InputError naming the line and field of the first problem."""
        text, label = _read_source(source, name)
        table, problems = _parse(text, label)
        if problems:
            more = f" (+{len(problems) - 1} more problems)" if len(problems) > 1 else ""
            field, message = problems[0]
            raise InputError(
                field,
                message + more,
                fix="correct the ENR table; `noisebench validate` lists every problem",
            )
        assert table is not None
        logger.debug("loaded ENR table %s: %d points", label, len(table.enr_db))
        return table

    # ----------------------------------------------------------------- output

    def to_csv(self, path: str | Path | None = None) -> str:
        """The table in our CSV format (frequencies in Hz); also written to ``path`` if given."""
        lines = []
        meta = self.metadata.model_dump(exclude={"extra"}, exclude_none=True)
        for key, value in meta.items():
            lines.append(f"# {key}: {value.isoformat() if isinstance(value, date) else value}")
        for key, value in self.metadata.extra.items():
            lines.append(f"# {key}: {value}")
        cols = (
            (["freq_hz"] if self.freq_hz else [])
            + ["enr_db"]
            + (["u_enr_db"] if self.u_enr_db is not None else [])
        )
        lines.append(",".join(cols))
        for i, e in enumerate(self.enr_db):
            row = ([repr(self.freq_hz[i])] if self.freq_hz else []) + [repr(e)]
            if self.u_enr_db is not None:
                row.append(repr(self.u_enr_db[i]))
            lines.append(",".join(row))
        text = "\n".join(lines) + "\n"
        if path is not None:
            Path(path).write_text(text, encoding="utf-8")
        return text

    # ----------------------------------------------------------------- lookup

    @property
    def is_flat(self) -> bool:
        """True for a frequency-independent table."""
        return not self.freq_hz

    @property
    def range_hz(self) -> tuple[float, float] | None:
        """(lowest, highest) table frequency, Hz; None for a flat table."""
        return (self.freq_hz[0], self.freq_hz[-1]) if self.freq_hz else None

    def at(self, freq_hz: float | np.ndarray, *, extrapolate: Extrapolate = "refuse") -> EnrValue:
        """ENR (dB) and its uncertainty at ``freq_hz`` (Hz; scalar or array), linear in dB
        versus linear frequency. Outside the range: InputError, or with ``"clamp"`` the edge
        value flagged ``extrapolated``."""
        if extrapolate not in ("refuse", "clamp"):
            raise InputError("extrapolate", f"must be 'refuse' or 'clamp' (got {extrapolate!r})")
        f = np.asarray(freq_hz, dtype=float)
        if not np.all(np.isfinite(f)) or np.any(f <= 0):
            raise InputError("freq_hz", "must be finite and > 0 Hz", value=freq_hz)
        scalar = f.ndim == 0
        enr = np.asarray(self.enr_db)
        u = None if self.u_enr_db is None else np.asarray(self.u_enr_db)
        if self.is_flat:
            out_enr = np.full(f.shape, enr[0])
            out_u = None if u is None else np.full(f.shape, u[0])
            outside = np.zeros(f.shape, dtype=bool)
        else:
            grid = np.asarray(self.freq_hz)
            lo, hi = grid[0], grid[-1]
            outside = (f < lo * (1 - _EDGE_REL_TOL)) | (f > hi * (1 + _EDGE_REL_TOL))
            if np.any(outside) and extrapolate == "refuse":
                bad = float(np.ravel(f[outside])[0])
                raise InputError(
                    "freq_hz",
                    f"{bad:.6g} Hz is outside the ENR table's range {lo:.6g}..{hi:.6g} Hz",
                    fix="extend the table or allow extrapolate='clamp'",
                    serial=self.metadata.serial,
                )
            out_enr = np.interp(f, grid, enr)
            out_u = None if u is None else np.interp(f, grid, u)
        if scalar:
            return EnrValue(float(out_enr), None if out_u is None else float(out_u), bool(outside))
        return EnrValue(out_enr, out_u, outside)


# --------------------------------------------------------------------------- parsing


def _read_source(source: str | Path, name: str | None) -> tuple[str, str]:
    text, label = read_table_text(source, name, what="ENR table file", text_label="ENR text")
    return text.removeprefix("\ufeff"), label  # a byte-order mark (spreadsheet export) is fine


def _parse_metadata(
    items: dict[str, tuple[int, str]], label: str
) -> tuple[EnrMetadata | None, float, list[tuple[str, str]]]:
    """(metadata, coverage factor of the u column, problems) from the ``# key: value`` lines."""
    known = set(EnrMetadata.model_fields) - {"extra"}
    problems: list[tuple[str, str]] = []
    items = dict(items)
    coverage_k = 1.0
    if "uncertainty_k" in items:
        line, value = items.pop("uncertainty_k")
        try:
            coverage_k = float(value)
        except ValueError:
            coverage_k = math.nan
        if not (math.isfinite(coverage_k) and coverage_k >= 1):
            problems.append(
                (f"{label} line {line}, uncertainty_k", f"must be a number >= 1 (got {value!r})")
            )
            coverage_k = 1.0
    values = {k: v for k, (_, v) in items.items() if k in known}
    extra = {k: v for k, (_, v) in items.items() if k not in known}
    try:
        return EnrMetadata.model_validate({**values, "extra": extra}), coverage_k, problems
    except ValidationError as exc:
        for err in exc.errors():
            key = str(err["loc"][0])
            inner = (err.get("ctx") or {}).get("error")
            msg = (
                str(inner).removeprefix(f"{key}: ") if isinstance(inner, InputError) else err["msg"]
            )
            problems.append((f"{label} line {items[key][0]}, {key}", msg))
        return None, coverage_k, problems


def _parse_header(line_no: int, line: str, label: str) -> tuple[list[str], list[tuple[str, str]]]:
    cols = [c.strip().lower() for c in line.split(",")]
    problems = []
    where = f"{label} line {line_no}, header"
    separator = separator_problem(line)
    if separator:
        return cols, [
            (
                where,
                f"columns are separated by {separator!r}; this format uses "
                "commas (and '.' as the decimal point)",
            )
        ]
    for c in cols:
        if c not in _KNOWN_COLUMNS:
            problems.append(
                (
                    where,
                    f"unknown column {c!r} (columns: freq_hz|freq_khz|freq_mhz|"
                    "freq_ghz, enr_db, u_enr_db)",
                )
            )
    if len(set(cols)) != len(cols):
        problems.append((where, "repeats a column"))
    if sum(c in FREQ_COLUMNS for c in cols) > 1:
        problems.append((where, "has more than one frequency column"))
    if "enr_db" not in cols:
        problems.append((where, "has no enr_db column"))
    return cols, problems


def _parse(text: str, label: str) -> tuple[EnrTable | None, list[tuple[str, str]]]:
    """Parse CSV text into a table, collecting every problem as (field, message)."""
    problems: list[tuple[str, str]] = []
    meta_items: dict[str, tuple[int, str]] = {}
    header: list[str] | None = None
    header_line = 0
    rows: list[tuple[int, list[float]]] = []
    for line_no, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line:
            continue
        if line.startswith("#"):
            m = META_LINE.match(line)
            if m and header is None:
                key, value = m.groups()
                if key in meta_items:
                    problems.append(
                        (
                            f"{label} line {line_no}, {key}",
                            f"repeats metadata from line {meta_items[key][0]}",
                        )
                    )
                meta_items[key] = (line_no, value)
            elif m:
                problems.append(
                    (
                        f"{label} line {line_no}, {m.group(1)}",
                        "metadata must come before the header",
                    )
                )
            continue
        if header is None:
            header, header_problems = _parse_header(line_no, line, label)
            header_line = line_no
            problems += header_problems
            continue
        if len(rows) >= MAX_TABLE_ROWS:
            return None, [
                (
                    f"{label} line {line_no}",
                    f"the table has more than {MAX_TABLE_ROWS} rows, the limit for an ENR "
                    "table (thin it out: an ENR table needs far fewer points)",
                )
            ]
        fields = [c.strip() for c in line.split(",")]
        if len(fields) != len(header):
            problems.append(
                (
                    f"{label} line {line_no}",
                    f"has {len(fields)} fields, the header has {len(header)}",
                )
            )
            continue
        values: list[float] = []
        for col, cell in zip(header, fields, strict=True):
            try:
                x = float(cell)
            except ValueError:
                problems.append((f"{label} line {line_no}, {col}", f"not a number: {cell!r}"))
                x = math.nan
            else:
                if not math.isfinite(x):
                    problems.append(
                        (f"{label} line {line_no}, {col}", f"must be finite (got {cell!r})")
                    )
            values.append(x)
        rows.append((line_no, values))

    if header is None:
        return None, problems + [(label, "has no header line (e.g. freq_hz,enr_db,u_enr_db)")]
    if not rows:
        return None, problems + [(f"{label} line {header_line}", "the table has no data rows")]
    meta, coverage_k, meta_problems = _parse_metadata(meta_items, label)
    problems += meta_problems
    if any(p[0].endswith(", header") for p in problems):
        return None, sorted(problems, key=_line_number)
    table = _table_from_rows(header, rows, meta, coverage_k, label, problems)
    problems.sort(key=_line_number)
    return (table if not problems else None), problems


def _table_from_rows(
    header: list[str],
    rows: list[tuple[int, list[float]]],
    meta: EnrMetadata | None,
    coverage_k: float,
    label: str,
    problems: list[tuple[str, str]],
) -> EnrTable | None:
    col = {name: i for i, name in enumerate(header)}
    freq_col = next((c for c in header if c in FREQ_COLUMNS), None)
    line_of = [ln for ln, _ in rows]
    scale = FREQ_COLUMNS[freq_col] if freq_col else 1.0
    freq = [r[col[freq_col]] * scale for _, r in rows] if freq_col else []
    enr = [r[col["enr_db"]] for _, r in rows]
    u = [r[col["u_enr_db"]] for _, r in rows] if "u_enr_db" in col else None
    unit_slip = frequency_column_problem(freq, freq_col or "")
    if unit_slip is not None:
        problems.append((f"{label} line {line_of[0]}, freq_hz", unit_slip))
    reported = {p[0] for p in problems}  # a set: linear in the number of rows
    for i, fld, msg in _column_problems(freq, enr, u):
        where = f"{label} line {line_of[i]}, {fld}" if i >= 0 else f"{label}, {fld}"
        if where not in reported:  # NaN cells were reported already
            problems.append((where, msg))
            reported.add(where)
    if problems:
        return None
    if u is not None:
        u = [x / coverage_k for x in u]
    return EnrTable(freq_hz=freq, enr_db=enr, u_enr_db=u, metadata=meta or EnrMetadata())


def _line_number(problem: tuple[str, str]) -> int:
    m = re.search(r" line (\d+)", problem[0])
    return int(m.group(1)) if m else 10**9


def validate_enr_file(path: str | Path) -> list[str]:
    """Every problem of an ENR table file as one line each (empty list: the file is good)."""
    try:
        text, label = _read_source(path, None)
    except InputError as exc:
        return [str(exc)]
    _, problems = _parse(text, label)
    return list_problems([f"{field}: {message}" for field, message in problems])

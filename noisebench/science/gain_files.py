"""Gain and loss versus frequency: DUT gain, cable and adapter loss, from files.

Two formats, chosen by the file name:

- ``*.s2p`` - Touchstone (read by scikit-rf, optional dependency ``noisebench[touchstone]``):
  the gain is |S21| in dB versus frequency.
- anything else - our CSV format, the same layout as the ENR tables::

      # description: input cable, 1.5 m
      # serial: CBL-0107
      # temperature_k: 296.5
      freq_hz,loss_db,u_loss_db
      100e6,0.21,0.02
      6e9,1.63,0.04

  ``# key: value`` metadata lines (lower-case keys, each once) come before the header. The
  header names one frequency column (``freq_hz``, ``freq_khz``, ``freq_mhz`` or ``freq_ghz``,
  converted to Hz) and either ``gain_db`` (with optional ``u_gain_db``) or ``loss_db`` (with
  optional ``u_loss_db``; loss = -gain). Uncertainties are standard uncertainties in dB.
  ``temperature_k`` is the physical temperature of a passive part (its loss adds noise).
  Without a frequency column the single data row is a frequency-independent value.

Interpolation is linear in dB versus linear frequency, for both formats: scikit-rf's own
``Network.interpolate`` works on the complex S-parameters, which makes false dips in |S21|
between points where the phase turns fast. Outside the table's range :meth:`GainTable.at`
refuses (InputError naming the frequency and the range) unless ``extrapolate="clamp"``, which
holds the edge value and flags the result.

Validation names the line and the field: frequencies finite, > 0, <= 1 THz and strictly
ascending; gain finite and within -200..+100 dB (a value outside is a unit or column
mix-up, not a cable or an amplifier); uncertainty finite and >= 0; at least one row.
"""

from __future__ import annotations

import logging
import math
import re
import warnings
from pathlib import Path
from typing import Any, Literal, NamedTuple

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_serializer, field_validator

from noisebench.errors import InputError
from noisebench.science.ranges import check_range, frequency_column_problem
from noisebench.science.tables import (
    FREQ_COLUMNS,
    read_table_text,
    scan_csv_table,
    separator_problem,
)
from noisebench.user_files import MAX_TOUCHSTONE_BYTES, check_file_size, check_row_count

logger = logging.getLogger(__name__)

__all__ = ["GAIN_MAX_DB", "GAIN_MIN_DB", "GainTable", "GainValue", "load_gain_table"]

GAIN_MIN_DB = -200.0
GAIN_MAX_DB = 100.0
FREQ_MAX_HZ = 1e12
_EDGE_REL_TOL = 1e-9
_VALUE_COLUMNS = {"gain_db": ("u_gain_db", 1.0), "loss_db": ("u_loss_db", -1.0)}

Extrapolate = Literal["refuse", "clamp"]


class GainValue(NamedTuple):
    """Gain at the requested frequencies: dB, standard uncertainty in dB (None when the table
    has none), and whether each value was clamped at a table edge. Arrays for array input."""

    gain_db: Any
    u_gain_db: Any
    extrapolated: Any

    @property
    def loss_db(self) -> Any:
        return -self.gain_db


class GainTable(BaseModel):
    """Gain (dB) versus frequency (Hz), with optional standard uncertainty and metadata."""

    model_config = ConfigDict(arbitrary_types_allowed=True, extra="forbid", frozen=True)

    freq_hz: np.ndarray = Field(description="ascending frequencies, Hz (empty: flat value)")
    gain_db: np.ndarray
    u_gain_db: np.ndarray | None = None
    metadata: dict[str, str] = Field(default_factory=dict)
    source: str = "<memory>"

    @field_validator("freq_hz", "gain_db", "u_gain_db", mode="before")
    @classmethod
    def _as_array(cls, v: Any) -> Any:
        if v is None:
            return None
        arr = np.atleast_1d(np.array(v, dtype=float))
        arr.setflags(write=False)  # the table is frozen: so are its arrays
        return arr

    def model_post_init(self, __context: Any) -> None:
        problems = _column_problems(
            list(self.freq_hz),
            list(self.gain_db),
            None if self.u_gain_db is None else list(self.u_gain_db),
        )
        if problems:
            index, fld, msg = problems[0]
            where = f"row {index + 1}" if index >= 0 else "table"
            raise InputError(f"{self.source} {where}, {fld}", msg, fix="check the gain/loss table")

    @field_serializer("freq_hz", "gain_db", "u_gain_db")
    def _ser(self, v: np.ndarray | None) -> list[float] | None:
        return None if v is None else v.tolist()

    # -- construction ------------------------------------------------------------------

    @classmethod
    def constant(
        cls,
        gain_db: float,
        u_gain_db: float | None = None,
        *,
        source: str = "constant",
        **metadata: str,
    ) -> GainTable:
        """A frequency-independent gain (use a negative value, or :meth:`constant_loss`)."""
        return cls(
            freq_hz=np.empty(0),
            gain_db=np.asarray([gain_db], dtype=float),
            u_gain_db=None if u_gain_db is None else np.asarray([u_gain_db], dtype=float),
            metadata={k: str(v) for k, v in metadata.items()},
            source=source,
        )

    @classmethod
    def constant_loss(
        cls,
        loss_db: float,
        u_loss_db: float | None = None,
        *,
        source: str = "constant",
        **metadata: str,
    ) -> GainTable:
        """A frequency-independent loss of ``loss_db`` (dB, >= 0 for a passive part)."""
        return cls.constant(-float(loss_db), u_loss_db, source=source, **metadata)

    @classmethod
    def from_csv(cls, source: str | Path, *, name: str | None = None) -> GainTable:
        """Read our CSV format from a path or from text (text contains a newline)."""
        text, label = _read_text(source, name)
        return _parse_csv(text, label)

    @classmethod
    def from_touchstone(cls, path: str | Path, *, u_gain_db: float | None = None) -> GainTable:
        """|S21| in dB of a Touchstone ``.s2p`` file (needs scikit-rf)."""
        return _read_touchstone(Path(path), u_gain_db)

    # -- use ---------------------------------------------------------------------------

    @property
    def is_flat(self) -> bool:
        return self.freq_hz.size == 0

    @property
    def range_hz(self) -> tuple[float, float] | None:
        return None if self.is_flat else (float(self.freq_hz[0]), float(self.freq_hz[-1]))

    @property
    def temperature_k(self) -> float | None:
        """Physical temperature from the ``temperature_k`` metadata (None when absent)."""
        value = self.metadata.get("temperature_k")
        return None if value is None else float(value)

    def at(self, freq_hz: float | np.ndarray, *, extrapolate: Extrapolate = "refuse") -> GainValue:
        """Gain at ``freq_hz`` (Hz), linear in dB versus frequency. Scalar in, scalars out."""
        if extrapolate not in ("refuse", "clamp"):
            raise InputError("extrapolate", f"must be 'refuse' or 'clamp' (got {extrapolate!r})")
        f = np.asarray(freq_hz, dtype=float)
        scalar = f.ndim == 0
        f = np.atleast_1d(f)
        if not np.all(np.isfinite(f)) or np.any(f <= 0):
            raise InputError("freq_hz", "must be finite and > 0", value=freq_hz)
        if self.is_flat:
            gain = np.full(f.shape, self.gain_db[0])
            u = None if self.u_gain_db is None else np.full(f.shape, self.u_gain_db[0])
            outside = np.zeros(f.shape, dtype=bool)
        else:
            lo, hi = float(self.freq_hz[0]), float(self.freq_hz[-1])
            tol = _EDGE_REL_TOL * hi
            outside = (f < lo - tol) | (f > hi + tol)
            if np.any(outside) and extrapolate == "refuse":
                bad = float(f[outside][0])
                raise InputError(
                    "freq_hz",
                    f"{bad:.6g} Hz is outside the range {lo:.6g}..{hi:.6g} Hz of {self.source}",
                    value=bad,
                    fix="extend the table, or allow clamping at its edges",
                )
            gain = np.interp(f, self.freq_hz, self.gain_db)
            u = None if self.u_gain_db is None else np.interp(f, self.freq_hz, self.u_gain_db)
        if scalar:
            return GainValue(float(gain[0]), None if u is None else float(u[0]), bool(outside[0]))
        return GainValue(gain, u, outside)

    def to_csv(self) -> str:
        """The table in our CSV format (gain columns)."""
        lines = [f"# {k}: {v}" for k, v in self.metadata.items()]
        u_col = self.u_gain_db
        has_u = u_col is not None
        if self.is_flat:
            lines.append("gain_db" + (",u_gain_db" if has_u else ""))
            lines.append(_row([], self.gain_db[0], u_col[0] if u_col is not None else None))
        else:
            lines.append("freq_hz,gain_db" + (",u_gain_db" if has_u else ""))
            for i, f in enumerate(self.freq_hz):
                lines.append(_row([f], self.gain_db[i], u_col[i] if u_col is not None else None))
        return "\n".join(lines) + "\n"


def load_gain_table(path: str | Path, *, u_gain_db: float | None = None) -> GainTable:
    """Gain or loss table from ``path``: Touchstone for ``.s2p``, our CSV format otherwise.

    ``u_gain_db`` gives Touchstone data (which has no uncertainty column) a standard
    uncertainty, dB."""
    p = Path(path)
    suffix = p.suffix.lower()
    if re.fullmatch(r"\.s\d+p", suffix):
        if suffix != ".s2p":
            raise InputError(
                str(p),
                f"is a {suffix} Touchstone file; gain needs a two-port",
                fix="export the two-port S-parameters as .s2p",
            )
        return GainTable.from_touchstone(p, u_gain_db=u_gain_db)
    if u_gain_db is not None:
        raise InputError(
            "u_gain_db",
            "applies to Touchstone files only",
            fix="put a u_gain_db column in the CSV file",
        )
    return GainTable.from_csv(p)


# ----------------------------------------------------------------------------- CSV


def _row(freq: list[float], gain: float, u: float | None) -> str:
    cells = [repr(float(x)) for x in freq] + [repr(float(gain))]
    if u is not None:
        cells.append(repr(float(u)))
    return ",".join(cells)


def _read_text(source: str | Path, name: str | None) -> tuple[str, str]:
    text, label = read_table_text(source, name, what="gain/loss table", text_label="gain text")
    return text.removeprefix("\ufeff"), label  # a byte-order mark (spreadsheet export) is fine


def _parse_header(line: str, where: str) -> tuple[list[str], str, float]:
    cols = [c.strip().lower() for c in line.split(",")]
    separator = separator_problem(line)
    if separator is not None:
        raise InputError(
            f"{where}, header",
            f"columns are separated by {separator!r}",
            fix="this format uses commas (and '.' as the decimal point)",
        )
    known = set(FREQ_COLUMNS) | set(_VALUE_COLUMNS) | {u for u, _ in _VALUE_COLUMNS.values()}
    unknown = [c for c in cols if c not in known]
    if unknown:
        raise InputError(
            f"{where}, header",
            f"unknown column(s) {unknown}",
            fix="columns: freq_hz|freq_khz|freq_mhz|freq_ghz, gain_db[,u_gain_db] "
            "or loss_db[,u_loss_db]",
        )
    if len(set(cols)) != len(cols):
        raise InputError(f"{where}, header", "repeats a column")
    if sum(c in FREQ_COLUMNS for c in cols) > 1:
        raise InputError(f"{where}, header", "has more than one frequency column")
    values = [c for c in cols if c in _VALUE_COLUMNS]
    if len(values) != 1:
        raise InputError(
            f"{where}, header",
            "needs exactly one of gain_db or loss_db",
            fix="e.g. 'freq_hz,gain_db,u_gain_db'",
        )
    u_col, sign = _VALUE_COLUMNS[values[0]]
    stray = [c for c in cols if c.startswith("u_") and c != u_col]
    if stray:
        raise InputError(
            f"{where}, header",
            f"{stray[0]} does not belong with {values[0]}",
            fix=f"name the uncertainty column {u_col}",
        )
    return cols, values[0], sign


def _parse_csv(text: str, label: str) -> GainTable:
    chosen: list[tuple[str, float]] = []

    def header(line: str, where: str) -> list[str]:
        cols, value_col, sign = _parse_header(line, where)
        chosen.append((value_col, sign))
        return cols

    table = scan_csv_table(
        text,
        label,
        what="gain/loss table",
        parse_header=header,
        header_example="freq_hz,gain_db,u_gain_db",
    )
    _check_temperature(table.metadata, label)
    value_col, sign = chosen[0]
    return _table_from_rows(table.header, value_col, sign, table.rows, table.metadata, label)


def _check_temperature(metadata: dict[str, str], label: str) -> None:
    if "temperature_k" not in metadata:
        return
    try:
        value = float(metadata["temperature_k"])
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value > 0):
        raise InputError(
            f"{label}, temperature_k",
            f"must be a temperature in K (> 0), got {metadata['temperature_k']!r}",
        )
    cryogenic = metadata.get("cryogenic", "").strip().lower() in ("true", "yes", "1")
    try:
        check_range("physical_temperature_k", "temperature_k", value, on_purpose=cryogenic)
    except InputError as exc:
        raise InputError(
            f"{label}, temperature_k",
            exc.message.removeprefix("temperature_k: ").replace(
                "say cryogenic = true in [corrections]", "add a '# cryogenic: true' line"
            ),
        ) from None


def _table_from_rows(
    header: list[str],
    value_col: str,
    sign: float,
    rows: list[tuple[int, list[float]]],
    metadata: dict[str, str],
    label: str,
) -> GainTable:
    col = {name: i for i, name in enumerate(header)}
    freq_col = next((c for c in header if c in FREQ_COLUMNS), None)
    u_col = _VALUE_COLUMNS[value_col][0]
    lines = [n for n, _ in rows]
    if freq_col is None and len(rows) != 1:
        raise InputError(
            f"{label} line {lines[1]}",
            "a table without a frequency column holds one row",
            fix="add a freq_hz column",
        )
    freq = [r[col[freq_col]] * FREQ_COLUMNS[freq_col] for _, r in rows] if freq_col else []
    unit_slip = frequency_column_problem(freq, freq_col or "")
    if unit_slip is not None:
        raise InputError(f"{label} line {lines[0]}, freq_hz", unit_slip)
    gain = [sign * r[col[value_col]] for _, r in rows]
    u = [r[col[u_col]] for _, r in rows] if u_col in col else None
    problems = _column_problems(freq, gain, u, loss=sign < 0)
    if problems:
        index, fld, msg = problems[0]
        where = f"{label} line {lines[index]}" if index >= 0 else label
        raise InputError(f"{where}, {value_col if fld == 'gain_db' else fld}", msg)
    return GainTable(
        freq_hz=np.asarray(freq),
        gain_db=np.asarray(gain, dtype=float),
        u_gain_db=None if u is None else np.asarray(u, dtype=float),
        metadata=metadata,
        source=label,
    )


def _column_problems(
    freq: list[float], gain: list[float], u: list[float] | None, *, loss: bool = False
) -> list[tuple[int, str, str]]:
    """(row index, field, message) of every problem (index -1: the whole table)."""
    out: list[tuple[int, str, str]] = []
    if not gain:
        out.append((-1, "gain_db", "the table is empty"))
    if freq and len(freq) != len(gain):
        out.append((-1, "freq_hz", f"{len(freq)} frequencies for {len(gain)} values"))
    if u is not None and len(u) != len(gain):
        out.append((-1, "u_gain_db", f"{len(u)} uncertainties for {len(gain)} values"))
    for i, f in enumerate(freq):
        if not (math.isfinite(f) and 0 < f <= FREQ_MAX_HZ):
            out.append((i, "freq_hz", f"must be finite, > 0 and <= 1 THz (got {f!r})"))
        elif i and not f > freq[i - 1]:
            out.append((i, "freq_hz", f"not strictly ascending (follows {freq[i - 1]:.6g})"))
    for i, g in enumerate(gain):
        if not (math.isfinite(g) and GAIN_MIN_DB <= g <= GAIN_MAX_DB):
            shown = -g if loss else g
            out.append(
                (
                    i,
                    "gain_db",
                    f"{shown!r} dB is not a plausible "
                    f"{'loss' if loss else 'gain'} (allowed "
                    f"{GAIN_MIN_DB:g}..{GAIN_MAX_DB:g} dB of gain)",
                )
            )
    for i, x in enumerate(u or []):
        if not (math.isfinite(x) and x >= 0):
            out.append((i, "u_gain_db", f"must be finite and >= 0 (got {x!r})"))
    return sorted(out, key=lambda p: p[0])


# ----------------------------------------------------------------------------- Touchstone


def _read_touchstone(path: Path, u_gain_db: float | None) -> GainTable:
    try:
        import skrf
    except ImportError:
        raise InputError(
            str(path),
            "reading Touchstone files needs scikit-rf",
            fix="pip install 'noisebench[touchstone]' (or scikit-rf)",
        ) from None
    if not path.is_file():
        raise InputError(str(path), "Touchstone file not found", fix="check the path")
    check_file_size(path, MAX_TOUCHSTONE_BYTES, field=str(path), what="Touchstone file")
    try:
        with warnings.catch_warnings():  # its warnings would reach the user as raw text
            warnings.simplefilter("ignore")
            network = skrf.Network(str(path))
    except Exception as exc:  # noqa: BLE001 - scikit-rf raises many kinds on a bad file
        raise InputError(
            str(path),
            f"is not a readable Touchstone file: {exc}",
            fix="check the file (option line '# HZ S MA R 50', data rows)",
        ) from None
    if network.nports != 2:
        raise InputError(str(path), f"has {network.nports} ports; gain needs a two-port")
    check_row_count(len(network.f), field=str(path), what="Touchstone gain table")
    magnitude = np.abs(network.s[:, 1, 0])
    if np.any(magnitude <= 0):
        bad = float(network.f[np.argmax(magnitude <= 0)])
        raise InputError(f"{path.name}, S21", f"is zero at {bad:.6g} Hz (no transmission)")
    with np.errstate(invalid="ignore"):
        gain = 20.0 * np.log10(magnitude)
    u = None if u_gain_db is None else np.full(gain.shape, float(u_gain_db))
    freq = [float(f) for f in network.f]
    problems = _column_problems(
        freq, [float(g) for g in gain], None if u is None else [float(x) for x in u]
    )
    if problems:  # the same checks as GainTable, reported as one plain line
        index, fld, msg = problems[0]
        where = f"data row {index + 1}" if index >= 0 else "data"
        if fld == "gain_db":
            fld = "S21"
            if not math.isfinite(float(gain[index])):
                msg = f"is not a finite number (got {float(magnitude[index])!r})"
        raise InputError(f"{path.name} {where}, {fld}", msg, fix="check the Touchstone file")
    metadata = {"format": "touchstone", "s_parameter": "S21"}
    comments = (network.comments or "").strip()
    if comments:
        metadata["comments"] = " ".join(comments.split())[:500]
    return GainTable(
        freq_hz=np.asarray(network.f, dtype=float),
        gain_db=gain,
        u_gain_db=u,
        metadata=metadata,
        source=path.name,
    )

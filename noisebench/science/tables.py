"""The small CSV tables users write: reading the file or text, and the one scanner of the
frequency-column table format (gain and loss tables, image-rejection tables; the ENR reader,
which lists every problem instead of stopping at the first, shares the file reading)."""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from noisebench.errors import InputError
from noisebench.user_files import (
    MAX_TABLE_BYTES,
    check_row_count,
    check_text_size,
    read_user_text,
)


def read_table_text(
    source: str | Path, name: str | None, *, what: str, text_label: str
) -> tuple[str, str]:
    """``(text, label)`` of a table given as a path or as the table text itself.

    ``source`` holding a line break is taken as the text (``label`` = ``name`` or
    ``text_label``); otherwise it is a UTF-8 file path (``label`` = ``name`` or the file name).
    ``what`` names the table in the not-found message ("ENR table file", "gain/loss table").
    Files and texts above :data:`noisebench.user_files.MAX_TABLE_BYTES` are refused unread.
    """
    if isinstance(source, str) and ("\n" in source or "\r" in source):
        label = name or text_label
        check_text_size(source, MAX_TABLE_BYTES, field=label, what=what)
        return source, label
    path = Path(source)
    label = name or path.name
    text = read_user_text(path, MAX_TABLE_BYTES, field=label, what=what)
    return text, label


# --------------------------------------------------------------------------- the one CSV reader

FREQ_COLUMNS = {"freq_hz": 1.0, "freq_khz": 1e3, "freq_mhz": 1e6, "freq_ghz": 1e9}
"""Frequency column names and their scale to Hz, for every frequency-column table."""

META_LINE = re.compile(r"^#\s*([a-z][a-z0-9_]*)\s*:\s*(.*?)\s*$")


@dataclass(frozen=True)
class CsvTable:
    """A scanned table: ``# key: value`` metadata, the header's column names (lower case) and
    the data rows as floats, each with its line number in the file."""

    label: str
    metadata: dict[str, str]
    header: list[str]
    rows: list[tuple[int, list[float]]]

    @property
    def freq_column(self) -> str | None:
        """The header's frequency column (one of :data:`FREQ_COLUMNS`), or None."""
        return next((c for c in self.header if c in FREQ_COLUMNS), None)

    def freq_hz(self) -> list[float]:
        """The frequency column in Hz (empty without a frequency column)."""
        name = self.freq_column
        if name is None:
            return []
        return self.column(name, scale=FREQ_COLUMNS[name])

    def column(self, name: str, scale: float = 1.0) -> list[float]:
        """The values of column ``name`` (times ``scale``), in row order."""
        index = self.header.index(name)
        return [row[index] * scale for _, row in self.rows]

    def where(self, row_index: int) -> str:
        """``"<label> line N"`` of a data row."""
        return f"{self.label} line {self.rows[row_index][0]}"


def separator_problem(line: str) -> str | None:
    """The separator a header uses instead of a comma, or None."""
    if "," not in line and (";" in line or "\t" in line):
        return ";" if ";" in line else "\t"
    return None


def scan_csv_table(
    text: str,
    label: str,
    *,
    what: str,
    parse_header: Callable[[str, str], list[str]],
    header_example: str,
) -> CsvTable:
    """Scan our CSV table format (ENR-like layout) into a :class:`CsvTable`; InputError naming
    the line on the first problem.

    ``# key: value`` lines before the header are metadata (each key once); other ``#`` lines
    and blank lines are ignored; a leading byte-order mark is dropped. ``parse_header(line,
    where)`` checks the header and returns its column names. Every row must have the header's
    number of fields, each a finite number; at most ``MAX_TABLE_ROWS`` rows are read.
    ``header_example`` is shown when the header is missing (e.g. ``freq_hz,gain_db``).
    """
    metadata: dict[str, str] = {}
    header: list[str] | None = None
    rows: list[tuple[int, list[float]]] = []
    for line_no, raw in enumerate(text.removeprefix("\ufeff").splitlines(), start=1):
        line = raw.strip()
        where = f"{label} line {line_no}"
        if not line:
            continue
        if line.startswith("#"):
            match = META_LINE.match(line)
            if match and header is None:
                key, value = match.groups()
                if key in metadata:
                    raise InputError(f"{where}, {key}", "repeats a metadata key")
                metadata[key] = value
            continue
        if header is None:
            header = parse_header(line, where)
            continue
        check_row_count(len(rows) + 1, field=where, what=what)
        cells = [c.strip() for c in line.split(",")]
        if len(cells) != len(header):
            raise InputError(where, f"has {len(cells)} fields, the header has {len(header)}")
        rows.append(
            (line_no, [_number(c, col, where) for c, col in zip(cells, header, strict=True)])
        )
    if header is None:
        raise InputError(label, "has no header line", fix=f"e.g. '{header_example}'")
    if not rows:
        raise InputError(label, "has no data rows")
    return CsvTable(label=label, metadata=metadata, header=header, rows=rows)


def _number(cell: str, column: str, where: str) -> float:
    try:
        value = float(cell)
    except ValueError:
        raise InputError(f"{where}, {column}", f"not a number: {cell!r}") from None
    if not math.isfinite(value):
        raise InputError(f"{where}, {column}", f"must be finite (got {cell!r})")
    return value

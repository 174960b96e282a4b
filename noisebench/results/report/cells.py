"""What every section of the report shares: the template node types, the Jinja2 environment,
the formatters of numbers, frequencies and times, and the look-ups into a run record.

The node types (:class:`VerdictTag`, :class:`Table`, ...) are plain data that the macros of
``templates/macros.html`` render; nothing here builds HTML.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any, TypeGuard

import jinja2

from noisebench.results.plots import (
    VERDICT_STYLE,
    VERDICT_SYMBOL,
    frequency_scale,
)
from noisebench.results.store import (
    RunRecord,
)
from noisebench.units import format_frequency

DETAIL_ROWS_MAX = 250  # per-frequency budget/calibration tables only up to this many rows
FREQUENCY_DIGITS = 7  # significant digits of a frequency column at most (1 kHz at 6 GHz)
SCROLL_ROWS = 100  # tables longer than this scroll inside a box with a fixed header
DEFAULT_T0_K = 290.0

#: Words and units of field names in generic tables (``system_nf_db`` -> ``System NF (dB)``).
LABEL_WORDS = {
    "nf": "NF",
    "te": "Te",
    "enr": "ENR",
    "rbw": "RBW",
    "vbw": "VBW",
    "dut": "DUT",
    "u": "u",
    "y": "Y",
    "db": "dB",
    "dbm": "dBm",
    "sa": "SA",
    "mc": "MC",
    "snr": "SNR",
    "freq": "frequency",
}
LABEL_OVERRIDES = {
    "points": "Trace points",
    "attenuation_db": "Atten. (dB)",
    "ref_level_dbm": "Ref. level (dBm)",
    "averaging_scale": "Averaging",
    "freq_hz": "Frequency",
    "start_hz": "Start",
    "stop_hz": "Stop",
    "through_dbm": "Tone, THROUGH pass (dBm)",
    "dut_dbm": "Tone, DUT pass (dBm)",
    "snr_through_db": "SNR, THROUGH pass (dB)",
    "snr_dut_db": "SNR, DUT pass (dB)",
}
LABEL_UNITS = (
    ("_dbm_per_hz", "dBm/Hz"),
    ("_w_per_hz", "W/Hz"),
    ("_dbm", "dBm"),
    ("_db", "dB"),
    ("_hz", ""),
    ("_k", "K"),
    ("_s", "s"),
    ("_a", "A"),
    ("_v", "V"),
)


@dataclass(frozen=True)
class VerdictTag:
    """A verdict as symbol + word in its colour class (``macros.verdict``)."""

    css: str
    text: str
    kind: str = "verdict"


@dataclass(frozen=True)
class FlagTags:
    """Flag codes with their meaning as hover text (``macros.flags``)."""

    items: tuple[tuple[str, str], ...]
    kind: str = "flags"


@dataclass(frozen=True)
class Strong:
    text: str
    kind: str = "strong"


@dataclass(frozen=True)
class Seq:
    """Cells shown one after the other (text and tags)."""

    items: tuple[Any, ...]
    kind: str = "seq"


@dataclass(frozen=True)
class KeyValues:
    """A two-column table of labels and values."""

    rows: tuple[tuple[str, Any], ...]
    kind: str = "kv"


@dataclass(frozen=True)
class Pre:
    text: str
    kind: str = "pre"


@dataclass(frozen=True)
class Header:
    """A column header: label, hover text, numeric (plain tables) or text (grid tables)."""

    label: str
    numeric: bool = False
    title: str = ""
    text: bool = False


@dataclass(frozen=True)
class Table:
    """Headers and rows of cells. ``grid``: compact, numbers aligned by the table's class;
    ``box``: "wrap" scrolls sideways, "scroll" also scrolls down under a fixed header."""

    headers: tuple[Header, ...]
    rows: tuple[tuple[Any, ...], ...]
    css: str = ""
    grid: bool = False
    box: str = "wrap"
    kind: str = "table"


# ----------------------------------------------------------------------------- templates

_ENVIRONMENT: jinja2.Environment | None = None


def environment() -> jinja2.Environment:
    """The report's Jinja2 environment: package templates, autoescape always on, strict."""
    global _ENVIRONMENT
    if _ENVIRONMENT is None:
        _ENVIRONMENT = jinja2.Environment(
            loader=jinja2.PackageLoader("noisebench.results", "templates"),
            autoescape=True,  # every template, whatever its file name (report.css included)
            undefined=jinja2.StrictUndefined,
            trim_blocks=False,
            keep_trailing_newline=True,
        )
    return _ENVIRONMENT


def _macro(name: str) -> Callable[..., str]:
    return getattr(environment().get_template("macros.html").module, name)


# ----------------------------------------------------------------------------- formatting


def _is_number(value: Any) -> TypeGuard[float]:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _number_or(value: Any, default: float) -> float:
    """``value`` when it is a number, else ``default`` (for sort keys)."""
    return value if _is_number(value) else default


def _mapping(value: Any, default: Mapping[str, Any]) -> Mapping[str, Any]:
    """``value`` when it is a mapping, else ``default``."""
    return value if isinstance(value, Mapping) else default


def _num(value: Any, digits: int = 3) -> str:
    """A number with ``digits`` decimals (``-`` for missing)."""
    if value is None or isinstance(value, bool) or not isinstance(value, (int, float)):
        return "-" if value is None else str(value)
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return f"{value:.{digits}f}" if isinstance(value, float) else str(value)


def _sig(value: Any) -> str:
    """A number in 6 significant digits, other values as text."""
    if isinstance(value, float):
        return f"{value:.6g}"
    return "-" if value is None else str(value)


def _freq(freq_hz: float) -> str:
    """A frequency with its own unit, kept on one line, e.g. ``1.5 GHz`` (no-break space)."""
    return format_frequency(freq_hz, space="\u00a0")


def _range(values: Sequence[Any], digits: int = 3, unit: str = "") -> str:
    """``a to b unit`` (or one value) for a list of numbers (other entries are skipped)."""
    values = [v for v in values if _is_number(v) and math.isfinite(v)]
    if not values:
        return "-"
    low, high = min(values), max(values)
    text = (
        f"{low:.{digits}f}"
        if math.isclose(low, high, rel_tol=0, abs_tol=10**-digits / 2)
        else f"{low:.{digits}f} to {high:.{digits}f}"
    )
    return f"{text} {unit}".strip()


def _decimals(value: float, most: int = 9) -> int:
    """Fewest decimals that show ``value`` exactly (up to ``most``)."""
    for digits in range(most + 1):
        if abs(round(value, digits) - value) <= 1e-9 * max(abs(value), 1.0):
            return digits
    return most


@dataclass(frozen=True)
class FrequencyColumn:
    """One unit and one number of decimals for a column of frequencies."""

    scale: float
    unit: str
    digits: int

    @classmethod
    def of(cls, freq_hz: Sequence[float]) -> FrequencyColumn:
        """The axis unit of :func:`~noisebench.results.plots.frequency_scale`; as many decimals as
        the frequencies need, but never more than ``FREQUENCY_DIGITS`` significant digits."""
        scale, unit = frequency_scale(freq_hz)
        top = max((abs(f) for f in freq_hz), default=0.0) / scale
        most = max(0, FREQUENCY_DIGITS - (math.floor(math.log10(top)) + 1 if top > 0 else 1))
        digits = max((_decimals(f / scale, most) for f in freq_hz), default=0)
        return cls(scale, unit, digits)

    @property
    def header(self) -> str:
        return f"Frequency ({self.unit})"

    def cell(self, freq_hz: Any) -> str:
        return f"{freq_hz / self.scale:.{self.digits}f}" if _is_number(freq_hz) else "-"


def _when(value: datetime | None) -> str:
    """A time stamp as ``2025-01-01 12:00:00 UTC`` (other offsets kept)."""
    if value is None:
        return "-"
    if value.utcoffset() == timedelta(0):
        return value.strftime("%Y-%m-%d %H:%M:%S") + " UTC"
    return value.isoformat(sep=" ", timespec="seconds")


def _parse_time(text: Any) -> datetime | None:
    if not isinstance(text, str):
        return None
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return None
    return moment.astimezone(timezone.utc) if moment.tzinfo else moment


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.1f} s"
    minutes, secs = divmod(round(seconds), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min" if hours else f"{minutes} min {secs:02d} s"


def label(key: str) -> str:
    """A column label from a field name: ``system_nf_db`` -> ``System NF (dB)``."""
    if key in LABEL_OVERRIDES:
        return LABEL_OVERRIDES[key]
    words, unit = key, ""
    for suffix, name in LABEL_UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            words, unit = key[: -len(suffix)], name
            break
    parts = [LABEL_WORDS.get(w, w) for w in words.split("_") if w]
    if parts and parts[0] not in LABEL_WORDS.values():
        parts[0] = parts[0][:1].upper() + parts[0][1:]
    text = " ".join(parts) or key
    return f"{text} ({unit})" if unit else text


def _verdict_word(verdict: Any) -> str:
    return str(verdict).lower() if verdict is not None else "not_judged"


def _verdict_class(verdict: Any) -> str:
    word = _verdict_word(verdict)
    return f"v-{word}" if word in VERDICT_STYLE else "v-other"


def verdict_tag(verdict: Any) -> VerdictTag:
    """A verdict as symbol + word in its colour, e.g. ``✕ fail`` (readable without colour)."""
    word = _verdict_word(verdict)
    symbol = VERDICT_SYMBOL.get(word, "")
    return VerdictTag(_verdict_class(word), f"{symbol} {word.replace('_', ' ')}".strip())


def verdict_html(verdict: Any) -> str:
    """:func:`verdict_tag` as HTML, rendered by the report's own macro."""
    return str(_macro("verdict")(verdict_tag(verdict)))


def _keep_together(text: str) -> str:
    """Header text that never wraps inside ``k = 2``."""
    return text.replace("k = ", "k\u00a0=\u00a0")


def _kv(rows: Iterable[tuple[str, Any]]) -> KeyValues:
    return KeyValues(tuple((_keep_together(key), value) for key, value in rows))


def _table(headers: Sequence[tuple[str, bool]], rows: Iterable[Sequence[Any]]) -> Table:
    """A plain table; ``headers`` are (label, numeric); numeric cells are right-aligned."""
    return Table(
        tuple(Header(_keep_together(h), numeric=num) for h, num in headers),
        tuple(tuple(row) for row in rows),
    )


@dataclass(frozen=True)
class Column:
    """A column of a compact grid table: header, hover text, cell function, text or number."""

    header: str
    cell: Callable[..., Any]
    title: str = ""
    text: bool = False


def _grid(columns: Sequence[Column], rows: Sequence[Sequence[Any]], css: str = "") -> Table:
    """A compact table (numbers right-aligned by the table's class, not per cell).

    Each row holds the arguments of every column's ``cell``; a table longer than
    ``SCROLL_ROWS`` rows scrolls inside a box under a fixed header.
    """
    return Table(
        tuple(Header(_keep_together(c.header), title=c.title, text=c.text) for c in columns),
        tuple(tuple(c.cell(*args) for c in columns) for args in rows),
        css=" ".join(("grid", css)).strip(),
        grid=True,
        box="scroll" if len(rows) > SCROLL_ROWS else "wrap",
    )


SWITCH_KEYS = ("preamp",)  # booleans read as on/off; all others as yes/no


def _switch(key: str, value: bool) -> str:
    if key in SWITCH_KEYS:
        return "on" if value else "off"
    return "yes" if value else "no"


def value_node(value: Any, depth: int = 0, key: str = "") -> Any:
    """Any JSON-like value as a cell: tables for mappings and lists of mappings.

    Numbers under a key ending in ``_hz`` are shown as frequencies (kHz/MHz/GHz).
    """
    if isinstance(value, Mapping):
        if not value:
            return "-"
        if depth >= 3:
            return Pre(json.dumps(value, indent=1, default=str))
        return _kv((str(k), value_node(v, depth + 1, str(k))) for k, v in value.items())
    if isinstance(value, (list, tuple)):
        if value and all(isinstance(v, Mapping) for v in value):
            return _records_table(value, depth)
        shown: list[Any] = []
        for index, item in enumerate(value[:20]):
            if index:
                shown.append(", ")
            shown.append(value_node(item, depth + 1, key))
        if len(value) > 20:
            shown.append(f" … ({len(value)} values)")
        return Seq(tuple(shown))
    if key.endswith("_hz") and _is_number(value):
        return _freq(value)
    if isinstance(value, bool):
        return _switch(key, value)
    return _sig(value)


def render_value(value: Any, depth: int = 0, key: str = "") -> str:
    """Any JSON-like value as escaped HTML (see :func:`value_node`)."""
    return str(_macro("cell")(value_node(value, depth, key)))


def _records_table(records: Sequence[Mapping[str, Any]], depth: int) -> Table:
    """A list of mappings as one table with readable headers (field names -> labels)."""
    keys: list[str] = []
    for item in records:
        keys += [str(k) for k in item if str(k) not in keys]
    numeric = {k: all(_is_number(r.get(k)) or r.get(k) is None for r in records) for k in keys}
    rows = (
        [value_node(r.get(k), depth + 1, k) if r.get(k) is not None else "-" for k in keys]
        for r in records
    )
    return _table([(label(k), numeric[k]) for k in keys], rows)


# ----------------------------------------------------------------------------- record facts


def _t0_k(record: RunRecord) -> float:
    for point in record.points:
        if _is_number(point.notes.get("t0_k")):
            return float(point.notes["t0_k"])
    corrections = record.info.plan.get("corrections")
    if isinstance(corrections, Mapping) and _is_number(corrections.get("t0_k")):
        return float(corrections["t0_k"])
    return DEFAULT_T0_K


def _checks(entry: Mapping[str, Any], quantity: str | None = None) -> list[Mapping[str, Any]]:
    return [
        c
        for c in entry.get("checks") or []
        if isinstance(c, Mapping) and (quantity is None or c.get("quantity") == quantity)
    ]


def _nf_margin(entry: Mapping[str, Any]) -> float | None:
    """The smallest NF margin (limit minus NF, dB) of a point's checks, or None."""
    margins = [c["margin_db"] for c in _checks(entry, "nf_db") if _is_number(c.get("margin_db"))]
    return min(margins) if margins else None


def _skipped(record: RunRecord) -> list[Mapping[str, Any]]:
    return [s for s in record.info.notes.get("skipped_points") or [] if isinstance(s, Mapping)]


def _judged_by_verdict(record: RunRecord) -> dict[str, int]:
    counts: dict[str, int] = {}
    for entry in (record.verdict or {}).get("points") or []:
        if isinstance(entry, Mapping):
            word = _verdict_word(entry.get("verdict"))
            counts[word] = counts.get(word, 0) + 1
    return counts


def _budget_list(record: RunRecord) -> list[Mapping[str, Any]]:
    return [b for b in record.budgets if isinstance(b, Mapping) and _is_number(b.get("freq_hz"))]

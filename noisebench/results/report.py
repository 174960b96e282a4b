"""One self-contained HTML report per run: summary, figures, points, budget, calibration.

The file needs nothing else to be read, archived or mailed: the style sheet is inline and the
figures are PNGs embedded as base64 ``data:`` URIs; there is no script and no external link
(the only links are the contents list's in-page anchors).

The HTML lives in Jinja2 templates (``noisebench/results/templates/``: ``report.html``, its
building blocks in ``macros.html`` and the style sheet ``report.css``) with autoescaping on,
so every piece of text taken from the record is escaped by the template engine. This module
only gathers the facts: plain strings, and a few small node types (:class:`VerdictTag`,
:class:`Table`, ...) that the macros render.

Sections, in reading order: a "how to read this report" line and the contents; summary (DUT,
method, bench, dates, instruments, versions, NF and U range, worst margin, verdict); figures;
the flags in words and the per-point table; limits and verdict; the uncertainty budget (over
the sweep, in full at the point with the largest U, and per frequency); calibration; the
acquisition settings applied; notes; the plan; the bench-safety cautions.

Verdicts are shown by symbol and colour together (the same shapes and colours as the figures'
markers, :data:`noisebench.results.plots.VERDICT_STYLE`), so they read without colour vision too.
Long per-frequency tables scroll inside their box; per-frequency budget and calibration
details are left to ``results.json`` above ``DETAIL_ROWS_MAX`` points, which keeps the report
of a 1001-point run small.

Size: one job, the report's view model: every section of the page turned into template data (the
HTML itself is in results/templates/); the formatting helpers and node types before it serve
only these sections. A split would cut along the page's sections, which share the formatters and
the record look-ups; left whole until a second output format needs them.
"""

from __future__ import annotations

import base64
import json
import logging
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any, TypeGuard

import jinja2

from noisebench.errors import InputError
from noisebench.results.plots import (
    FLAG_MARK_WORDS,
    VERDICT_STYLE,
    VERDICT_SYMBOL,
    coverage_text,
    frequency_scale,
    nf_error_bars,
)
from noisebench.results.store import (
    FLAG_DESCRIPTIONS,
    REPORT_FILE,
    RunRecord,
    nf_extremes,
    write_atomic,
)
from noisebench.running.safety import CAUTIONS as SAFETY_NOTE
from noisebench.science.point import PointFlag, PointResult
from noisebench.units import format_frequency

logger = logging.getLogger(__name__)

DETAIL_ROWS_MAX = 250  # per-frequency budget/calibration tables only up to this many rows
FREQUENCY_DIGITS = 7  # significant digits of a frequency column at most (1 kHz at 6 GHz)
FAILED_CHECKS_SHOWN = 25  # the worst checks not passed, by margin; the points table has all
SCROLL_ROWS = 100  # tables longer than this scroll inside a box with a fixed header
DEFAULT_T0_K = 290.0

FIGURE_CAPTIONS = {
    "noise_figure.png": "Noise figure of the DUT versus frequency, with its uncertainty, the "
    "NF limit, each point's verdict (marker shape and colour) and the flagged points (open "
    "triangle above the point).",
    "gain.png": "Available gain of the DUT versus frequency, with its uncertainty and the gain "
    "limits.",
    "densities.png": "The raw noise densities behind each point, as measured at the analyzer "
    "(before any correction).",
    "uncertainty.png": "The largest contributions to the NF uncertainty versus frequency, the "
    "remaining ones combined, and the combined and expanded uncertainty.",
}

RULE_TEXT = {
    "guarded": "guarded: a point passes only when its whole interval (value ± U) is inside "
    "the limit, fails when the interval is wholly outside, and is indeterminate "
    "otherwise",
    "simple": "simple: the measured value alone decides; the uncertainty is not used",
}

CALIBRATION_TEXT = {
    "system": "The noise source drives the analyzer directly (no DUT): the hot/cold readings "
    "give the noise temperature of the measurement system, which is removed from "
    "the DUT's readings (second-stage correction).",
    "floor": "The analyzer input is terminated (no DUT): the reading is the analyzer's own "
    "noise floor, which is subtracted from the DUT's reading (second-stage "
    "correction).",
}

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
DISTRIBUTION_WORDS = {
    "u_shaped": "U-shaped (arcsine)",
    "normal": "normal",
    "rectangular": "rectangular",
    "triangular": "triangular",
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


# ----------------------------------------------------------------------------- nodes


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


# ----------------------------------------------------------------------------- sections


def _header(record: RunRecord) -> dict[str, Any]:
    info = record.info
    return {
        "method": info.method.value.replace("_", "-"),
        "run_id": info.run_id,
        "started": _when(info.started_at),
        "simulated": info.notes.get("bench_kind") == "simulated",
    }


def _how_to_read(record: RunRecord) -> list[str]:
    """Short sentences on what the numbers, bars, verdicts and flags mean."""
    t0 = _t0_k(record)
    parts = [
        f"NF is the DUT's noise figure referred to T0 = {t0:g} K, corrected for the "
        "measurement system's own noise (second stage), the losses and the source "
        "temperature."
    ]
    budgets = _budget_list(record)
    if budgets:
        parts.append(
            f"U is the expanded uncertainty ({coverage_text(budgets)}) of the full "
            "budget; u stat. is the standard uncertainty (k = 1) from the jitter of "
            "the noise readings alone."
        )
    if nf_error_bars(record)[1].startswith("expanded"):
        parts.append("The NF error bars are U.")
    else:
        parts.append(
            "The NF error bars are u stat. (k = 1): "
            + (
                "not every point has a budget."
                if budgets
                else "no full budget was computed for this run."
            )
        )
    if any(p.flags for p in record.points):
        parts.append(f"In the NF figure, {FLAG_MARK_WORDS} marks a flagged point.")
    if record.verdict:
        rule = str(record.verdict.get("rule") or "")
        symbols = ", ".join(f"{VERDICT_SYMBOL[w]} {w}" for w in ("pass", "fail", "indeterminate"))
        parts.append(
            f"Decision rule {RULE_TEXT.get(rule, rule or 'not stated')}. "
            f"Verdicts are shown by symbol and colour: {symbols}."
        )
    parts.append(
        "Flags mark points to read with care; they are explained in words above the "
        "points table. Full-precision values are in results.csv and results.json."
    )
    return parts


def _summary(record: RunRecord) -> dict[str, Any]:
    info = record.info
    dut = _mapping(info.plan.get("dut"), {})
    rows: list[tuple[str, Any]] = [
        (
            "DUT",
            (info.dut_id or "-") + (f" — {dut['description']}" if dut.get("description") else ""),
        )
    ]
    method = info.method.value.replace("_", "-") + " method"
    if info.plan.get("name"):
        method += f" (plan “{info.plan['name']}”)"
    rows += [
        ("Method", method),
        ("Bench", _bench_text(record)),
        ("Status", str(info.status)),
        ("Started", _when(info.started_at)),
        ("Ended", _when(info.ended_at)),
    ]
    if info.ended_at and info.started_at:
        rows.append(("Duration", _duration((info.ended_at - info.started_at).total_seconds())))
    rows += [
        ("Run id", info.run_id),
        ("Operator", info.operator or "-"),
        ("Station", info.station or "-"),
    ]
    rows += _result_rows(record)
    rows += _temperature_rows(record)
    if info.resumed_at:
        rows.append(("Resumed", ", ".join(_when(t) for t in info.resumed_at)))
    for role, identity in sorted(info.identities.items()):
        rows.append((f"Instrument: {role.replace('_', ' ')}", str(identity)))
    if info.versions:
        rows.append(("Software", ", ".join(f"{k} {v}" for k, v in sorted(info.versions.items()))))
    skipped = [
        {
            "freq": _freq(s["freq_hz"]) if _is_number(s.get("freq_hz")) else "-",
            "stage": str(s.get("stage", "-")),
            "reason": str(s.get("reason", "-")),
        }
        for s in _skipped(record)
    ]
    return {
        "banner": _verdict_banner(record),
        "facts": _kv(rows),
        "warnings": [str(w) for w in record.warnings],
        "skipped": skipped,
    }


def _bench_text(record: RunRecord) -> str:
    notes = record.info.notes
    kind = notes.get("bench_kind")
    words = {
        "simulated": "simulated (in-process simulator; not a measurement of hardware)",
        "scpi": "instruments over SCPI",
    }.get(str(kind), str(kind or "-"))
    resources = notes.get("resources")
    if isinstance(resources, Mapping) and resources:
        words += " · " + ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in resources.items())
    return words


def _result_rows(record: RunRecord) -> list[tuple[str, str]]:
    rows = []
    points = record.points
    skipped = _skipped(record)
    if points:
        text = f"{len(points)} from {_freq(points[0].freq_hz)} to {_freq(points[-1].freq_hz)}"
        if skipped:
            text += f"; {len(skipped)} not measured (see below)"
        rows.append(("Points", text))
    extremes = nf_extremes(record)
    if extremes:
        low, high = extremes
        rows.append(
            (
                "Noise figure",
                f"min {low.nf_db:.3f} dB at {_freq(low.freq_hz)}, "
                f"max {high.nf_db:.3f} dB at {_freq(high.freq_hz)}",
            )
        )
    budgets = _budget_list(record)
    if budgets:
        rows.append(
            (
                f"Expanded uncertainty U ({coverage_text(budgets)})",
                _range([b.get("U_expanded_db") for b in budgets], 3, "dB"),
            )
        )
    gains = [p.gain_db for p in points if p.gain_db is not None]
    if gains:
        rows.append(("Gain", _range(gains, 3, "dB")))
    margins = [
        (m, e)
        for e in (record.verdict or {}).get("points") or []
        if isinstance(e, Mapping) and (m := _nf_margin(e)) is not None
    ]
    if margins:
        margin, entry = min(margins, key=lambda pair: pair[0])
        where = _freq(entry["freq_hz"]) if _is_number(entry.get("freq_hz")) else "-"
        rows.append(
            (
                "Smallest NF margin",
                f"{margin:+.3f} dB at {where} (limit minus NF; negative: above the limit)",
            )
        )
    flagged = sum(1 for p in points if p.flags)
    if points:
        rows.append(("Flagged points", f"{flagged} of {len(points)}"))
    return rows


def _temperature_rows(record: RunRecord) -> list[tuple[str, str]]:
    info = record.info
    rows = [("Reference temperature T0", f"{_t0_k(record):g} K")]
    if info.ambient_k is not None:
        rows.append(("Ambient temperature", f"{info.ambient_k:.2f} K"))
    if info.cold_temperature_k is not None:
        rows.append(("Cold source / termination temperature", f"{info.cold_temperature_k:.2f} K"))
    return rows


def _verdict_banner(record: RunRecord) -> dict[str, Any] | None:
    if not record.verdict:
        return None
    unit = _verdict_word(record.verdict.get("unit", "-"))
    counts = _judged_by_verdict(record)
    symbol = VERDICT_SYMBOL.get(unit, "")
    return {
        "css": _verdict_class(unit),
        "text": (symbol + " " + unit.replace("_", " ")).strip().upper(),
        "counts": [(n, verdict_tag(k)) for k, n in sorted(counts.items())],
    }


def _figures(images: Mapping[str, bytes]) -> list[dict[str, str]]:
    return [
        {
            "src": "data:image/png;base64," + base64.b64encode(png).decode("ascii"),
            "caption": FIGURE_CAPTIONS.get(name, name),
        }
        for name, png in images.items()
    ]


def _flag_tags(point: PointResult) -> FlagTags:
    return FlagTags(tuple((f.value, FLAG_DESCRIPTIONS.get(f, f.value)) for f in point.flags))


def _point_columns(record: RunRecord, freq: FrequencyColumn) -> list[Column]:
    """The per-point table's columns: only those the record has data for.

    A new column (e.g. a frequency-plan quantity) is one more ``Column`` here: a header with
    its unit, a cell function of (point, budget, verdict entry) returning text, a hover text.
    """
    points = record.points
    has = {
        name: any(getattr(p, name) is not None for p in points)
        for name in (
            "gain_db",
            "u_gain_db",
            "y_db",
            "enr_db",
            "floor_margin_db",
            "floor_correction_db",
            "averages",
            "instrument_time_s",
        )
    }
    budgets = _budget_list(record)
    columns = [
        Column(freq.header, lambda p, b, v: freq.cell(p.freq_hz)),
        Column("NF (dB)", lambda p, b, v: _num(p.nf_db)),
    ]
    if budgets:
        columns.append(
            Column(
                f"U (dB, {coverage_text(budgets)})",
                lambda p, b, v: _num(b.get("U_expanded_db")),
                "expanded uncertainty of NF from the full budget",
            )
        )
    columns += [
        Column(
            "u stat. (dB, k = 1)",
            lambda p, b, v: _num(p.u_nf_db),
            "standard uncertainty from the jitter of the noise readings only",
        ),
        Column(
            "Te (K)",
            lambda p, b, v: _num(p.te_k, 1),
            "equivalent input noise temperature of the DUT",
        ),
    ]
    verdicts = record.verdicts_by_freq()
    gain_expanded = bool(record.verdict) and all(
        _is_number((verdicts.get(p.freq_hz) or {}).get("U_gain_db"))
        for p in points
        if p.gain_db is not None
    )
    optional = [
        ("gain_db", Column("Gain (dB)", lambda p, b, v: _num(p.gain_db))),
        (
            "u_gain_db",
            Column(
                "U gain (dB)",
                lambda p, b, v: _num(v.get("U_gain_db")),
                "expanded uncertainty of the gain, as judged",
            )
            if gain_expanded
            else Column(
                "u gain (dB, k = 1)",
                lambda p, b, v: _num(p.u_gain_db),
                "standard uncertainty of the gain",
            ),
        ),
        ("y_db", Column("Y (dB)", lambda p, b, v: _num(p.y_db, 2), "hot/cold power ratio")),
        (
            "enr_db",
            Column(
                "ENR (dB)",
                lambda p, b, v: _num(p.enr_db, 2),
                "excess noise ratio of the source used at this frequency",
            ),
        ),
        (
            "floor_margin_db",
            Column(
                "Above floor (dB)",
                lambda p, b, v: _num(p.floor_margin_db, 1),
                "DUT output noise above the analyzer's own noise",
            ),
        ),
        (
            "floor_correction_db",
            Column(
                "2nd-stage corr. (dB)",
                lambda p, b, v: _num(p.floor_correction_db, 3),
                "change of NF made by the second-stage correction",
            ),
        ),
        ("averages", Column("Averages", lambda p, b, v: _num(p.averages))),
        (
            "instrument_time_s",
            Column(
                "Time (s)",
                lambda p, b, v: _num(p.instrument_time_s, 2),
                "instrument time spent on this point",
            ),
        ),
    ]
    columns += [column for key, column in optional if has[key]]
    if record.verdict:
        columns += [
            Column(
                "NF margin (dB)",
                lambda p, b, v: _margin_cell(v),
                "NF limit minus NF; negative: NF above the limit",
            ),
            Column("Verdict", lambda p, b, v: verdict_tag(v.get("verdict")), text=True),
        ]
    columns.append(Column("Flags", lambda p, b, v: _flag_tags(p), text=True))
    return columns


def _margin_cell(entry: Mapping[str, Any]) -> str:
    margin = _nf_margin(entry)
    return "-" if margin is None else f"{margin:+.3f}"


def _points(record: RunRecord) -> dict[str, Any] | None:
    if not record.points:
        return None
    freq = FrequencyColumn.of([p.freq_hz for p in record.points])
    columns = _point_columns(record, freq)
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    rows = [(p, budgets.get(p.freq_hz) or {}, verdicts.get(p.freq_hz) or {}) for p in record.points]
    return {"flag_legend": _flag_legend(record), "table": _grid(columns, rows, css="points")}


def _flag_legend(record: RunRecord) -> Table | None:
    used: dict[PointFlag, int] = {}
    for point in record.points:
        for flag in point.flags:
            used[flag] = used.get(flag, 0) + 1
    if not used:
        return None
    rows = (
        (
            FlagTags(((f.value, FLAG_DESCRIPTIONS.get(f, f.value)),)),
            str(n),
            FLAG_DESCRIPTIONS.get(f, f.value),
        )
        for f, n in used.items()
    )
    return _table([("Flag", False), ("Points", True), ("Meaning", False)], rows)


def _verdict_section(record: RunRecord) -> dict[str, Any] | None:
    verdict = record.verdict
    if not verdict:
        return None
    rows: list[tuple[str, Any]] = [("Unit verdict", verdict_tag(verdict.get("unit", "-")))]
    if verdict.get("rule"):
        rule = str(verdict["rule"])
        rows.append(("Decision rule", RULE_TEXT.get(rule, rule)))
    for note in verdict.get("notes") or []:
        rows.append(("Note", str(note)))
    limits = [b for b in verdict.get("limits") or [] if isinstance(b, Mapping)]
    bands = [b for b in verdict.get("bands") or [] if isinstance(b, Mapping)]
    return {
        "facts": _kv(rows),
        "limits": _records_table(limits, depth=1) if limits else None,
        "bands": _band_table(bands) if bands else None,
        "failed": _failed_checks(verdict),
    }


def _band_table(bands: Sequence[Mapping[str, Any]]) -> Table:
    headers = [
        ("Band", True),
        ("Name", False),
        ("Start", True),
        ("Stop", True),
        ("Points", True),
        ("Verdict", False),
        ("Flatness", False),
    ]
    rows = [
        [
            _sig(b.get("band")),
            str(b.get("name") or "-"),
            _freq(b["start_hz"]) if _is_number(b.get("start_hz")) else "-",
            _freq(b["stop_hz"]) if _is_number(b.get("stop_hz")) else "-",
            _sig(b.get("points")),
            verdict_tag(b.get("verdict")),
            _check_cell(b["flatness"]) if isinstance(b.get("flatness"), Mapping) else "-",
        ]
        for b in bands
    ]
    return _table(headers, rows)


def _check_cell(check: Mapping[str, Any]) -> Seq:
    value, limit, u = check.get("value"), check.get("limit"), check.get("U")
    text = f"{_num(value)} dB vs {check.get('kind', '')} {_num(limit)} dB"
    if _is_number(u):
        text += f" (U {_num(u)} dB)"
    return Seq((f"{text}: ", verdict_tag(check.get("verdict", "-"))))


QUANTITY_WORDS = {"nf_db": "NF", "gain_db": "gain", "flatness_db": "gain flatness"}


def _failed_checks(verdict: Mapping[str, Any]) -> dict[str, Any] | None:
    """The checks that did not pass, worst margin first (at most ``FAILED_CHECKS_SHOWN``)."""
    failed = [
        (entry, check)
        for entry in verdict.get("points") or []
        if isinstance(entry, Mapping)
        for check in _checks(entry)
        if check.get("verdict") in ("fail", "indeterminate")
    ]
    if not failed:
        return None
    failed.sort(
        key=lambda pair: pair[1]["margin_db"] if _is_number(pair[1].get("margin_db")) else math.inf
    )
    freq = FrequencyColumn.of([e["freq_hz"] for e, _ in failed if _is_number(e.get("freq_hz"))])
    rows = []
    for entry, check in failed[:FAILED_CHECKS_SHOWN]:
        quantity = str(check.get("quantity", "-"))
        margin = check.get("margin_db")
        rows.append(
            [
                freq.cell(entry.get("freq_hz")),
                QUANTITY_WORDS.get(quantity, quantity),
                str(check.get("kind", "-")),
                _num(check.get("limit")),
                _num(check.get("value")),
                _num(check.get("U")),
                f"{margin:+.3f}" if _is_number(margin) else "-",
                verdict_tag(check["verdict"]),
                str(check.get("note") or ""),
            ]
        )
    headers = [
        (freq.header, True),
        ("Quantity", False),
        ("Limit kind", False),
        ("Limit (dB)", True),
        ("Value (dB)", True),
        ("U (dB)", True),
        ("Margin (dB)", True),
        ("Verdict", False),
        ("Note", False),
    ]
    shown = (
        f"all {len(failed)}"
        if len(failed) <= FAILED_CHECKS_SHOWN
        else f"the {FAILED_CHECKS_SHOWN} worst of {len(failed)}; every point is in the points table"
    )
    return {"shown": shown, "table": _table(headers, rows)}


# ----------------------------------------------------------------------------- budget


def _contributions(budget: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    return [
        c
        for c in budget.get("contributions") or []
        if isinstance(c, Mapping) and _is_number(c.get("contribution_db"))
    ]


def _largest(budget: Mapping[str, Any]) -> str:
    items = _contributions(budget)
    if not items:
        return "-"
    top = max(items, key=lambda c: abs(c["contribution_db"]))
    return f"{top.get('name', '?')} ({top['contribution_db']:+.4f} dB)"


def _share(contribution_db: float, u_c: Any) -> str:
    if not (_is_number(u_c) and u_c > 0):
        return "-"
    return f"{100 * contribution_db**2 / u_c**2:.1f}"


def _method_text(budgets: Sequence[Mapping[str, Any]]) -> str:
    methods = {str(b.get("method", "-")) for b in budgets}
    parts = []
    if "gum" in methods:
        parts.append("GUM law of propagation (JCGM 100:2008)")
    if "monte_carlo" in methods:
        mc = [b["monte_carlo"] for b in budgets if isinstance(b.get("monte_carlo"), Mapping)]
        trials = sorted({m.get("trials") for m in mc if _is_number(m.get("trials"))})
        coverage = {m.get("coverage") for m in mc if _is_number(m.get("coverage"))}
        validated = sum(1 for m in mc if m.get("gum_validated") is True)
        text = "Monte Carlo propagation (JCGM 101:2008)"
        if trials:
            text += f", {trials[0]}" + (f" to {trials[-1]}" if len(trials) > 1 else "") + " trials"
        if len(coverage) == 1:
            text += f", {100 * coverage.pop():g} % coverage interval"
        text += f"; GUM result validated at {validated} of {len(mc)} points"
        parts.append(text)
    others = methods - {"gum", "monte_carlo"}
    parts += sorted(others)
    return "; ".join(parts)


def _distribution(name: Any) -> str:
    return DISTRIBUTION_WORDS.get(str(name), str(name))


def _sweep_contributions(budgets: Sequence[Mapping[str, Any]]) -> Table:
    """One row per input: its distribution, u, and the range of its contribution over the sweep."""
    lines: dict[str, list[Mapping[str, Any]]] = {}
    shares: dict[str, list[float]] = {}
    for budget in budgets:
        u_c = budget.get("u_combined_db")
        for c in _contributions(budget):
            name = str(c.get("name", "?"))
            lines.setdefault(name, []).append(c)
            if _is_number(u_c) and u_c > 0:
                shares.setdefault(name, []).append(100 * c["contribution_db"] ** 2 / u_c**2)
    order = sorted(
        lines, key=lambda n: max(abs(c["contribution_db"]) for c in lines[n]), reverse=True
    )
    rows = []
    for name in order:
        items = lines[name]
        us = [c.get("u") for c in items if _is_number(c.get("u"))]
        units = {str(c.get("unit", "")) for c in items}
        dists = {str(c.get("distribution", "-")) for c in items}
        rows.append(
            [
                name,
                ", ".join(sorted(_distribution(d) for d in dists)),
                _range(us, 4) if us else "-",
                ", ".join(sorted(units)),
                _range([abs(c["contribution_db"]) for c in items], 4),
                _range(shares.get(name, []), 1),
            ]
        )
    headers = [
        ("Input quantity", False),
        ("Distribution", False),
        ("u(xᵢ)", True),
        ("Unit of u", False),
        ("|cᵢ·u(xᵢ)| (dB)", True),
        ("Share of u_c² (%)", True),
    ]
    return _table(headers, rows)


def _budget_at(budget: Mapping[str, Any]) -> Table:
    """The classic budget table at one frequency."""
    lines = sorted(_contributions(budget), key=lambda c: abs(c["contribution_db"]), reverse=True)
    u_c = budget.get("u_combined_db")
    headers = [
        ("Input quantity", False),
        ("Distribution", False),
        ("u(xᵢ)", True),
        ("Unit of u", False),
        ("Sensitivity cᵢ (dB per unit)", True),
        ("cᵢ·u(xᵢ) (dB)", True),
        ("Share of u_c² (%)", True),
    ]
    rows: list[list[Any]] = [
        [
            str(c.get("name", "?")),
            _distribution(c.get("distribution", "-")),
            _sig(c.get("u")),
            str(c.get("unit", "")),
            _sig(c.get("sensitivity")),
            f"{c['contribution_db']:+.4f}",
            _share(c["contribution_db"], u_c),
        ]
        for c in lines
    ]
    rows.append(
        [
            Strong("combined standard uncertainty u_c"),
            "",
            "",
            "",
            "",
            Strong(_num(u_c, 4)),
            "100.0" if _is_number(u_c) else "-",
        ]
    )
    rows.append(
        [
            Strong(f"expanded uncertainty U (k = {_sig(budget.get('k'))})"),
            "",
            "",
            "",
            "",
            Strong(_num(budget.get("U_expanded_db"), 4)),
            "",
        ]
    )
    return _table(headers, rows)


def _monte_carlo_facts(budget: Mapping[str, Any]) -> list[tuple[str, Any]]:
    mc = budget.get("monte_carlo")
    if not isinstance(mc, Mapping):
        return []
    return [(label(str(k)), value_node(v, 3, str(k))) for k, v in mc.items() if v is not None]


def _omitted(budgets: Sequence[Mapping[str, Any]]) -> list[str]:
    omitted: list[str] = []
    for budget in budgets:
        omitted += [str(o) for o in budget.get("omitted") or [] if str(o) not in omitted]
    return omitted


def _budget_matrix(budgets: Sequence[Mapping[str, Any]]) -> Table | None:
    """Per frequency: u_c, k, U and every signed contribution (dB); None above the limit."""
    if len(budgets) > DETAIL_ROWS_MAX:
        return None
    freq = FrequencyColumn.of([b["freq_hz"] for b in budgets])
    names: list[str] = []
    for budget in budgets:
        names += [
            str(c.get("name", "?"))
            for c in _contributions(budget)
            if str(c.get("name", "?")) not in names
        ]
    mc = any(isinstance(b.get("monte_carlo"), Mapping) for b in budgets)

    def contribution(name: str) -> Callable[[Mapping[str, Any]], str]:
        def cell(budget: Mapping[str, Any]) -> str:
            value = next(
                (
                    c["contribution_db"]
                    for c in _contributions(budget)
                    if str(c.get("name", "?")) == name
                ),
                None,
            )
            return "-" if value is None else f"{value:+.4f}"

        return cell

    columns = [
        Column(freq.header, lambda b: freq.cell(b["freq_hz"])),
        Column("Method", lambda b: str(b.get("method", "-")), text=True),
        Column("u_c (dB)", lambda b: _num(b.get("u_combined_db"), 4)),
        Column("k", lambda b: _sig(b.get("k"))),
        Column("U (dB)", lambda b: _num(b.get("U_expanded_db"), 4)),
    ]
    if mc:
        columns.append(Column("MC interval (dB)", _mc_interval, text=True))
    columns += [Column(f"{name} (dB)", contribution(name)) for name in names]
    columns.append(Column("Largest contribution", _largest, text=True))
    return _grid(columns, [(b,) for b in budgets])


def _mc_interval(budget: Mapping[str, Any]) -> str:
    interval = (budget.get("monte_carlo") or {}).get("interval_db")
    if (
        isinstance(interval, (list, tuple))
        and len(interval) == 2
        and all(_is_number(v) for v in interval)
    ):
        return f"{interval[0]:.3f} to {interval[1]:.3f}"
    return "-"


def _budgets(record: RunRecord) -> dict[str, Any] | None:
    budgets = _budget_list(record)
    if not budgets:
        return None
    worst = max(
        budgets,
        key=lambda b: _number_or(b.get("U_expanded_db"), -math.inf),
    )
    return {
        "methods": _method_text(budgets),
        "coverage": coverage_text(budgets),
        "u_range": _range([b.get("U_expanded_db") for b in budgets], 3, "dB"),
        "count": len(budgets),
        "sweep": _sweep_contributions(budgets),
        "worst_freq": _freq(worst["freq_hz"]),
        "worst": _budget_at(worst),
        "monte_carlo": _monte_carlo_facts(worst),
        "omitted": _omitted(budgets),
        "matrix": _budget_matrix(budgets),
    }


# ----------------------------------------------------------------------------- calibration


def _filter_text(rbw_filter: Any) -> str:
    if not isinstance(rbw_filter, Mapping):
        return "-" if rbw_filter is None else str(rbw_filter)
    kind = str(rbw_filter.get("kind", "-"))
    if rbw_filter.get("poles"):
        return f"{kind}, {rbw_filter['poles']} poles"
    if rbw_filter.get("window"):
        return f"{kind}, {rbw_filter['window']} window"
    return kind


def _span_text(freqs: Sequence[float]) -> str:
    if not freqs:
        return "-"
    if len(freqs) == 1:
        return _freq(freqs[0])
    return f"{len(freqs)}: {_freq(min(freqs))} to {_freq(max(freqs))}"


GROUPED_SETTINGS = (
    "rbw_hz",
    "rbw_filter",
    "detector",
    "averaging_scale",
    "attenuation_db",
    "preamp",
)


def _calibration_groups(entries: Sequence[Mapping[str, Any]]) -> list[list[Mapping[str, Any]]]:
    """Entries grouped by kind, analyzer settings that matter and cold temperature."""
    groups: dict[str, list[Mapping[str, Any]]] = {}
    for entry in entries:
        settings = _mapping(entry.get("settings"), {})
        key = json.dumps(
            [entry.get("kind"), entry.get("cold_temperature_k")]
            + [settings.get(k) for k in GROUPED_SETTINGS],
            default=str,
        )
        groups.setdefault(key, []).append(entry)
    return list(groups.values())


def _calibration_table(entries: Sequence[Mapping[str, Any]]) -> Table:
    """One row per group of calibrations with the same settings."""
    headers = [
        ("Kind", False),
        ("Calibrations", True),
        ("Frequencies", False),
        ("Measured (UTC)", False),
        ("RBW", True),
        ("Filter", False),
        ("Detector", False),
        ("Averaging", False),
        ("Averages", True),
        ("Atten. (dB)", True),
        ("Preamp", False),
        ("Cold / termination T (K)", True),
        ("Time (s)", True),
    ]
    rows = []
    for group in _calibration_groups(entries):
        first = group[0]
        settings = _mapping(first.get("settings"), {})
        freqs = sorted(f for e in group for f in e.get("freqs_hz") or [] if _is_number(f))
        times = sorted(t for e in group if (t := _parse_time(e.get("measured_at"))))
        averages = [
            e["settings"].get("averages")
            for e in group
            if isinstance(e.get("settings"), Mapping) and _is_number(e["settings"].get("averages"))
        ]
        seconds = [e["instrument_time_s"] for e in group if _is_number(e.get("instrument_time_s"))]
        rbw = settings.get("rbw_hz")
        rows.append(
            [
                str(first.get("kind", "-")),
                str(len(group)),
                _span_text(freqs),
                _time_span(times),
                _freq(rbw) if _is_number(rbw) else "-",
                _filter_text(settings.get("rbw_filter")),
                str(settings.get("detector", "-")),
                str(settings.get("averaging_scale", "-")),
                _range(averages, 0) if averages else "-",
                _sig(settings.get("attenuation_db")),
                value_node(settings.get("preamp"), key="preamp"),
                _num(first.get("cold_temperature_k"), 2),
                _num(math.fsum(seconds), 3) if seconds else "-",
            ]
        )
    return _table(headers, rows)


def _time_span(times: Sequence[datetime]) -> str:
    if not times:
        return "-"
    first, last = times[0], times[-1]
    if first == last:
        return first.strftime("%Y-%m-%d %H:%M:%S")
    same_day = first.date() == last.date()
    return (
        f"{first:%Y-%m-%d %H:%M:%S} to {last:%H:%M:%S}"
        if same_day
        else f"{first:%Y-%m-%d %H:%M:%S} to {last:%Y-%m-%d %H:%M:%S}"
    )


CALIBRATION_SUMMARY_SKIP = ("calibration", "freq_hz", "floor_w_per_hz")


def _calibration_results(summary: list[dict[str, Any]]) -> dict[str, Any]:
    """Ranges of the per-frequency calibration results, and the values per frequency."""
    if not summary:
        return {"ranges": None, "detail": None, "frequencies": 0}
    keys: list[str] = []
    for row in summary:
        keys += [k for k in row if k not in keys and k not in CALIBRATION_SUMMARY_SKIP]
    numeric = [k for k in keys if any(_is_number(r.get(k)) for r in summary)]
    ranges = _kv((label(k), _range([r.get(k) for r in summary], _digits_for(k))) for k in numeric)
    summary.sort(key=lambda r: _number_or(r.get("freq_hz"), math.inf))
    detail = None
    if len(summary) <= DETAIL_ROWS_MAX:
        freq = FrequencyColumn.of([r["freq_hz"] for r in summary if _is_number(r.get("freq_hz"))])
        columns = [Column(freq.header, lambda r: freq.cell(r.get("freq_hz")))]
        columns += [Column(label(k), _calibration_cell(k)) for k in numeric]
        detail = _grid(columns, [(r,) for r in summary])
    return {"ranges": ranges, "detail": detail, "frequencies": len(summary)}


def _digits_for(key: str) -> int:
    if key.endswith("_k"):
        return 1
    return 0 if key in ("averages", "calibration") else 3


def _calibration_cell(key: str) -> Callable[[Mapping[str, Any]], str]:
    digits = _digits_for(key)
    return lambda row: (
        _num(row.get(key), digits) if _is_number(row.get(key)) else _sig(row.get(key))
    )


def _calibration(record: RunRecord) -> dict[str, Any] | None:
    latest = record.info.calibration or (record.calibrations[-1] if record.calibrations else None)
    if not latest:
        return None
    section: dict[str, Any] = {"saved": len(record.calibrations), "raw": None, "groups": None}
    entries = latest.get("entries")
    if not (isinstance(entries, list) and all(isinstance(e, Mapping) for e in entries)):
        section["raw"] = value_node(latest)
        return section
    if not entries:
        return section
    summary = [
        {"calibration": number, **r}
        for number, entry in enumerate(entries, start=1)
        for r in entry.get("summary") or []
        if isinstance(r, Mapping)
    ]
    kinds = sorted({str(e.get("kind")) for e in entries if e.get("kind") in CALIBRATION_TEXT})
    section.update(
        intros=[CALIBRATION_TEXT[k] for k in kinds],
        groups=_calibration_table(entries),
        **_calibration_results(summary),
    )
    return section


GAIN_POINT_KEYS = ("gain_db", "u_gain_db", "through_dbm", "dut_dbm", "snr_through_db", "snr_dut_db")
CONVERSION_GAIN_POINT_KEYS = (
    "gain_db",
    "u_gain_db",
    "gain_if_reference_db",
    "gain_rf_reference_db",
    "through_rf_dbm",
    "through_if_dbm",
    "dut_dbm",
    "snr_dut_db",
)
"""A converter's measured conversion gain (generator at the RF, analyzer at the IF): the blend,
each reference's value and the tone levels (noisebench.running.conversion_gain)."""


def _gain_measurement(record: RunRecord) -> dict[str, Any] | None:
    """The measured-gain pass (generator + analyzer): level, ranges, per-frequency values; for
    a converter the conversion gain per RF, with the IF it was read at."""
    notes = record.info.notes
    converter = isinstance(notes.get("conversion_gain_measurement"), Mapping)
    result = notes.get("conversion_gain_measurement" if converter else "gain_measurement")
    if not isinstance(result, Mapping):
        return None
    freq_key = "rf_hz" if converter else "freq_hz"
    point_keys = CONVERSION_GAIN_POINT_KEYS if converter else GAIN_POINT_KEYS
    points = [
        p
        for p in result.get("points") or []
        if isinstance(p, Mapping) and _is_number(p.get(freq_key))
    ]
    level = result.get("generator_level_dbm")
    conditions = ""
    if _is_number(level):
        conditions += f"; generator level {level:.2f} dBm"
    if result.get("level_limited_by"):
        conditions += f" (set by the {result['level_limited_by']})"
    if _is_number(result.get("rbw_hz")):
        conditions += f", RBW {_freq(result['rbw_hz'])}"
    if _is_number(result.get("band_hz")):
        conditions += f", marker band {_freq(result['band_hz'])}"
    if converter:
        conditions += (
            "; conversion gain: generator at the RF, analyzer at the IF, against THROUGH "
            "references at the RF (cancels the generator) and at the IF (cancels the analyzer "
            "and output cable), blended by the declared flatness"
        )
    ranges: list[tuple[str, Any]] = [
        (label(k), _range([p.get(k) for p in points], 3, ""))
        for k in point_keys
        if any(_is_number(p.get(k)) for p in points)
    ]
    terms = sorted(
        {
            t
            for p in points
            if isinstance(p.get("uncertainty_db"), Mapping)
            for t in p["uncertainty_db"]
        }
    )
    ranges += [
        (
            f"u gain: {t} (dB)",
            _range(
                [
                    p["uncertainty_db"].get(t)
                    for p in points
                    if isinstance(p.get("uncertainty_db"), Mapping)
                ],
                4,
            ),
        )
        for t in terms
    ]
    detail = None
    if points and len(points) <= DETAIL_ROWS_MAX:
        freq = FrequencyColumn.of([p[freq_key] for p in points])
        columns = [Column(freq.header, lambda p: freq.cell(p[freq_key]))]
        if converter:
            columns[0] = Column(f"RF ({freq.unit})", lambda p: freq.cell(p["rf_hz"]))
            iff = FrequencyColumn.of([p["if_hz"] for p in points if _is_number(p.get("if_hz"))])
            columns.append(Column(f"IF ({iff.unit})", lambda p: iff.cell(p.get("if_hz"))))
        columns += [Column(label(k), _calibration_cell(k)) for k in point_keys]
        columns.append(
            Column("Flags", lambda p: ", ".join(map(str, p.get("flags") or [])), text=True)
        )
        detail = _grid(columns, [(p,) for p in points])
    settings = result.get("plan")
    if converter and isinstance(settings, Mapping):  # the tone settings, the points are above
        tone = settings.get("tone")
        settings = {
            **(tone if isinstance(tone, Mapping) else {}),
            **{
                k: v
                for k, v in settings.items()
                if k in ("u_generator_flatness_db", "u_analyzer_flatness_db")
            },
        }
    return {
        "conditions": conditions,
        "ranges": _kv(ranges),
        "detail": detail,
        "frequencies": len(points),
        "settings": (
            value_node({k: v for k, v in settings.items() if k != "freqs_hz"}, 1)
            if isinstance(settings, Mapping)
            else None
        ),
    }


def _settings(record: RunRecord) -> Table | None:
    groups = [g for g in record.info.applied_settings if isinstance(g, Mapping)]
    if not groups:
        return None
    rows = []
    for group in groups:
        settings = _mapping(group.get("settings"), group)
        flat: dict[str, Any] = {}
        for key, value in settings.items():
            if key == "rbw_filter":
                flat["filter"] = _filter_text(value)
            else:
                flat[key] = value
        freqs = [f for f in group.get("freqs_hz") or [] if _is_number(f)]
        rows.append(
            {"frequencies": _span_text(sorted(freqs)) if freqs else None, **flat}
            if "settings" in group
            else flat
        )
    keys: list[str] = []
    for row in rows:
        keys += [k for k in row if k not in keys]
    headers = [
        (label(k), all(_is_number(r.get(k)) or r.get(k) is None for r in rows)) for k in keys
    ]
    cells = [
        [
            (
                r[k]
                if k == "frequencies" and r.get(k)
                else value_node(r.get(k), 2, k)
                if r.get(k) is not None
                else "-"
            )
            for k in keys
        ]
        for r in rows
    ]
    return _table(headers, cells)


NOTES_SHOWN_ELSEWHERE = (
    "resources",
    "bench_kind",
    "skipped_points",
    "gain_measurement",
    "conversion_gain_measurement",
)


def _notes(record: RunRecord) -> dict[str, Any] | None:
    notes = {k: v for k, v in record.info.notes.items() if k not in NOTES_SHOWN_ELSEWHERE}
    skipped = _skipped(record)
    if not (notes or skipped):
        return None
    return {
        "shown": value_node(notes) if notes else None,
        "skipped": _records_table(skipped, depth=1) if skipped else None,
    }


# ----------------------------------------------------------------------------- entry points


def _frequency_plan(record: RunRecord) -> dict[str, Any] | None:
    """A converter run's frequency plan: the [conversion] settings and RF/LO/IF/image per point."""
    points = [p for p in record.points if p.conversion is not None]
    if not points:
        return None
    section = (record.info.plan or {}).get("conversion") or {}
    lo = section.get("lo") or {}
    c0 = points[0].conversion
    assert c0 is not None
    sidebands = sorted({p.conversion.sideband for p in points if p.conversion is not None})
    facts = [
        ("Sweep mode", str(section.get("mode", "-"))),
        ("Sideband", ", ".join(sidebands) + " (RF above the LO)" * (sidebands == ["upper"])),
        ("NF type in nf_db", c0.nf_type.upper() + " (the other figure is in the table)"),
        ("Image rejection", _rejection_text(section.get("image_rejection_db"))),
    ]
    if section.get("u_image_rejection_db"):
        facts.append(("u(image rejection)", f"{section['u_image_rejection_db']:g} dB"))
    if lo:
        level = lo.get("level_dbm")
        facts.append(
            (
                "LO",
                f"{lo.get('source', 'generator')}"
                + (f", {level:g} dBm" if _is_number(level) else "")
                + (f", settling {lo['settle_time_s']:g} s" if lo.get("settle_time_s") else ""),
            )
        )
    freqs = [
        f
        for p in points
        if p.conversion is not None
        for f in (p.conversion.rf_hz, p.conversion.lo_hz, p.conversion.if_hz, p.conversion.image_hz)
    ]
    fc = FrequencyColumn.of(freqs)

    def conv(p: Any) -> Any:
        return p.conversion

    columns = [
        Column(f"RF ({fc.unit})", lambda p: fc.cell(conv(p).rf_hz), "the converter's input"),
        Column(f"LO ({fc.unit})", lambda p: fc.cell(conv(p).lo_hz)),
        Column(f"IF ({fc.unit})", lambda p: fc.cell(conv(p).if_hz), "where the analyzer reads"),
        Column(f"Image ({fc.unit})", lambda p: fc.cell(conv(p).image_hz), "2 LO - RF"),
        Column("Sideband", lambda p: conv(p).sideband, text=True),
        Column(
            "Image rej. (dB)",
            lambda p: (
                _num(conv(p).image_rejection_db, 1)
                if conv(p).image_rejection_db is not None
                else "none"
            ),
            "signal response over image response; none: no image response",
        ),
        Column("NF SSB (dB)", lambda p: _num(conv(p).nf_ssb_db), "signal band only"),
        Column("NF DSB (dB)", lambda p: _num(conv(p).nf_dsb_db), "both bands as signal"),
        Column(
            "SSB - DSB (dB)",
            lambda p: _num(conv(p).image_correction_db),
            "image correction 10 log10(1 + G_image/G_signal)",
        ),
    ]
    if any(p.conversion.gain_source for p in points if p.conversion is not None):
        columns += [
            Column(
                "Gain source",
                lambda p: conv(p).gain_source or "-",
                "measured: generator at the RF, analyzer at the IF; file/constant: stated",
                text=True,
            ),
            Column(
                "Measured gain (dB)",
                lambda p: (
                    _num(conv(p).measured_gain_db) if conv(p).measured_gain_db is not None else "-"
                ),
                "between the THROUGH planes (input cable and converter)",
            ),
            Column(
                "u (dB)",
                lambda p: (
                    _num(conv(p).u_measured_gain_db)
                    if conv(p).u_measured_gain_db is not None
                    else "-"
                ),
                "standard uncertainty of the measured conversion gain",
            ),
        ]
    return {"facts": _kv(facts), "table": _grid(columns, [(p,) for p in points])}


def _rejection_text(value: Any) -> str:
    if _is_number(value):
        return f"{value:g} dB"
    if value == "none":
        return "none (no image response)"
    if value == "equal":
        return "equal responses (0 dB)"
    return f"table {value}" if value else "-"


def _sections(record: RunRecord, images: Mapping[str, bytes]) -> list[tuple[str, str]]:
    """``(anchor, title)`` of the sections this record has, in order."""
    info = record.info
    present = [
        ("summary", "Summary", True),
        ("figures", "Figures", bool(images)),
        ("points", "Points", True),
        ("frequency-plan", "Frequency plan", any(p.conversion for p in record.points)),
        ("verdict", "Limits and verdict", bool(record.verdict)),
        ("budget", "Uncertainty budget", bool(_budget_list(record))),
        ("calibration", "Calibration", bool(info.calibration or record.calibrations)),
        (
            "gain",
            "Gain measurement",
            isinstance(info.notes.get("gain_measurement"), Mapping)
            or isinstance(info.notes.get("conversion_gain_measurement"), Mapping),
        ),
        ("settings", "Settings", bool(info.applied_settings)),
        (
            "notes",
            "Notes",
            bool(_skipped(record)) or any(k not in NOTES_SHOWN_ELSEWHERE for k in info.notes),
        ),
        ("plan", "Plan", bool(info.plan)),
        ("safety", "Bench safety", True),
    ]
    return [(anchor, title) for anchor, title, shown in present if shown]


def report_context(record: RunRecord, images: Mapping[str, bytes]) -> dict[str, Any]:
    """Everything ``report.html`` shows, as plain values and nodes (no HTML)."""
    info = record.info
    return {
        "title": f"Noise-figure report: {info.dut_id or info.run_id}",
        "colours": {key: colour for key, (colour, _marker) in VERDICT_STYLE.items()},
        "header": _header(record),
        "howto": _how_to_read(record),
        "contents": _sections(record, images),
        "summary": _summary(record),
        "figures": _figures(images),
        "points": _points(record),
        "frequency_plan": _frequency_plan(record),
        "verdict": _verdict_section(record),
        "budget": _budgets(record),
        "calibration": _calibration(record),
        "gain": _gain_measurement(record),
        "settings": _settings(record),
        "notes": _notes(record),
        "plan_json": json.dumps(info.plan, indent=2, default=str) if info.plan else "",
        "cautions": list(SAFETY_NOTE),
        "version": info.versions.get("noisebench", ""),
        "generated": _when(datetime.now().astimezone()),
    }


def render_report(record: RunRecord, images: Mapping[str, bytes] | None = None) -> str:
    """The report as one HTML string; ``images`` maps figure file names to PNG bytes."""
    if not isinstance(record, RunRecord):
        raise InputError(
            "record",
            f"must be a RunRecord (got {type(record).__name__})",
            fix="load it with noisebench.results.store.load_run",
        )
    template = environment().get_template("report.html")
    return template.render(report_context(record, images or {}))


def _load_images(plots: Sequence[Path | str] | None, record: RunRecord) -> dict[str, bytes]:
    if plots is None:
        try:
            from noisebench.results.plots import render_figures

            return render_figures(record)
        except InputError as exc:  # matplotlib missing: a report without figures
            logger.warning("report without figures: %s", exc)
            return {}
    images = {}
    for item in plots:
        path = Path(item)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise InputError(
                "plots",
                f"cannot read {path}: {exc.strerror or exc}",
                fix="pass PNG files written by plot_run",
            ) from exc
        if not data.startswith(b"\x89PNG\r\n\x1a\n"):
            raise InputError("plots", f"{path} is not a PNG file", fix="pass PNG files")
        images[path.name] = data
    return images


def existing_figures(folder: Path) -> list[Path]:
    """The figures already in ``<folder>/plots`` that are not older than the run's data (the
    journal and ``results.json``), in report order: what ``render --no-plots`` embeds."""
    from noisebench.results.store import JOURNAL_FILE, PLOTS_DIR, RESULTS_JSON_FILE

    folder = Path(folder)
    data = [folder / JOURNAL_FILE, folder / RESULTS_JSON_FILE]
    newest_data = max((p.stat().st_mtime for p in data if p.is_file()), default=0.0)
    found = []
    for name in FIGURE_CAPTIONS:
        png = folder / PLOTS_DIR / name
        if png.is_file() and png.stat().st_mtime >= newest_data:
            found.append(png)
        elif png.is_file():
            logger.warning("%s is older than the run's data: left out of the report", png)
    return found


def write_report(record: RunRecord, path: Path, plots: Sequence[Path] | None = None) -> Path:
    """Write the self-contained HTML report; returns its path.

    ``path`` is the HTML file (a folder gets ``report.html`` inside). ``plots`` are PNG files
    to embed (e.g. from :func:`noisebench.results.plots.plot_run`); ``None`` renders the figures in
    memory, ``[]`` leaves them out (and never imports matplotlib).
    """
    path = Path(path)
    if path.is_dir():
        path = path / REPORT_FILE
    text = render_report(record, _load_images(plots, record))
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, text)
    except OSError as exc:
        raise InputError(
            "path",
            f"cannot write {path}: {exc.strerror or exc}",
            fix="choose a writable location for the report",
        ) from exc
    logger.info("report written to %s (%d kB)", path, len(text) // 1024)
    return path


def render_run(folder: Path) -> Path:
    """Figures and report of a saved run folder (finished or not); returns the report's path.

    :func:`~noisebench.results.store.load_run`, then :func:`~noisebench.results.plots.plot_run`
    (skipped
    with a warning without matplotlib), then :func:`write_report` to
    ``<folder>/report.html``. (``noisebench render FOLDER`` does the same through
    :func:`noisebench.running.sequencer.write_outputs`.)
    """
    from noisebench.results.plots import plot_run
    from noisebench.results.store import load_run

    folder = Path(folder)
    record = load_run(folder)
    try:
        plots = plot_run(record, folder)
    except InputError as exc:
        if exc.field != "plots":
            raise
        logger.warning("report without figures: %s", exc)
        plots = []
    return write_report(record, folder / REPORT_FILE, plots=plots)


__all__ = [
    "SAFETY_NOTE",
    "environment",
    "existing_figures",
    "label",
    "render_report",
    "report_context",
    "render_run",
    "render_value",
    "value_node",
    "verdict_html",
    "verdict_tag",
    "write_report",
]

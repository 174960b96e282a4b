"""One self-contained HTML report per run: summary, figures, points, budget, calibration.

The file needs nothing else to be read, archived or mailed: the style sheet is inline and the
figures are PNGs embedded as base64 ``data:`` URIs; there is no script and no external link
(the only links are the contents list's in-page anchors). Every piece of text taken from the
record goes through :func:`html.escape`.

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
"""

from __future__ import annotations

import base64
import html
import json
import logging
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

from noisebench.errors import InputError
from noisebench.results.plots import (
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

logger = logging.getLogger(__name__)

DETAIL_ROWS_MAX = 250  # per-frequency budget/calibration tables only up to this many rows
FREQUENCY_DIGITS = 7  # significant digits of a frequency column at most (1 kHz at 6 GHz)
FAILED_CHECKS_SHOWN = 25  # the worst checks not passed, by margin; the points table has all
SCROLL_ROWS = 100  # tables longer than this scroll inside a box with a fixed header
DEFAULT_T0_K = 290.0

STYLE = """
:root { --ink:#1f2a36; --muted:#5b6773; --line:#d9dde3; --band:#f4f5f7; --accent:#1f3b57;
        --pass:%(pass)s; --fail:%(fail)s; --indet:%(indeterminate)s; --nj:%(not_judged)s; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 84rem; padding: 2rem clamp(1rem, 3vw, 2.5rem);
       color: var(--ink); background: #fff;
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", sans-serif; }
header { border-bottom: 3px solid var(--accent); padding-bottom: .6rem; margin-bottom: 1rem; }
header h1 { font-size: 1.5rem; margin: 0; font-weight: 600; }
header p { margin: .2rem 0 0; color: var(--muted); }
.tag { display: inline-block; border: 1px solid var(--muted); border-radius: 3px;
       padding: 0 .4rem; font-size: .8rem; margin-left: .4rem; color: var(--ink); }
.howto { background: var(--band); border-left: 4px solid var(--accent); padding: .5rem .9rem;
         font-size: .9rem; margin: 0 0 .8rem; }
nav { font-size: .85rem; color: var(--muted); margin-bottom: 1rem; }
nav a { color: var(--accent); margin-right: .8rem; text-decoration: none; }
h2 { font-size: 1.15rem; margin: 2rem 0 .6rem; color: var(--accent); font-weight: 600;
     border-bottom: 1px solid var(--line); padding-bottom: .2rem; }
h3 { font-size: 1rem; margin: 1.2rem 0 .4rem; }
p.lead { margin: .3rem 0 .6rem; max-width: 62rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .86rem; }
th, td { padding: .25rem .5rem; border-bottom: 1px solid var(--line); text-align: left;
         vertical-align: top; }
th { background: var(--band); font-weight: 600; vertical-align: bottom; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
td.num { white-space: nowrap; }
table.grid td { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.grid th { text-align: right; }
table.grid td.t, table.grid th.t { text-align: left; white-space: normal; }
table.grid { font-size: .8rem; } table.grid th, table.grid td { padding: .2rem .4rem; }
table.grid tbody tr:nth-child(even) { background: #fafbfc; }
table.kv th { width: 14rem; background: none; color: var(--muted); font-weight: 500;
              vertical-align: top; }
.wrap { overflow-x: auto; max-width: 100%%; }
.scroll { max-height: 40rem; overflow: auto; border: 1px solid var(--line); margin: .4rem 0 1rem; }
.scroll table { margin: 0; } .scroll thead th { position: sticky; top: 0; z-index: 1; }
.verdict { display: inline-block; padding: .3rem .9rem; border-radius: 4px;
           font-weight: 700; letter-spacing: .06em; }
.vt { display: inline-block; white-space: nowrap; border-radius: 3px; padding: 0 .3rem;
      font-weight: 600; }
.v-pass { color: var(--pass); } .v-not_judged { color: var(--nj); }
.v-fail { color: #fff; background: var(--fail); }
.v-indeterminate { color: #1f2a36; background: var(--indet); }
.verdict.v-pass { color: #fff; background: var(--pass); }
.verdict.v-other, .verdict.v-not_judged { color: #fff; background: var(--muted); }
.flag { font-family: ui-monospace, Menlo, Consolas, monospace; font-size: .78rem;
        background: var(--band); padding: 0 .3rem; border-radius: 3px; white-space: nowrap; }
.warn { border-left: 4px solid var(--indet); background: #fbf6ec; padding: .5rem .8rem;
        margin: .6rem 0; }
.warn ul { margin: .3rem 0; }
figure { margin: 1rem 0; } figure img { max-width: 100%%; height: auto;
         border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: .85rem; max-width: 62rem; }
details { margin: .3rem 0 .8rem; } summary { cursor: pointer; color: var(--accent); }
pre { background: var(--band); padding: .7rem; overflow-x: auto; font-size: .8rem; }
.safety { border: 1px solid var(--line); background: var(--band); padding: .4rem 1rem;
          font-size: .88rem; }
.muted { color: var(--muted); }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .8rem; }
@media print { body { padding: 0; max-width: none; }
               .scroll { max-height: none; overflow: visible; }
               figure, tr { break-inside: avoid; } nav { display: none; } }
""" % {key: colour for key, (colour, _marker) in VERDICT_STYLE.items()}

FIGURE_CAPTIONS = {
    "noise_figure.png": "Noise figure of the DUT versus frequency, with its uncertainty, the "
    "NF limit and each point's verdict (marker shape and colour).",
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


# ----------------------------------------------------------------------------- formatting


def _e(value: Any) -> str:
    """Escaped text of anything."""
    return html.escape(str(value), quote=True)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _num(value: Any, digits: int = 3) -> str:
    """A number with ``digits`` decimals (``-`` for missing), escaped."""
    if value is None or isinstance(value, bool) or not isinstance(value, (int, float)):
        return "-" if value is None else _e(value)
    if isinstance(value, float) and not math.isfinite(value):
        return _e(value)
    return f"{value:.{digits}f}" if isinstance(value, float) else str(value)


def _sig(value: Any) -> str:
    """A number in 6 significant digits, other values escaped."""
    if isinstance(value, float):
        return f"{value:.6g}"
    return "-" if value is None else _e(value)


def _freq(freq_hz: float) -> str:
    """A frequency with its own unit, e.g. ``1.5&nbsp;GHz``."""
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(freq_hz) >= scale:
            return f"{freq_hz / scale:.6g}&nbsp;{unit}"
    return f"{freq_hz:.6g}&nbsp;Hz"


def _range(values: Sequence[float], digits: int = 3, unit: str = "") -> str:
    """``a to b unit`` (or one value) for a list of numbers."""
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
        return _e(value.strftime("%Y-%m-%d %H:%M:%S") + " UTC")
    return _e(value.isoformat(sep=" ", timespec="seconds"))


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


def verdict_html(verdict: Any) -> str:
    """A verdict as symbol + word in its colour, e.g. ``✕ fail`` (readable without colour)."""
    word = _verdict_word(verdict)
    symbol = VERDICT_SYMBOL.get(word, "")
    text = f"{symbol} {word.replace('_', ' ')}".strip()
    return f'<span class="vt {_verdict_class(word)}">{_e(text)}</span>'


def _kv_table(rows: Iterable[tuple[str, str]]) -> str:
    body = "".join(
        f"<tr><th>{_e(_keep_together(key))}</th><td>{value}</td></tr>" for key, value in rows
    )
    return f'<table class="kv">{body}</table>'


def _td(cell: str | tuple[str, str], numeric: bool) -> str:
    """One cell: escaped HTML, or (escaped HTML, css class)."""
    content, css = cell if isinstance(cell, tuple) else (cell, "")
    css = " ".join(c for c in (css, "num" if numeric else "") if c)
    return f'<td class="{css}">{content}</td>' if css else f"<td>{content}</td>"


def _table(
    headers: Sequence[tuple[str, bool]], rows: Iterable[Sequence[Any]], css: str = ""
) -> str:
    """A table; ``headers`` are (label, numeric); cells are already-escaped HTML."""
    head = "".join(
        f'<th class="num">{_e(_keep_together(h))}</th>'
        if num
        else f"<th>{_e(_keep_together(h))}</th>"
        for h, num in headers
    )
    body = "".join(
        "<tr>" + "".join(_td(c, num) for c, (_, num) in zip(row, headers, strict=True)) + "</tr>"
        for row in rows
    )
    return (
        f'<div class="wrap"><table class="{css}"><thead><tr>{head}</tr></thead>'
        f"<tbody>{body}</tbody></table></div>"
    )


@dataclass(frozen=True)
class Column:
    """A column of a compact grid table: header, hover text, cell function, text or number."""

    header: str
    cell: Callable[..., str]
    title: str = ""
    text: bool = False


def _keep_together(text: str) -> str:
    """Header text that never wraps inside ``k = 2``."""
    return text.replace("k = ", "k\u00a0=\u00a0")


def _grid_header(column: Column) -> str:
    css = ' class="t"' if column.text else ""
    title = f' title="{_e(column.title)}"' if column.title else ""
    return f"<th{css}{title}>{_e(_keep_together(column.header))}</th>"


def _grid(columns: Sequence[Column], rows: Sequence[Sequence[Any]], css: str = "") -> str:
    """A compact table (numbers right-aligned by the table's class, not per cell).

    Each row holds the arguments of every column's ``cell``; a table longer than
    ``SCROLL_ROWS`` rows scrolls inside a box under a fixed header.
    """
    head = "".join(_grid_header(c) for c in columns)
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="t">{c.cell(*args)}</td>' if c.text else f"<td>{c.cell(*args)}</td>"
            for c in columns
        )
        + "</tr>"
        for args in rows
    )
    box = "scroll" if len(rows) > SCROLL_ROWS else "wrap"
    return (
        f'<div class="{box}"><table class="grid {css}"><thead><tr>{head}</tr></thead>'
        f"<tbody>{body}</tbody></table></div>"
    )


SWITCH_KEYS = ("preamp",)  # booleans read as on/off; all others as yes/no


def _switch(key: str, value: bool) -> str:
    if key in SWITCH_KEYS:
        return "on" if value else "off"
    return "yes" if value else "no"


def render_value(value: Any, depth: int = 0, key: str = "") -> str:
    """Any JSON-like value as escaped HTML: tables for mappings and lists of mappings.

    Numbers under a key ending in ``_hz`` are shown as frequencies (kHz/MHz/GHz).
    """
    if isinstance(value, Mapping):
        if not value:
            return "-"
        if depth >= 3:
            return f"<pre>{_e(json.dumps(value, indent=1, default=str))}</pre>"
        return _kv_table((str(k), render_value(v, depth + 1, str(k))) for k, v in value.items())
    if isinstance(value, (list, tuple)):
        if value and all(isinstance(v, Mapping) for v in value):
            return _records_table(value, depth)
        shown = ", ".join(render_value(v, depth + 1, key) for v in value[:20])
        return shown + (f" … ({len(value)} values)" if len(value) > 20 else "")
    if key.endswith("_hz") and _is_number(value):
        return _freq(value)
    if isinstance(value, bool):
        return _switch(key, value)
    return _sig(value)


def _records_table(records: Sequence[Mapping[str, Any]], depth: int) -> str:
    """A list of mappings as one table with readable headers (field names -> labels)."""
    keys: list[str] = []
    for item in records:
        keys += [str(k) for k in item if str(k) not in keys]
    numeric = {k: all(_is_number(r.get(k)) or r.get(k) is None for r in records) for k in keys}
    rows = (
        [render_value(r.get(k), depth + 1, k) if r.get(k) is not None else "-" for k in keys]
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


def _header(record: RunRecord) -> str:
    info = record.info
    title = f"Noise-figure report: {info.dut_id or info.run_id}"
    bench = info.notes.get("bench_kind")
    tag = ' <span class="tag">simulated bench</span>' if bench == "simulated" else ""
    return (
        f"<header><h1>{_e(title)}</h1><p>{_e(info.method.value.replace('_', '-'))} method"
        f" · run {_e(info.run_id)} · {_when(info.started_at)}{tag}</p></header>"
    )


def _how_to_read(record: RunRecord) -> str:
    """One short paragraph on what the numbers, bars, verdicts and flags mean."""
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
    if record.verdict:
        rule = str(record.verdict.get("rule") or "")
        symbols = ", ".join(f"{VERDICT_SYMBOL[w]} {w}" for w in ("pass", "fail", "indeterminate"))
        parts.append(
            f"Decision rule {_e(RULE_TEXT.get(rule, rule or 'not stated'))}. "
            f"Verdicts are shown by symbol and colour: {_e(symbols)}."
        )
    parts.append(
        "Flags mark points to read with care; they are explained in words above the "
        "points table. Full-precision values are in results.csv and results.json."
    )
    return f'<p class="howto"><strong>How to read this report.</strong> {" ".join(parts)}</p>'


def _contents(sections: Sequence[tuple[str, str]]) -> str:
    links = "".join(f'<a href="#{anchor}">{_e(title)}</a>' for anchor, title in sections)
    return f"<nav>Contents: {links}</nav>"


def _summary(record: RunRecord) -> str:
    info = record.info
    dut = info.plan.get("dut") if isinstance(info.plan.get("dut"), Mapping) else {}
    rows = [
        (
            "DUT",
            _e(info.dut_id or "-")
            + (f" — {_e(dut['description'])}" if dut.get("description") else ""),
        )
    ]
    method = _e(info.method.value.replace("_", "-")) + " method"
    if info.plan.get("name"):
        method += f" (plan “{_e(info.plan['name'])}”)"
    rows += [
        ("Method", method),
        ("Bench", _bench_text(record)),
        ("Status", _e(info.status)),
        ("Started", _when(info.started_at)),
        ("Ended", _when(info.ended_at)),
    ]
    if info.ended_at and info.started_at:
        rows.append(("Duration", _duration((info.ended_at - info.started_at).total_seconds())))
    rows += [
        ("Run id", _e(info.run_id)),
        ("Operator", _e(info.operator or "-")),
        ("Station", _e(info.station or "-")),
    ]
    rows += _result_rows(record)
    rows += _temperature_rows(record)
    if info.resumed_at:
        rows.append(("Resumed", ", ".join(_when(t) for t in info.resumed_at)))
    for role, identity in sorted(info.identities.items()):
        rows.append((f"Instrument: {role.replace('_', ' ')}", _e(identity)))
    if info.versions:
        rows.append(
            ("Software", ", ".join(f"{_e(k)} {_e(v)}" for k, v in sorted(info.versions.items())))
        )
    return (
        '<h2 id="summary">Summary</h2>'
        + _verdict_banner(record)
        + _kv_table(rows)
        + _warnings(record)
    )


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
    return _e(words)


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


def _verdict_banner(record: RunRecord) -> str:
    if not record.verdict:
        return ""
    unit = _verdict_word(record.verdict.get("unit", "-"))
    counts = _judged_by_verdict(record)
    detail = ", ".join(f"{n} {verdict_html(k)}" for k, n in sorted(counts.items()))
    symbol = VERDICT_SYMBOL.get(unit, "")
    return (
        f'<p><span class="verdict {_verdict_class(unit)}">'
        f"{_e((symbol + ' ' + unit.replace('_', ' ')).strip().upper())}</span>"
        + (f" &nbsp; points: {detail}" if detail else "")
        + "</p>"
    )


def _warnings(record: RunRecord) -> str:
    parts = []
    if record.warnings:
        items = "".join(f"<li>{_e(w)}</li>" for w in record.warnings)
        parts.append(f'<div class="warn"><strong>Read with care</strong><ul>{items}</ul></div>')
    skipped = _skipped(record)
    if skipped:
        items = "".join(
            f"<li>{_freq(s['freq_hz']) if _is_number(s.get('freq_hz')) else '-'} "
            f"({_e(s.get('stage', '-'))}): {_e(s.get('reason', '-'))}</li>"
            for s in skipped
        )
        parts.append(
            f'<div class="warn"><strong>{len(skipped)} point'
            f"{'s' if len(skipped) != 1 else ''} not measured</strong> (refused by "
            f"the physics; the run went on)<ul>{items}</ul></div>"
        )
    return "".join(parts)


def _figures(images: Mapping[str, bytes]) -> str:
    if not images:
        return ""
    parts = ['<h2 id="figures">Figures</h2>']
    for name, png in images.items():
        data = base64.b64encode(png).decode("ascii")
        caption = FIGURE_CAPTIONS.get(name, name)
        parts.append(
            f'<figure><img alt="{_e(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>"
        )
    return "".join(parts)


def _flags_html(point: PointResult) -> str:
    return " ".join(
        f'<span class="flag" title="{_e(FLAG_DESCRIPTIONS.get(f, f.value))}">{_e(f.value)}</span>'
        for f in point.flags
    )


def _point_columns(record: RunRecord, freq: FrequencyColumn) -> list[Column]:
    """The per-point table's columns: only those the record has data for."""
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
            Column("Verdict", lambda p, b, v: verdict_html(v.get("verdict")), text=True),
        ]
    columns.append(Column("Flags", lambda p, b, v: _flags_html(p), text=True))
    return columns


def _margin_cell(entry: Mapping[str, Any]) -> str:
    margin = _nf_margin(entry)
    return "-" if margin is None else f"{margin:+.3f}"


def _points(record: RunRecord) -> str:
    if not record.points:
        return '<h2 id="points">Points</h2><p>No point was measured.</p>'
    freq = FrequencyColumn.of([p.freq_hz for p in record.points])
    columns = _point_columns(record, freq)
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    rows = [(p, budgets.get(p.freq_hz) or {}, verdicts.get(p.freq_hz) or {}) for p in record.points]
    table = _grid(columns, rows, css="points")
    return '<h2 id="points">Points</h2>' + _flag_legend(record) + table


def _flag_legend(record: RunRecord) -> str:
    used: dict[PointFlag, int] = {}
    for point in record.points:
        for flag in point.flags:
            used[flag] = used.get(flag, 0) + 1
    if not used:
        return '<p class="lead">No point carries a flag.</p>'
    rows = (
        (f'<span class="flag">{_e(f.value)}</span>', str(n), _e(FLAG_DESCRIPTIONS.get(f, f.value)))
        for f, n in used.items()
    )
    return "<h3>Flags: what the codes in the last column mean</h3>" + _table(
        [("Flag", False), ("Points", True), ("Meaning", False)], rows
    )


def _verdict_section(record: RunRecord) -> str:
    verdict = record.verdict
    if not verdict:
        return ""
    rows = [("Unit verdict", verdict_html(verdict.get("unit", "-")))]
    if verdict.get("rule"):
        rows.append(("Decision rule", _e(RULE_TEXT.get(str(verdict["rule"]), verdict["rule"]))))
    for note in verdict.get("notes") or []:
        rows.append(("Note", _e(note)))
    parts = ['<h2 id="verdict">Limits and verdict</h2>', _kv_table(rows)]
    limits = [b for b in verdict.get("limits") or [] if isinstance(b, Mapping)]
    if limits:
        parts += ["<h3>Limit bands</h3>", _records_table(limits, depth=1)]
    bands = [b for b in verdict.get("bands") or [] if isinstance(b, Mapping)]
    if bands:
        parts += ["<h3>Per band</h3>", _band_table(bands)]
    parts.append(_failed_checks(verdict))
    return "".join(parts)


def _band_table(bands: Sequence[Mapping[str, Any]]) -> str:
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
            _e(b.get("name") or "-"),
            _freq(b["start_hz"]) if _is_number(b.get("start_hz")) else "-",
            _freq(b["stop_hz"]) if _is_number(b.get("stop_hz")) else "-",
            _sig(b.get("points")),
            verdict_html(b.get("verdict")),
            _check_text(b["flatness"]) if isinstance(b.get("flatness"), Mapping) else "-",
        ]
        for b in bands
    ]
    return _table(headers, rows)


def _check_text(check: Mapping[str, Any]) -> str:
    value, limit, u = check.get("value"), check.get("limit"), check.get("U")
    text = f"{_num(value)} dB vs {_e(check.get('kind', ''))} {_num(limit)} dB"
    if _is_number(u):
        text += f" (U {_num(u)} dB)"
    return f"{text}: {verdict_html(check.get('verdict', '-'))}"


QUANTITY_WORDS = {"nf_db": "NF", "gain_db": "gain", "flatness_db": "gain flatness"}


def _failed_checks(verdict: Mapping[str, Any]) -> str:
    """The checks that did not pass, worst margin first (at most ``FAILED_CHECKS_SHOWN``)."""
    failed = [
        (entry, check)
        for entry in verdict.get("points") or []
        if isinstance(entry, Mapping)
        for check in _checks(entry)
        if check.get("verdict") in ("fail", "indeterminate")
    ]
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
                _e(QUANTITY_WORDS.get(quantity, quantity)),
                _e(check.get("kind", "-")),
                _num(check.get("limit")),
                _num(check.get("value")),
                _num(check.get("U")),
                f"{margin:+.3f}" if _is_number(margin) else "-",
                verdict_html(check["verdict"]),
                _e(check.get("note") or ""),
            ]
        )
    if not rows:
        return ""
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
    return (
        f'<h3>Checks not passed ({shown})</h3><p class="lead">Worst first. Margin: how '
        "far the value is inside its limit (negative: outside).</p>" + _table(headers, rows)
    )


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
    return f"{_e(top.get('name', '?'))} ({top['contribution_db']:+.4f} dB)"


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
        mc = [b.get("monte_carlo") for b in budgets if isinstance(b.get("monte_carlo"), Mapping)]
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


def _sweep_contributions(budgets: Sequence[Mapping[str, Any]]) -> str:
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
                _e(name),
                _e(", ".join(sorted(_distribution(d) for d in dists))),
                _e(_range(us, 4) if us else "-"),
                _e(", ".join(sorted(units))),
                _e(_range([abs(c["contribution_db"]) for c in items], 4)),
                _e(_range(shares.get(name, []), 1)),
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


def _budget_at(budget: Mapping[str, Any]) -> str:
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
    rows = [
        [
            _e(c.get("name", "?")),
            _e(_distribution(c.get("distribution", "-"))),
            _sig(c.get("u")),
            _e(c.get("unit", "")),
            _sig(c.get("sensitivity")),
            f"{c['contribution_db']:+.4f}",
            _share(c["contribution_db"], u_c),
        ]
        for c in lines
    ]
    rows.append(
        [
            "<strong>combined standard uncertainty u_c</strong>",
            "",
            "",
            "",
            "",
            f"<strong>{_num(u_c, 4)}</strong>",
            "100.0" if _is_number(u_c) else "-",
        ]
    )
    rows.append(
        [
            f"<strong>expanded uncertainty U (k = {_sig(budget.get('k'))})</strong>",
            "",
            "",
            "",
            "",
            f"<strong>{_num(budget.get('U_expanded_db'), 4)}</strong>",
            "",
        ]
    )
    mc = budget.get("monte_carlo")
    tail = ""
    if isinstance(mc, Mapping):
        tail = (
            '<p class="lead">Monte Carlo: '
            + ", ".join(
                f"{_e(label(str(k)))} {render_value(v, 3, str(k))}"
                for k, v in mc.items()
                if v is not None
            )
            + ".</p>"
        )
    return _table(headers, rows) + tail


def _omitted_note(budgets: Sequence[Mapping[str, Any]]) -> str:
    omitted: list[str] = []
    for budget in budgets:
        omitted += [str(o) for o in budget.get("omitted") or [] if str(o) not in omitted]
    if not omitted:
        return ""
    return f"<p>Not included (no data): {', '.join(_e(o) for o in omitted)}.</p>"


def _budget_matrix(budgets: Sequence[Mapping[str, Any]]) -> str:
    """Per frequency: u_c, k, U and every signed contribution (dB), collapsed."""
    freq = FrequencyColumn.of([b["freq_hz"] for b in budgets])
    if len(budgets) > DETAIL_ROWS_MAX:
        return (
            f'<p class="muted">Per-frequency budgets of {len(budgets)} points are in '
            "results.json (not repeated here).</p>"
        )
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
        Column("Method", lambda b: _e(b.get("method", "-")), text=True),
        Column("u_c (dB)", lambda b: _num(b.get("u_combined_db"), 4)),
        Column("k", lambda b: _sig(b.get("k"))),
        Column("U (dB)", lambda b: _num(b.get("U_expanded_db"), 4)),
    ]
    if mc:
        columns.append(Column("MC interval (dB)", _mc_interval, text=True))
    columns += [Column(f"{name} (dB)", contribution(name)) for name in names]
    columns.append(Column("Largest contribution", _largest, text=True))
    return (
        f"<details><summary>Contributions cᵢ·u(xᵢ) per frequency ({len(budgets)} "
        f"frequencies, signed, dB)</summary>{_grid(columns, [(b,) for b in budgets])}"
        "</details>"
    )


def _mc_interval(budget: Mapping[str, Any]) -> str:
    interval = (budget.get("monte_carlo") or {}).get("interval_db")
    if (
        isinstance(interval, (list, tuple))
        and len(interval) == 2
        and all(_is_number(v) for v in interval)
    ):
        return f"{interval[0]:.3f} to {interval[1]:.3f}"
    return "-"


def _budgets(record: RunRecord) -> str:
    budgets = _budget_list(record)
    if not budgets:
        return ""
    worst = max(
        budgets,
        key=lambda b: b.get("U_expanded_db") if _is_number(b.get("U_expanded_db")) else -math.inf,
    )
    lead = (
        f'<p class="lead">{_e(_method_text(budgets))}; expanded uncertainty U '
        f"({_e(coverage_text(budgets))}) from "
        f"{_e(_range([b.get('U_expanded_db') for b in budgets], 3, 'dB'))} over "
        f"{len(budgets)} frequencies. Contributions cᵢ·u(xᵢ) are standard uncertainties "
        "(k = 1) in dB of NF; their squares add up to u_c².</p>"
    )
    return (
        '<h2 id="budget">Uncertainty budget</h2>'
        + lead
        + "<h3>Over the sweep</h3>"
        + _sweep_contributions(budgets)
        + f"<h3>At {_freq(worst['freq_hz'])}, the point with the largest U</h3>"
        + _budget_at(worst)
        + _omitted_note(budgets)
        + _budget_matrix(budgets)
    )


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
        settings = entry.get("settings") if isinstance(entry.get("settings"), Mapping) else {}
        key = json.dumps(
            [entry.get("kind"), entry.get("cold_temperature_k")]
            + [settings.get(k) for k in GROUPED_SETTINGS],
            default=str,
        )
        groups.setdefault(key, []).append(entry)
    return list(groups.values())


def _calibration_entries(entries: Sequence[Mapping[str, Any]]) -> str:
    """One row per group of calibrations with the same settings, then per-frequency results."""
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
    rows, summary = [], []
    for group in _calibration_groups(entries):
        first = group[0]
        settings = first.get("settings") if isinstance(first.get("settings"), Mapping) else {}
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
                _e(first.get("kind", "-")),
                str(len(group)),
                _span_text(freqs),
                _time_span(times),
                _freq(rbw) if _is_number(rbw) else "-",
                _e(_filter_text(settings.get("rbw_filter"))),
                _e(settings.get("detector", "-")),
                _e(settings.get("averaging_scale", "-")),
                _e(_range(averages, 0)) if averages else "-",
                _sig(settings.get("attenuation_db")),
                render_value(settings.get("preamp"), key="preamp"),
                _num(first.get("cold_temperature_k"), 2),
                _num(math.fsum(seconds), 3) if seconds else "-",
            ]
        )
    for number, entry in enumerate(entries, start=1):
        summary += [
            {"calibration": number, **r}
            for r in entry.get("summary") or []
            if isinstance(r, Mapping)
        ]
    kinds = sorted({str(e.get("kind")) for e in entries if e.get("kind") in CALIBRATION_TEXT})
    intro = "".join(f'<p class="lead">{_e(CALIBRATION_TEXT[k])}</p>' for k in kinds)
    return intro + _table(headers, rows) + _calibration_results(summary)


def _time_span(times: Sequence[datetime]) -> str:
    if not times:
        return "-"
    first, last = times[0], times[-1]
    if first == last:
        return _e(first.strftime("%Y-%m-%d %H:%M:%S"))
    same_day = first.date() == last.date()
    return _e(
        f"{first:%Y-%m-%d %H:%M:%S} to {last:%H:%M:%S}"
        if same_day
        else f"{first:%Y-%m-%d %H:%M:%S} to {last:%Y-%m-%d %H:%M:%S}"
    )


CALIBRATION_SUMMARY_SKIP = ("calibration", "freq_hz", "floor_w_per_hz")


def _calibration_results(summary: list[dict[str, Any]]) -> str:
    """Ranges of the per-frequency calibration results, and the values per frequency."""
    if not summary:
        return ""
    keys: list[str] = []
    for row in summary:
        keys += [k for k in row if k not in keys and k not in CALIBRATION_SUMMARY_SKIP]
    numeric = [k for k in keys if any(_is_number(r.get(k)) for r in summary)]
    ranges = _kv_table(
        (label(k), _e(_range([r.get(k) for r in summary], _digits_for(k)))) for k in numeric
    )
    summary.sort(key=lambda r: r.get("freq_hz") if _is_number(r.get("freq_hz")) else math.inf)
    if len(summary) > DETAIL_ROWS_MAX:
        detail = (
            f'<p class="muted">Per-frequency calibration results of {len(summary)} '
            "frequencies are in results.json (not repeated here).</p>"
        )
    else:
        freq = FrequencyColumn.of([r["freq_hz"] for r in summary if _is_number(r.get("freq_hz"))])
        columns = [Column(freq.header, lambda r: freq.cell(r.get("freq_hz")))]
        columns += [Column(label(k), _calibration_cell(k)) for k in numeric]
        detail = (
            f"<details><summary>Per-frequency calibration results ({len(summary)} "
            f"frequencies)</summary>{_grid(columns, [(r,) for r in summary])}</details>"
        )
    return "<h3>Calibration results over the sweep</h3>" + ranges + detail


def _digits_for(key: str) -> int:
    if key.endswith("_k"):
        return 1
    return 0 if key in ("averages", "calibration") else 3


def _calibration_cell(key: str) -> Callable[[Mapping[str, Any]], str]:
    digits = _digits_for(key)
    return lambda row: (
        _num(row.get(key), digits) if _is_number(row.get(key)) else _sig(row.get(key))
    )


def _calibration(record: RunRecord) -> str:
    latest = record.info.calibration or (record.calibrations[-1] if record.calibrations else None)
    if not latest:
        return ""
    count = len(record.calibrations)
    intro = (
        f"<p>Calibration data saved {count} time{'s' if count != 1 else ''} during the "
        "run; the latest is shown.</p>"
        if count > 1
        else ""
    )
    entries = latest.get("entries")
    if isinstance(entries, list) and all(isinstance(e, Mapping) for e in entries):
        body = _calibration_entries(entries) if entries else "<p>No calibration entry.</p>"
    else:
        body = render_value(latest)
    return '<h2 id="calibration">Calibration</h2>' + intro + body


GAIN_POINT_KEYS = ("gain_db", "u_gain_db", "through_dbm", "dut_dbm", "snr_through_db", "snr_dut_db")


def _gain_measurement(record: RunRecord) -> str:
    """The measured-gain pass (generator + analyzer): level, ranges, per-frequency values."""
    result = record.info.notes.get("gain_measurement")
    if not isinstance(result, Mapping):
        return ""
    points = [
        p
        for p in result.get("points") or []
        if isinstance(p, Mapping) and _is_number(p.get("freq_hz"))
    ]
    level = result.get("generator_level_dbm")
    lead = (
        "The DUT's gain was measured with the signal generator: a THROUGH pass (cable "
        "only), then a DUT pass, the tone read in a marker band with the noise removed. "
        "These are path gains from the generator to the analyzer (the DUT with its input "
        "cable); the points table shows the DUT's own gain after the loss corrections"
    )
    if _is_number(level):
        lead += f"; generator level {level:.2f} dBm"
    if result.get("level_limited_by"):
        lead += f" (set by the {_e(result['level_limited_by'])})"
    if _is_number(result.get("rbw_hz")):
        lead += f", RBW {_freq(result['rbw_hz'])}"
    if _is_number(result.get("band_hz")):
        lead += f", marker band {_freq(result['band_hz'])}"
    parts = ['<h2 id="gain">Gain measurement</h2>', f'<p class="lead">{lead}.</p>']
    ranges = [
        (label(k), _e(_range([p.get(k) for p in points], 3, "")))
        for k in GAIN_POINT_KEYS
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
            _e(
                _range(
                    [
                        p["uncertainty_db"].get(t)
                        for p in points
                        if isinstance(p.get("uncertainty_db"), Mapping)
                    ],
                    4,
                )
            ),
        )
        for t in terms
    ]
    parts.append(_kv_table(ranges))
    if points and len(points) <= DETAIL_ROWS_MAX:
        freq = FrequencyColumn.of([p["freq_hz"] for p in points])
        columns = [Column(freq.header, lambda p: freq.cell(p["freq_hz"]))]
        columns += [Column(label(k), _calibration_cell(k)) for k in GAIN_POINT_KEYS]
        columns.append(
            Column("Flags", lambda p: _e(", ".join(map(str, p.get("flags") or []))), text=True)
        )
        parts.append(
            f"<details><summary>Per-frequency gain measurement ({len(points)} "
            f"frequencies)</summary>{_grid(columns, [(p,) for p in points])}"
            "</details>"
        )
    settings = result.get("plan")
    if isinstance(settings, Mapping):
        shown = {k: v for k, v in settings.items() if k != "freqs_hz"}
        parts.append(
            "<details><summary>Gain-measurement settings</summary>"
            f"{render_value(shown, 1)}</details>"
        )
    return "".join(parts)


def _settings(record: RunRecord) -> str:
    groups = [g for g in record.info.applied_settings if isinstance(g, Mapping)]
    if not groups:
        return ""
    rows = []
    for group in groups:
        settings = group.get("settings") if isinstance(group.get("settings"), Mapping) else group
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
                else render_value(r.get(k), 2, k)
                if r.get(k) is not None
                else "-"
            )
            for k in keys
        ]
        for r in rows
    ]
    return (
        '<h2 id="settings">Acquisition settings applied</h2><p class="lead">What the '
        "analyzer reported it applied (after its own rounding), per group of points.</p>"
        + _table(headers, cells)
    )


NOTES_SHOWN_ELSEWHERE = ("resources", "bench_kind", "skipped_points", "gain_measurement")


def _plan_and_notes(record: RunRecord) -> str:
    parts = []
    notes = {k: v for k, v in record.info.notes.items() if k not in NOTES_SHOWN_ELSEWHERE}
    skipped = _skipped(record)
    if notes or skipped:
        body = render_value(notes) if notes else ""
        if skipped:
            body += "<h3>Points not measured</h3>" + _records_table(skipped, depth=1)
        parts.append('<h2 id="notes">Notes</h2>' + body)
    if record.info.plan:
        text = json.dumps(record.info.plan, indent=2, default=str)
        parts.append(
            '<h2 id="plan">Plan</h2><details><summary>The validated plan of this '
            f"run</summary><pre>{_e(text)}</pre></details>"
        )
    return "".join(parts)


def _safety() -> str:
    items = "".join(f"<li>{_e(line)}</li>" for line in SAFETY_NOTE)
    return (
        '<h2 id="safety">Bench safety</h2><p class="lead">General cautions for anyone '
        f'repeating this measurement on real instruments:</p><div class="safety"><ul>'
        f"{items}</ul></div>"
    )


# ----------------------------------------------------------------------------- entry points


def _sections(record: RunRecord, images: Mapping[str, bytes]) -> list[tuple[str, str]]:
    """``(anchor, title)`` of the sections this record has, in order."""
    info = record.info
    present = [
        ("summary", "Summary", True),
        ("figures", "Figures", bool(images)),
        ("points", "Points", True),
        ("verdict", "Limits and verdict", bool(record.verdict)),
        ("budget", "Uncertainty budget", bool(_budget_list(record))),
        ("calibration", "Calibration", bool(info.calibration or record.calibrations)),
        ("gain", "Gain measurement", isinstance(info.notes.get("gain_measurement"), Mapping)),
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


def render_report(record: RunRecord, images: Mapping[str, bytes] | None = None) -> str:
    """The report as one HTML string; ``images`` maps figure file names to PNG bytes."""
    if not isinstance(record, RunRecord):
        raise InputError(
            "record",
            f"must be a RunRecord (got {type(record).__name__})",
            fix="load it with noisebench.results.store.load_run",
        )
    images = images or {}
    info = record.info
    version = info.versions.get("noisebench", "")
    generated = datetime.now().astimezone()
    title = f"Noise-figure report: {info.dut_id or info.run_id}"
    body = "".join(
        [
            _header(record),
            _how_to_read(record),
            _contents(_sections(record, images)),
            _summary(record),
            _figures(images),
            _points(record),
            _verdict_section(record),
            _budgets(record),
            _calibration(record),
            _gain_measurement(record),
            _settings(record),
            _plan_and_notes(record),
            _safety(),
            f"<footer>Generated by noisebench {_e(version)} on {_when(generated)}.</footer>",
        ]
    )
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{STYLE}</style></head>"
        f"<body>{body}</body></html>\n"
    )


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
    "label",
    "render_report",
    "render_run",
    "render_value",
    "verdict_html",
    "write_report",
]

"""One self-contained HTML report per run: summary, figures, points, budgets, calibration.

The file needs nothing else to be read, archived or mailed: the style sheet is inline and the
figures are PNGs embedded as base64 ``data:`` URIs; there is no script and no external link.
Every piece of text taken from the record goes through :func:`html.escape`.

Sections: summary (DUT, method, dates, instruments, versions, status, NF range, verdict),
figures, per-point table with the flags explained in words, uncertainty budgets (when the record
has them), calibration, acquisition settings, plan, notes, and a short safety note.
"""

from __future__ import annotations

import base64
import html
import json
import logging
import math
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from noisebench.errors import InputError
from noisebench.point import PointFlag
from noisebench.results import FLAG_DESCRIPTIONS, REPORT_FILE, RunRecord, nf_extremes, write_atomic
from noisebench.safety import CAUTIONS as SAFETY_NOTE

logger = logging.getLogger(__name__)

STYLE = """
:root { --ink:#1f2a36; --muted:#5b6773; --line:#d9dde3; --band:#f4f5f7; --accent:#1f3b57;
        --pass:#2e7d4f; --fail:#b3261e; --indet:#9a6410; }
* { box-sizing: border-box; }
body { margin: 0; padding: 2rem clamp(1rem, 4vw, 3rem); color: var(--ink); background: #fff;
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", sans-serif; }
header { border-bottom: 3px solid var(--accent); padding-bottom: .6rem; margin-bottom: 1.4rem; }
header h1 { font-size: 1.5rem; margin: 0; font-weight: 600; }
header p { margin: .2rem 0 0; color: var(--muted); }
h2 { font-size: 1.15rem; margin: 2rem 0 .6rem; color: var(--accent); font-weight: 600;
     border-bottom: 1px solid var(--line); padding-bottom: .2rem; }
h3 { font-size: 1rem; margin: 1.2rem 0 .4rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .88rem; }
th, td { padding: .28rem .6rem; border-bottom: 1px solid var(--line); text-align: left;
         vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.points tbody tr:nth-child(even) { background: #fafbfc; }
table.kv th { width: 13rem; background: none; color: var(--muted); font-weight: 500; }
.wrap { overflow-x: auto; }
.verdict { display: inline-block; padding: .35rem 1rem; border-radius: 4px; color: #fff;
           font-weight: 700; letter-spacing: .06em; }
.v-pass { background: var(--pass); } .v-fail { background: var(--fail); }
.v-indeterminate { background: var(--indet); } .v-other { background: var(--muted); }
td.v-pass, td.v-fail, td.v-indeterminate { background: none; font-weight: 600; }
td.v-pass { color: var(--pass); } td.v-fail { color: var(--fail); }
td.v-indeterminate { color: var(--indet); }
.flag { font-family: ui-monospace, Menlo, Consolas, monospace; font-size: .8rem;
        background: var(--band); padding: 0 .3rem; border-radius: 3px; white-space: nowrap; }
.warn { border-left: 4px solid var(--indet); background: #fbf6ec; padding: .5rem .8rem; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto;
         border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: .85rem; }
details { margin: .3rem 0; } summary { cursor: pointer; }
pre { background: var(--band); padding: .7rem; overflow-x: auto; font-size: .8rem; }
.safety { border: 1px solid var(--line); background: var(--band); padding: .6rem 1rem; }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .8rem; }
@media print { body { padding: 0; } details { display: block; } figure { break-inside: avoid; } }
"""

FIGURE_CAPTIONS = {
    "noise_figure.png": "Noise figure of the DUT versus frequency.",
    "gain.png": "Available gain of the DUT versus frequency.",
    "densities.png": "Raw noise densities measured at each point.",
    "uncertainty.png": "Contributions to the NF uncertainty versus frequency.",
}


# ----------------------------------------------------------------------------- formatting


def _e(value: Any) -> str:
    """Escaped text of anything."""
    return html.escape(str(value), quote=True)


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
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(freq_hz) >= scale:
            return f"{freq_hz / scale:.6g}&nbsp;{unit}"
    return f"{freq_hz:.6g}&nbsp;Hz"


def _when(value: datetime | None) -> str:
    return "-" if value is None else _e(value.isoformat(timespec="seconds"))


def _verdict_class(verdict: Any) -> str:
    text = str(verdict).lower()
    return f"v-{text}" if text in ("pass", "fail", "indeterminate") else "v-other"


def _kv_table(rows: Iterable[tuple[str, str]]) -> str:
    body = "".join(f"<tr><th>{_e(key)}</th><td>{value}</td></tr>" for key, value in rows)
    return f'<table class="kv">{body}</table>'


def _td(cell: str | tuple[str, str], numeric: bool) -> str:
    """One cell: escaped HTML, or (escaped HTML, css class)."""
    content, css = cell if isinstance(cell, tuple) else (cell, "")
    css = " ".join(c for c in (css, "num" if numeric else "") if c)
    return f'<td class="{css}">{content}</td>' if css else f"<td>{content}</td>"


def _table(headers: Sequence[tuple[str, bool]], rows: Iterable[Sequence[Any]],
           css: str = "") -> str:
    """A table; ``headers`` are (label, numeric); cells are already-escaped HTML."""
    head = "".join(f'<th class="num">{_e(h)}</th>' if num else f"<th>{_e(h)}</th>"
                   for h, num in headers)
    body = "".join(
        "<tr>" + "".join(_td(c, num) for c, (_, num) in zip(row, headers, strict=True))
        + "</tr>"
        for row in rows)
    return (f'<div class="wrap"><table class="{css}"><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>")


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
    if key.endswith("_hz") and isinstance(value, (int, float)) and not isinstance(value, bool):
        return _freq(value)
    return _sig(value)


def _records_table(records: Sequence[Mapping[str, Any]], depth: int) -> str:
    keys: list[str] = []
    for item in records:
        keys += [str(k) for k in item if str(k) not in keys]
    numeric = {k: all(isinstance(r.get(k), (int, float)) or r.get(k) is None for r in records)
               for k in keys}
    rows = ([render_value(r.get(k), depth + 1, k) if r.get(k) is not None else "-"
             for k in keys] for r in records)
    return _table([(k, numeric[k]) for k in keys], rows)


# ----------------------------------------------------------------------------- sections


def _summary(record: RunRecord) -> str:
    info = record.info
    rows = [
        ("DUT", _e(info.dut_id or "-")),
        ("Method", _e(info.method.value.replace("_", "-")) + " method"),
        ("Status", _e(info.status)),
        ("Started", _when(info.started_at)),
        ("Ended", _when(info.ended_at)),
        ("Run id", _e(info.run_id)),
        ("Operator", _e(info.operator or "-")),
        ("Station", _e(info.station or "-")),
    ]
    if record.points:
        rows.append(("Points", f"{len(record.points)} from {_freq(record.points[0].freq_hz)} "
                               f"to {_freq(record.points[-1].freq_hz)}"))
    extremes = nf_extremes(record)
    if extremes:
        low, high = extremes
        rows.append(("Noise figure", f"min {low.nf_db:.3f} dB at {_freq(low.freq_hz)}, "
                                     f"max {high.nf_db:.3f} dB at {_freq(high.freq_hz)}"))
    gains = [p.gain_db for p in record.points if p.gain_db is not None]
    if gains:
        rows.append(("Gain", f"{min(gains):.3f} to {max(gains):.3f} dB"))
    if info.ambient_k is not None:
        rows.append(("Ambient temperature", f"{info.ambient_k:.2f} K"))
    if info.cold_temperature_k is not None:
        rows.append(("Cold / termination temperature", f"{info.cold_temperature_k:.2f} K"))
    if info.resumed_at:
        rows.append(("Resumed", ", ".join(_when(t) for t in info.resumed_at)))
    for role, identity in sorted(info.identities.items()):
        rows.append((f"Instrument: {role}", _e(identity)))
    if info.versions:
        rows.append(("Software", ", ".join(f"{_e(k)} {_e(v)}"
                                           for k, v in sorted(info.versions.items()))))
    return "<h2>Summary</h2>" + _verdict_banner(record) + _kv_table(rows) + _warnings(record)


def _verdict_banner(record: RunRecord) -> str:
    if not record.verdict:
        return ""
    unit = record.verdict.get("unit", "-")
    counts: dict[str, int] = {}
    for entry in record.verdict.get("points") or []:
        if isinstance(entry, Mapping):
            key = str(entry.get("verdict"))
            counts[key] = counts.get(key, 0) + 1
    detail = ", ".join(f"{n} {_e(k)}" for k, n in sorted(counts.items()))
    return (f'<p><span class="verdict {_verdict_class(unit)}">{_e(str(unit).upper())}</span>'
            + (f" &nbsp; points: {detail}" if detail else "") + "</p>")


def _warnings(record: RunRecord) -> str:
    if not record.warnings:
        return ""
    items = "".join(f"<li>{_e(w)}</li>" for w in record.warnings)
    return f'<div class="warn"><strong>Read with care</strong><ul>{items}</ul></div>'


def _figures(images: Mapping[str, bytes]) -> str:
    if not images:
        return ""
    parts = ["<h2>Figures</h2>"]
    for name, png in images.items():
        data = base64.b64encode(png).decode("ascii")
        caption = FIGURE_CAPTIONS.get(name, name)
        parts.append(f'<figure><img alt="{_e(caption)}" src="data:image/png;base64,{data}">'
                     f"<figcaption>{_e(caption)}</figcaption></figure>")
    return "".join(parts)


def _points(record: RunRecord) -> str:
    if not record.points:
        return "<h2>Points</h2><p>No point was measured.</p>"
    has = {name: any(getattr(p, name) is not None for p in record.points)
           for name in ("gain_db", "u_gain_db", "y_db", "floor_margin_db", "enr_db",
                        "averages", "instrument_time_s")}
    columns: list[tuple[str, bool, Any]] = [
        ("Frequency", True, lambda p, b, v: _freq(p.freq_hz)),
        ("NF (dB)", True, lambda p, b, v: _num(p.nf_db)),
        ("u (dB)", True, lambda p, b, v: _num(p.u_nf_db)),
    ]
    if record.budgets:
        columns.append(("U (dB)", True, lambda p, b, v: _num(b.get("U_expanded_db"))))
    columns += [("Te (K)", True, lambda p, b, v: _num(p.te_k, 1)),
                ("u Te (K)", True, lambda p, b, v: _num(p.u_te_k, 1))]
    optional = [("gain_db", "Gain (dB)", lambda p, b, v: _num(p.gain_db)),
                ("u_gain_db", "u gain (dB)", lambda p, b, v: _num(p.u_gain_db)),
                ("y_db", "Y (dB)", lambda p, b, v: _num(p.y_db)),
                ("floor_margin_db", "Above floor (dB)", lambda p, b, v: _num(p.floor_margin_db, 1)),
                ("enr_db", "ENR (dB)", lambda p, b, v: _num(p.enr_db, 2)),
                ("averages", "Averages", lambda p, b, v: _num(p.averages)),
                ("instrument_time_s", "Time (s)", lambda p, b, v: _num(p.instrument_time_s, 2))]
    columns += [(label, True, cell) for key, label, cell in optional if has[key]]
    if record.verdict:
        columns.append(("Verdict", False, _verdict_cell))
    columns.append(("Flags", False, lambda p, b, v: " ".join(
        f'<span class="flag" title="{_e(FLAG_DESCRIPTIONS.get(f, f.value))}">{_e(f.value)}</span>'
        for f in p.flags)))
    rows = []
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    for point in record.points:
        budget = budgets.get(point.freq_hz) or {}
        verdict = verdicts.get(point.freq_hz) or {}
        rows.append([cell(point, budget, verdict) for _, _, cell in columns])
    table = _table([(label, num) for label, num, _ in columns], rows, css="points")
    return "<h2>Points</h2>" + table + _flag_legend(record)


def _verdict_cell(point: Any, budget: Mapping[str, Any], verdict: Mapping[str, Any]):
    word = verdict.get("verdict", "not judged")
    return _e(word), _verdict_class(word)


def _flag_legend(record: RunRecord) -> str:
    used: dict[PointFlag, int] = {}
    for point in record.points:
        for flag in point.flags:
            used[flag] = used.get(flag, 0) + 1
    if not used:
        return "<p>No point carries a flag.</p>"
    rows = ((f'<span class="flag">{_e(f.value)}</span>', str(n),
             _e(FLAG_DESCRIPTIONS.get(f, f.value))) for f, n in used.items())
    return "<h3>Flags</h3>" + _table([("Flag", False), ("Points", True), ("Meaning", False)],
                                     rows)


def _budgets(record: RunRecord) -> str:
    if not record.budgets:
        return ""
    overview = _table(
        [("Frequency", True), ("Method", False), ("u_c (dB)", True), ("k", True),
         ("U (dB)", True), ("Largest contribution", False)],
        ([_freq(b["freq_hz"]) if isinstance(b.get("freq_hz"), (int, float)) else "-",
          _e(b.get("method", "-")), _num(b.get("u_combined_db")), _sig(b.get("k")),
          _num(b.get("U_expanded_db")), _largest(b)] for b in record.budgets))
    details = "".join(_budget_detail(b) for b in record.budgets)
    return ("<h2>Uncertainty budgets</h2>" + overview
            + "<h3>Contributions per frequency</h3>" + details)


def _contributions(budget: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    return [c for c in budget.get("contributions") or [] if isinstance(c, Mapping)]


def _largest(budget: Mapping[str, Any]) -> str:
    items = [c for c in _contributions(budget) if isinstance(c.get("contribution_db"),
                                                             (int, float))]
    if not items:
        return "-"
    top = max(items, key=lambda c: abs(c["contribution_db"]))
    return f"{_e(top.get('name', '?'))} ({top['contribution_db']:+.4f} dB)"


def _budget_detail(budget: Mapping[str, Any]) -> str:
    freq = budget.get("freq_hz")
    title = _freq(freq) if isinstance(freq, (int, float)) else "-"
    lines = _contributions(budget)
    with_distribution = any("distribution" in c for c in lines)
    headers = [("Input", False), ("Standard uncertainty", True), ("Unit", False),
               ("Sensitivity", True), ("Contribution (dB)", True)]
    if with_distribution:
        headers.insert(3, ("Distribution", False))
    rows = []
    for c in lines:
        value = c.get("contribution_db")
        row = [_e(c.get("name", "?")), _sig(c.get("u")), _e(c.get("unit", "")),
               _sig(c.get("sensitivity")),
               f"{value:+.4f}" if isinstance(value, (int, float)) else "-"]
        if with_distribution:
            row.insert(3, _e(c.get("distribution", "-")))
        rows.append(row)
    omitted = budget.get("omitted") or []
    note = (f"<p>Not included (no data): {', '.join(_e(o) for o in omitted)}.</p>"
            if omitted else "")
    extra = {k: v for k, v in budget.items() if k not in (
        "freq_hz", "contributions", "u_combined_db", "k", "U_expanded_db", "method",
        "omitted") and v is not None}
    tail = render_value(extra) if extra else ""
    return (f"<details><summary>{title}: U = {_num(budget.get('U_expanded_db'))} dB "
            f"(k = {_sig(budget.get('k'))}, {_e(budget.get('method', '-'))})</summary>"
            f"{_table(headers, rows)}{note}{tail}</details>")


def _verdict_section(record: RunRecord) -> str:
    verdict = record.verdict
    if not verdict:
        return ""
    rows = [("Unit verdict", _e(str(verdict.get("unit", "-")).upper()))]
    if verdict.get("rule"):
        rows.append(("Decision rule", _e(verdict["rule"])))
    for note in verdict.get("notes") or []:
        rows.append(("Note", _e(note)))
    parts = ["<h2>Limits and verdict</h2>", _kv_table(rows)]
    limits = [b for b in verdict.get("limits") or [] if isinstance(b, Mapping)]
    if limits:
        parts += ["<h3>Limit bands</h3>", _records_table(limits, depth=1)]
    bands = [b for b in verdict.get("bands") or [] if isinstance(b, Mapping)]
    if bands:
        parts += ["<h3>Per band</h3>", _records_table(
            [{**b, "flatness": _check_text(b["flatness"]) if isinstance(b.get("flatness"),
                                                                        Mapping) else None}
             for b in bands], depth=1)]
    parts.append(_failed_checks(verdict))
    return "".join(parts)


def _check_text(check: Mapping[str, Any]) -> str:
    value, limit, u = check.get("value"), check.get("limit"), check.get("U")
    text = f"{_num(value)} dB vs {check.get('kind', '')} {_num(limit)} dB"
    if isinstance(u, (int, float)):
        text += f" (U {_num(u)} dB)"
    return f"{text}: {check.get('verdict', '-')}"


def _failed_checks(verdict: Mapping[str, Any]) -> str:
    rows = []
    for entry in verdict.get("points") or []:
        if not isinstance(entry, Mapping):
            continue
        for check in entry.get("checks") or []:
            if isinstance(check, Mapping) and check.get("verdict") in ("fail", "indeterminate"):
                word = str(check["verdict"])
                rows.append([
                    _freq(entry["freq_hz"]) if isinstance(entry.get("freq_hz"), (int, float))
                    else "-", _e(check.get("quantity", "-")), _e(check.get("kind", "-")),
                    _num(check.get("limit")), _num(check.get("value")), _num(check.get("U")),
                    _num(check.get("margin_db")), (_e(word), _verdict_class(word)),
                    _e(check.get("note") or "")])
    if not rows:
        return ""
    headers = [("Frequency", True), ("Quantity", False), ("Limit kind", False),
               ("Limit", True), ("Value", True), ("U", True), ("Margin (dB)", True),
               ("Verdict", False), ("Note", False)]
    return "<h3>Checks not passed</h3>" + _table(headers, rows)


def _calibration(record: RunRecord) -> str:
    latest = record.info.calibration or (record.calibrations[-1] if record.calibrations
                                         else None)
    if not latest:
        return ""
    count = len(record.calibrations)
    intro = (f"<p>Calibration data saved {count} time{'s' if count != 1 else ''} during the "
             "run; the latest is shown.</p>" if count > 1 else "")
    entries = latest.get("entries")
    if isinstance(entries, list) and all(isinstance(e, Mapping) for e in entries):
        body = _calibration_entries(entries) if entries else "<p>No calibration entry.</p>"
    else:
        body = render_value(latest)
    return "<h2>Calibration</h2>" + intro + body


def _filter_text(rbw_filter: Any) -> str:
    if not isinstance(rbw_filter, Mapping):
        return "-" if rbw_filter is None else str(rbw_filter)
    kind = str(rbw_filter.get("kind", "-"))
    if rbw_filter.get("poles"):
        return f"{kind}, {rbw_filter['poles']} poles"
    if rbw_filter.get("window"):
        return f"{kind}, {rbw_filter['window']} window"
    return kind


def _calibration_entries(entries: Sequence[Mapping[str, Any]]) -> str:
    """One row per stored calibration (what, when, settings), then all per-frequency rows."""
    headers = [("#", True), ("Kind", False), ("Measured at", False), ("Frequencies", False),
               ("RBW", True), ("Filter", False), ("Detector", False), ("Averaging", False),
               ("Averages", True), ("Atten. (dB)", True), ("Preamp", False),
               ("Cold T (K)", True), ("Time (s)", True)]
    rows, summary = [], []
    for number, entry in enumerate(entries, start=1):
        settings = entry.get("settings") if isinstance(entry.get("settings"), Mapping) else {}
        freqs = [f for f in entry.get("freqs_hz") or [] if isinstance(f, (int, float))]
        span = ("-" if not freqs else _freq(freqs[0]) if len(freqs) == 1 else
                f"{len(freqs)}: {_freq(min(freqs))} to {_freq(max(freqs))}")
        rbw = settings.get("rbw_hz")
        rows.append([str(number), _e(entry.get("kind", "-")), _e(entry.get("measured_at", "-")),
                     span, _freq(rbw) if isinstance(rbw, (int, float)) else "-",
                     _e(_filter_text(settings.get("rbw_filter"))),
                     _e(settings.get("detector", "-")), _e(settings.get("averaging_scale", "-")),
                     _sig(settings.get("averages")), _sig(settings.get("attenuation_db")),
                     _sig(settings.get("preamp")), _num(entry.get("cold_temperature_k"), 2),
                     _num(entry.get("instrument_time_s"), 3)])
        summary += [{"calibration": number, **r} for r in entry.get("summary") or []
                    if isinstance(r, Mapping)]
    html_text = _table(headers, rows)
    if summary:
        summary.sort(key=lambda r: r.get("freq_hz") if isinstance(r.get("freq_hz"),
                                                                   (int, float)) else math.inf)
        html_text += (f"<details><summary>Per-frequency calibration results ({len(summary)} "
                      f"frequencies)</summary>{_records_table(summary, depth=1)}</details>")
    return html_text


def _settings(record: RunRecord) -> str:
    if not record.info.applied_settings:
        return ""
    return ("<h2>Acquisition settings applied</h2>"
            + _records_table(record.info.applied_settings, depth=1))


def _plan_and_notes(record: RunRecord) -> str:
    parts = []
    if record.info.notes:
        parts.append("<h2>Notes</h2>" + render_value(record.info.notes))
    if record.info.plan:
        text = json.dumps(record.info.plan, indent=2, default=str)
        parts.append("<h2>Plan</h2><details><summary>The validated plan of this run</summary>"
                     f"<pre>{_e(text)}</pre></details>")
    return "".join(parts)


def _safety() -> str:
    items = "".join(f"<li>{_e(line)}</li>" for line in SAFETY_NOTE)
    return f'<h2>Bench safety</h2><div class="safety"><ul>{items}</ul></div>'


# ----------------------------------------------------------------------------- entry points


def render_report(record: RunRecord, images: Mapping[str, bytes] | None = None) -> str:
    """The report as one HTML string; ``images`` maps figure file names to PNG bytes."""
    if not isinstance(record, RunRecord):
        raise InputError("record", f"must be a RunRecord (got {type(record).__name__})",
                         fix="load it with noisebench.results.load_run")
    info = record.info
    version = info.versions.get("noisebench", "")
    generated = datetime.now(timezone.utc).isoformat(timespec="seconds")
    title = f"Noise-figure report: {info.dut_id or info.run_id}"
    body = "".join([
        f"<header><h1>{_e(title)}</h1><p>{_e(info.method.value.replace('_', '-'))} method · "
        f"run {_e(info.run_id)} · {_when(info.started_at)}</p></header>",
        _summary(record), _figures(images or {}), _points(record), _verdict_section(record),
        _budgets(record),
        _calibration(record), _settings(record), _plan_and_notes(record), _safety(),
        f"<footer>Generated by noisebench {_e(version)} on {_e(generated)}.</footer>",
    ])
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{_e(title)}</title><style>{STYLE}</style></head>"
            f"<body>{body}</body></html>\n")


def _load_images(plots: Sequence[Path | str] | None, record: RunRecord) -> dict[str, bytes]:
    if plots is None:
        try:
            from noisebench.plots import render_figures
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
            raise InputError("plots", f"cannot read {path}: {exc.strerror or exc}",
                             fix="pass PNG files written by plot_run") from exc
        if not data.startswith(b"\x89PNG\r\n\x1a\n"):
            raise InputError("plots", f"{path} is not a PNG file", fix="pass PNG files")
        images[path.name] = data
    return images


def write_report(record: RunRecord, path: Path, plots: Sequence[Path] | None = None) -> Path:
    """Write the self-contained HTML report; returns its path.

    ``path`` is the HTML file (a folder gets ``report.html`` inside). ``plots`` are PNG files
    to embed (e.g. from :func:`noisebench.plots.plot_run`); ``None`` renders the figures in
    memory, ``[]`` leaves them out.
    """
    path = Path(path)
    if path.is_dir():
        path = path / REPORT_FILE
    text = render_report(record, _load_images(plots, record))
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, text)
    except OSError as exc:
        raise InputError("path", f"cannot write {path}: {exc.strerror or exc}",
                         fix="choose a writable location for the report") from exc
    logger.info("report written to %s (%d kB)", path, len(text) // 1024)
    return path


def render_run(folder: Path) -> Path:
    """Figures and report of a saved run folder (finished or not); returns the report's path.

    What ``noisebench render FOLDER`` does: :func:`~noisebench.results.load_run`, then
    :func:`~noisebench.plots.plot_run` (skipped with a warning without matplotlib), then
    :func:`write_report` to ``<folder>/report.html``.
    """
    from noisebench.plots import plot_run
    from noisebench.results import load_run

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


__all__ = ["SAFETY_NOTE", "render_report", "render_run", "render_value", "write_report"]

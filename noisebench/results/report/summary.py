"""The top of the report: header, "how to read this report", the summary facts with the verdict
banner, and the figures (PNG bytes as ``data:`` URIs with their captions)."""

from __future__ import annotations

import base64
import math
from collections.abc import Mapping
from typing import Any

from noisebench.results.plots import (
    FLAG_MARK_WORDS,
    NARROW_DIR,
    VERDICT_SYMBOL,
    WIDE,
    coverage_text,
    nf_error_bars,
)
from noisebench.results.report.cells import (
    _budget_list,
    _duration,
    _freq,
    _is_number,
    _judged_by_verdict,
    _kv,
    _mapping,
    _nf_margin,
    _range,
    _skipped,
    _t0_k,
    _verdict_class,
    _verdict_word,
    _when,
    verdict_tag,
)
from noisebench.results.store import (
    RunRecord,
    nf_extremes,
)

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


#: The smallest figure text a reader should get without zooming, CSS px (common practice:
#: 9 px is about the smallest type that reads on a screen at arm's length).
MIN_FIGURE_TEXT_PX = 9.0
#: The page's side padding at most, CSS px (report.css: ``clamp(.75rem, 3vw, 2.5rem)``, rem
#: 16 px).
MAX_SIDE_PADDING_PX = 2.5 * 16


def narrow_figure_media() -> str:
    """The media query under which the browser shows the narrow figures instead of the wide.

    The wide figure shown ``w`` px wide has text ``smallest_pt / 72 * w / width_in`` px high;
    it is shown wherever that reaches :data:`MIN_FIGURE_TEXT_PX` (9 px: 778 px of figure, an
    858 px window with the widest padding), the narrow one up to it."""
    shown_px = MIN_FIGURE_TEXT_PX * 72.0 * WIDE.size_in[0] / WIDE.smallest_pt
    return f"(max-width: {math.ceil(shown_px + 2 * MAX_SIDE_PADDING_PX)}px)"


def _figures(images: Mapping[str, bytes]) -> list[dict[str, str]]:
    """Each figure as a ``data:`` URI with its caption, and its narrow rendering (``narrow``,
    empty when there is none) for the browser to show on narrow screens."""

    def uri(png: bytes) -> str:
        return "data:image/png;base64," + base64.b64encode(png).decode("ascii")

    prefix = f"{NARROW_DIR}/"
    return [
        {
            "src": uri(png),
            "narrow": uri(images[prefix + name]) if prefix + name in images else "",
            "caption": FIGURE_CAPTIONS.get(name, name),
        }
        for name, png in images.items()
        if not name.startswith(prefix)
    ]

"""The per-point view: the points table (only the columns the record has data for), the flags
in words, limits and verdict with the checks that did not pass, and a converter run's
frequency plan (RF, LO, IF and image per point)."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from noisebench.results.plots import (
    coverage_text,
)
from noisebench.results.report.cells import (
    Column,
    FlagTags,
    FrequencyColumn,
    Seq,
    Table,
    _budget_list,
    _checks,
    _freq,
    _grid,
    _is_number,
    _kv,
    _nf_margin,
    _num,
    _records_table,
    _sig,
    _table,
    verdict_tag,
)
from noisebench.results.report.summary import RULE_TEXT
from noisebench.results.store import (
    FLAG_DESCRIPTIONS,
    RunRecord,
)
from noisebench.science.point import PointFlag, PointResult

FAILED_CHECKS_SHOWN = 25  # the worst checks not passed, by margin; the points table has all


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

"""How the bench was set up and checked: calibrations (grouped by settings, with their
per-frequency results), the measured-gain pass, the acquisition settings applied, and the run's
remaining notes."""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping, Sequence
from datetime import datetime
from typing import Any

from noisebench.results.report.cells import (
    DETAIL_ROWS_MAX,
    Column,
    FrequencyColumn,
    Table,
    _freq,
    _grid,
    _is_number,
    _kv,
    _mapping,
    _num,
    _number_or,
    _parse_time,
    _range,
    _records_table,
    _sig,
    _skipped,
    _table,
    label,
    value_node,
)
from noisebench.results.store import (
    RunRecord,
)

CALIBRATION_TEXT = {
    "system": "The noise source drives the analyzer directly (no DUT): the hot/cold readings "
    "give the noise temperature of the measurement system, which is removed from "
    "the DUT's readings (second-stage correction).",
    "floor": "The analyzer input is terminated (no DUT): the reading is the analyzer's own "
    "noise floor, which is subtracted from the DUT's reading (second-stage "
    "correction).",
}


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

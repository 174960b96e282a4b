"""Results files of a finished run: `results.json` and `results.csv`."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from noisebench.results.journal import write_atomic
from noisebench.results.records import (
    CSV_BUDGET_COLUMNS,
    CSV_COLUMNS,
    CSV_CONVERSION_COLUMNS,
    CSV_VERDICT_COLUMNS,
    RESULTS_CSV_FILE,
    RESULTS_JSON_FILE,
    RunRecord,
    _sorted_points,
)

# ----------------------------------------------------------------------------- outputs


def write_results(record: RunRecord, folder: Path) -> tuple[Path, Path]:
    """Write ``results.json`` (pydantic) and ``results.csv`` (csv module) atomically."""
    folder = Path(folder)
    json_path, csv_path = folder / RESULTS_JSON_FILE, folder / RESULTS_CSV_FILE
    write_atomic(json_path, record.model_dump_json(indent=2))
    write_atomic(csv_path, results_csv_text(record))
    return json_path, csv_path


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)
    return str(value)


def csv_columns(record: RunRecord) -> list[str]:
    """The columns ``results.csv`` will have for ``record``."""
    columns = list(CSV_COLUMNS)
    if any(p.conversion is not None for p in record.points):
        columns += CSV_CONVERSION_COLUMNS
    if record.budgets:
        columns += CSV_BUDGET_COLUMNS
    if record.verdict and record.verdict.get("points"):
        columns += CSV_VERDICT_COLUMNS
    return columns


def csv_rows(record: RunRecord) -> Iterator[dict[str, str]]:
    """One dict of formatted cells per point, keys as :func:`csv_columns`."""
    columns = csv_columns(record)
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    for point in _sorted_points(record.points):
        row: dict[str, Any] = {name: getattr(point, name, None) for name in CSV_COLUMNS}
        row["flags"] = ";".join(flag.value for flag in point.flags)
        if point.conversion is not None:
            row.update(point.conversion.model_dump(include=set(CSV_CONVERSION_COLUMNS)))
        budget = budgets.get(point.freq_hz) or {}
        row["U_nf_db"] = budget.get("U_expanded_db")
        row["coverage_k"] = budget.get("k")
        row["budget_method"] = budget.get("method")
        verdict = verdicts.get(point.freq_hz) or {}
        row["verdict"] = verdict.get("verdict")
        limit = verdict.get("limit")
        row["limit"] = json.dumps(limit) if isinstance(limit, (dict, list)) else limit
        yield {name: _cell(row.get(name)) for name in columns}


def results_csv_text(record: RunRecord) -> str:
    """The content of ``results.csv``."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=csv_columns(record), lineterminator="\n")
    writer.writeheader()
    writer.writerows(csv_rows(record))
    return buffer.getvalue()

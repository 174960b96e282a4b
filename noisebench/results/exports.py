"""Results files of a finished run: `results.json` and `results.csv`."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from pydantic import BaseModel
from pydantic_core import to_json

from noisebench.results.journal import write_atomic
from noisebench.results.records import (
    CSV_BUDGET_COLUMNS,
    CSV_COLUMNS,
    CSV_CONVERSION_COLUMNS,
    CSV_VERDICT_COLUMNS,
    RESULTS_CSV_FILE,
    RESULTS_JSON_FILE,
    RunRecord,
    StoredSequence,
    _sorted_points,
)

# ----------------------------------------------------------------------------- outputs


def write_results(record: RunRecord, folder: Path) -> tuple[Path, Path]:
    """Write ``results.json`` (pydantic, one item at a time) and ``results.csv`` (csv module,
    one row at a time) atomically; neither file is built whole in memory."""
    folder = Path(folder)
    json_path, csv_path = folder / RESULTS_JSON_FILE, folder / RESULTS_CSV_FILE
    write_atomic(json_path, record_json_pieces(record))
    write_atomic(csv_path, results_csv_pieces(record))
    return json_path, csv_path


# fields that hold plain JSON (validated by ``_jsonable``): streamed container by container
_PLAIN_FIELDS = frozenset(
    {"plan", "applied_settings", "calibration", "notes", "budgets", "verdict", "calibrations"}
)


def record_json_pieces(record: RunRecord) -> Iterator[str]:
    """``results.json`` as text pieces: the JSON document of
    ``record.model_dump_json(indent=2)`` (same keys, order and values) written one point and
    one calibration reading at a time (a 10 001-point run's file is about 55 MB)."""
    return model_json_pieces(record)


def model_json_pieces(model: BaseModel, pad: str = "") -> Iterator[str]:
    """A run model (``RunRecord``, ``RunInfo``) as indented JSON text in pieces."""
    yield "{"
    for index, name in enumerate(type(model).model_fields):
        yield ("," if index else "") + f"\n{pad}  {json.dumps(name)}: "
        value = getattr(model, name)
        if isinstance(value, BaseModel):
            yield from model_json_pieces(value, pad + "  ")
        elif name in _PLAIN_FIELDS:
            yield from _plain_pieces(value, pad + "  ")
        elif (
            isinstance(value, (list, StoredSequence)) and value and isinstance(value[0], BaseModel)
        ):
            inner = f"\n{pad}    "
            for item_index, item in enumerate(value):
                text = item.model_dump_json(indent=2).replace("\n", inner)
                yield ("[" if item_index == 0 else ",") + inner + text
            yield f"\n{pad}  ]"
        else:  # pydantic's own encoding of this one field (dates, enums)
            text = model.model_dump_json(indent=2, include={name})  # '{\n  "name": ...\n}'
            yield text[text.index(": ") + 2 : -2].replace("\n", "\n" + pad)
    yield f"\n{pad}}}"


_LONG_LIST = 32  # a list longer than this is written item by item (see _plain_pieces)


def _large(value: Any) -> bool:
    """Whether ``value`` holds a list longer than ``_LONG_LIST`` (checked no further than
    needed: a long list answers at once)."""
    if isinstance(value, list):
        return len(value) > _LONG_LIST or any(
            _large(v) for v in value if isinstance(v, (dict, list))
        )
    if isinstance(value, dict):
        return any(_large(v) for v in value.values() if isinstance(v, (dict, list)))
    return isinstance(value, StoredSequence)


def _plain_pieces(value: Any, pad: str) -> Iterator[str]:
    """Plain JSON, indented like pydantic's ``indent=2``. Containers that hold a long list
    are written child by child, anything else in one ``pydantic_core.to_json`` (the same text:
    a long sweep's calibration is never one string, and its thousands of small dicts are not
    written leaf by leaf either). Values are finite (``_jsonable`` made them so)."""
    if isinstance(value, StoredSequence) and not (value and isinstance(value[0], (dict, list))):
        value = list(value)  # written item by item below only when its items are containers
    if not _large(value):
        text = to_json(value, indent=2).decode()  # pydantic's own encoder, as in a dump
        yield text.replace("\n", "\n" + pad) if pad else text
    elif isinstance(value, dict) and value:
        yield "{"
        for index, (key, item) in enumerate(value.items()):
            yield ("," if index else "") + f"\n{pad}  {json.dumps(key, ensure_ascii=False)}: "
            yield from _plain_pieces(item, pad + "  ")
        yield f"\n{pad}}}"
    elif isinstance(value, (list, StoredSequence)) and value and isinstance(value[0], (dict, list)):
        for index, item in enumerate(value):
            yield ("[" if index == 0 else ",") + f"\n{pad}  "
            yield from _plain_pieces(item, pad + "  ")
        yield f"\n{pad}]"
    else:
        text = to_json(value, indent=2).decode()  # pydantic's own encoder, as in a dump
        yield text.replace("\n", "\n" + pad) if pad else text


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
    budgets, verdicts = _budget_lookup(record), record.verdicts_by_freq()
    points = record.points  # a run's stored points come sorted, and are read one at a time
    for point in points if isinstance(points, StoredSequence) else _sorted_points(points):
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


class _SortedLookup:
    """``record.budgets_by_freq()`` for stored budgets asked in rising frequency (a run's stored
    points and budgets are both sorted): one pass over the budgets, one held at a time."""

    def __init__(self, budgets: StoredSequence[dict[str, Any]]) -> None:
        self._budgets = iter(budgets)
        self._next = next(self._budgets, None)

    def get(self, freq_hz: float) -> dict[str, Any] | None:
        while self._next is not None:
            key = self._next.get("freq_hz")
            if key is not None and key >= freq_hz:
                return self._next if key == freq_hz else None
            self._next = next(self._budgets, None)  # below this point, or no frequency
        return None


def _budget_lookup(record: RunRecord) -> dict[float, dict[str, Any]] | _SortedLookup:
    if isinstance(record.budgets, StoredSequence) and isinstance(record.points, StoredSequence):
        return _SortedLookup(record.budgets)
    return record.budgets_by_freq()


def results_csv_pieces(record: RunRecord) -> Iterator[str]:
    """The content of ``results.csv``, one row at a time."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=csv_columns(record), lineterminator="\n")
    writer.writeheader()
    for row in csv_rows(record):
        writer.writerow(row)
        yield buffer.getvalue()
        buffer.seek(0)
        buffer.truncate()
    yield buffer.getvalue()


def results_csv_text(record: RunRecord) -> str:
    """The content of ``results.csv``."""
    return "".join(results_csv_pieces(record))

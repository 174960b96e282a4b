"""Unit identities for station mode: a serial with optional lot and part number, typed at a
prompt, read from a list, or scanned as a barcode line."""

from __future__ import annotations

import logging
import re
import unicodedata
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from noisebench.errors import (
    InputError,
)
from noisebench.user_files import MAX_UNIT_LIST_BYTES, read_user_text

logger = logging.getLogger(__name__)

END_WORDS = frozenset({"", "q", "Q"})
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
_KEYS = {"SN": "serial", "LOT": "lot", "PN": "part_number"}
_LINE_ENDINGS = ("\r\n", "\n", "\r")


# =========================================================================== unit names


@dataclass(frozen=True)
class UnitId:
    """One unit: its serial number, and the lot and part number when known."""

    serial: str
    lot: str | None = None
    part_number: str | None = None


def _refuse_control_characters(line: str) -> None:
    for index, ch in enumerate(line):
        if unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp"):
            raise InputError(
                "unit",
                f"control character {ch!r} at position {index} in {line!r}",
                value=line,
                fix="type the serial again; set the scanner to send plain text",
            )


def _checked_name(field: str, value: str, line: str) -> str:
    if not _NAME.fullmatch(value):
        raise InputError(
            field,
            f"{value!r} (in {line!r}) is not a valid {field.replace('_', ' ')}",
            value=value,
            fix="1-64 letters, digits, '.', '_' or '-', starting with a letter or digit",
        )
    return value


def _parse_fields(text: str, line: str) -> dict[str, str]:
    fields: dict[str, str] = {}
    for part in text.split(";"):
        key, sep, value = part.partition(":")
        key, value = key.strip().upper(), value.strip()
        if not sep or not key:
            raise InputError(
                "unit",
                f"field {part!r} of {line!r} is not KEY:VALUE",
                value=line,
                fix="write SN:<serial>;LOT:<lot>;PN:<part number>",
            )
        if key not in _KEYS:
            raise InputError(
                "unit",
                f"unknown key {key!r} in {line!r}",
                value=line,
                fix="keys are SN, LOT and PN",
            )
        name = _KEYS[key]
        if name in fields:
            raise InputError("unit", f"key {key!r} appears twice in {line!r}", value=line)
        fields[name] = _checked_name(name, value, line)
    if "serial" not in fields:
        raise InputError(
            "serial", f"{line!r} has no SN field", value=line, fix="start the line with SN:<serial>"
        )
    return fields


def parse_unit_line(
    line: str, *, lot: str | None = None, part_number: str | None = None
) -> UnitId | None:
    """A unit from one input line, or None for the end of input (empty line or ``q``).

    ``lot`` / ``part_number`` apply when the line does not give them. Raises
    :class:`InputError` (naming the problem) for anything that is not a clean serial or
    ``SN:..;LOT:..;PN:..`` line.
    """
    if not isinstance(line, str):
        raise InputError("unit", f"must be text (got {type(line).__name__})")
    for ending in _LINE_ENDINGS:
        if line.endswith(ending):
            line = line[: -len(ending)]
            break
    _refuse_control_characters(line)
    text = line.strip()
    if text in END_WORDS:
        return None
    if ":" in text or ";" in text:
        fields = _parse_fields(text, line)
    else:
        fields = {"serial": _checked_name("serial", text, line)}
    return UnitId(
        serial=fields["serial"],
        lot=fields.get("lot", lot),
        part_number=fields.get("part_number", part_number),
    )


def units_from_prompt(
    read_line: Callable[[str], str] = input,
    *,
    prompt: str = "unit serial or barcode (empty or q ends): ",
    on_refused: Callable[[str], Any] | None = None,
    lot: str | None = None,
    part_number: str | None = None,
) -> Iterator[UnitId]:
    """Units typed or scanned at a prompt, until an empty line, ``q`` or end of input.

    A refused line is reported through ``on_refused`` (default: the log) and asked again.
    """
    report = on_refused or (lambda text: logger.warning("%s", text))
    while True:
        try:
            line = read_line(prompt)
        except EOFError:
            return
        try:
            unit = parse_unit_line(line, lot=lot, part_number=part_number)
        except InputError as exc:
            report(f"refused: {exc}")
            continue
        if unit is None:
            return
        yield unit


def units_from_lines(
    lines: Iterable[str],
    *,
    lot: str | None = None,
    part_number: str | None = None,
    source: str = "list",
) -> list[UnitId]:
    """Units of a list (a file's lines): all checked before any is measured.

    Blank lines and lines starting with ``#`` are skipped; a ``q`` line ends the list. Every
    bad line is reported in one :class:`InputError` with its line number.
    """
    units: list[UnitId] = []
    problems: list[str] = []
    for number, line in enumerate(lines, start=1):
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        try:
            unit = parse_unit_line(line, lot=lot, part_number=part_number)
        except InputError as exc:
            problems.append(f"line {number}: {exc}")
            continue
        if unit is None:
            break
        units.append(unit)
    if problems:
        raise InputError(
            "units", f"{source}: " + "; ".join(problems), fix="correct the lines named above"
        )
    return units


def units_from_file(
    path: str | Path, *, lot: str | None = None, part_number: str | None = None
) -> list[UnitId]:
    """Units listed in a text file, one serial or barcode line per line."""
    path = Path(path)
    text = read_user_text(path, MAX_UNIT_LIST_BYTES, field="units", what="unit list")
    return units_from_lines(text.splitlines(), lot=lot, part_number=part_number, source=path.name)

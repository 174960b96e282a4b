"""Size limits for the files users hand to noisebench, and the one reader that enforces them.

Every file a user writes or passes (plans, instrument profiles, scenarios, ENR / gain / loss
tables, Touchstone files, unit lists) is checked against a byte limit BEFORE it is read, and
tables against a row limit while they are parsed, so a wrong file (a log, a disc image, a
200 000-row export) gets a one-line error naming the limit instead of minutes of parsing or
an exhausted memory. The limits are generous for real work (common practice, our choice):

- a plan or profile is a page of TOML; 1 MiB leaves room for a 10 001-point ``freqs_hz`` list;
- a table holds at most :data:`MAX_TABLE_ROWS` rows = 100 001, the largest sweep of common
  network analyzers (from memory), so any VNA export fits; CSV at most 16 MiB;
- a Touchstone ``.s2p`` of 100 001 points is about 15 MB; the limit is 64 MiB;
- a unit list of 100 000 serials is a few MB; the limit is 16 MiB.

Like :mod:`noisebench.errors`, this module is shared by every layer and imports nothing else.
"""

from __future__ import annotations

import os
from pathlib import Path

from noisebench.errors import InputError

MIB = 1024 * 1024
MAX_PLAN_BYTES = 1 * MIB
MAX_PROFILE_BYTES = 1 * MIB
MAX_SCENARIO_BYTES = 1 * MIB
MAX_TABLE_BYTES = 16 * MIB
MAX_TABLE_ROWS = 100_001
MAX_TOUCHSTONE_BYTES = 64 * MIB
MAX_UNIT_LIST_BYTES = 16 * MIB
#: How many problems of one file are listed before "... and N more" (the rest are counted).
MAX_PROBLEMS_LISTED = 50


def _size_text(n_bytes: int) -> str:
    if n_bytes >= MIB:
        return f"{n_bytes / MIB:.1f} MiB"
    if n_bytes >= 1024:
        return f"{n_bytes / 1024:.1f} KiB"
    return f"{n_bytes} bytes"


def check_file_size(path: str | Path, max_bytes: int, *, field: str, what: str) -> None:
    """InputError if ``path`` is larger than ``max_bytes`` (limit and size in the message).

    Missing files and folders pass: the reader that follows reports those in its own words.
    """
    try:
        size = os.stat(path).st_size
    except OSError:
        return
    if Path(path).is_file() and size > max_bytes:
        raise InputError(
            field,
            f"{Path(path).name} is {_size_text(size)}, above the {_size_text(max_bytes)} "
            f"limit for a {what}",
            fix=f"pass the {what} itself (is this the right file?) or split it",
        )


def check_text_size(text: str, max_bytes: int, *, field: str, what: str) -> None:
    """InputError if ``text`` (a table given inline) is longer than ``max_bytes`` in UTF-8."""
    if len(text) > max_bytes or len(text.encode("utf-8", "surrogatepass")) > max_bytes:
        raise InputError(
            field,
            f"the {what} text is above the {_size_text(max_bytes)} limit",
            fix=f"shorten the {what}",
        )


def read_user_text(
    path: str | Path, max_bytes: int, *, field: str, what: str, encoding: str = "utf-8"
) -> str:
    """Text of a user file after the size check; every failure is one InputError line.

    ``field`` names the file in messages; ``what`` says what it should be ("plan", "profile").
    A byte-order mark is allowed and removed.
    """
    path = Path(path)
    check_file_size(path, max_bytes, field=field, what=what)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError(field, f"{what} not found: {path}", fix="check the path") from None
    except IsADirectoryError:
        raise InputError(
            field, f"{path} is a folder, not a {what}", fix="name the file itself"
        ) from None
    except OSError as exc:
        raise InputError(field, f"cannot read {path}: {exc.strerror or exc}") from None
    if len(data) > max_bytes:  # the file grew after the check (or stat lied: /proc, a pipe)
        raise InputError(
            field,
            f"{path.name} is above the {_size_text(max_bytes)} limit for a {what}",
            fix=f"pass the {what} itself",
        )
    try:
        return data.decode(encoding).removeprefix("\ufeff")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise InputError(
            field,
            f"is not UTF-8 text (line {line}, byte {exc.start})",
            fix=f"save the {what} as UTF-8",
        ) from None


def check_row_count(rows: int, *, field: str, what: str) -> None:
    """InputError once a table passes :data:`MAX_TABLE_ROWS` rows (called while parsing)."""
    if rows > MAX_TABLE_ROWS:
        raise InputError(
            field,
            f"has more than {MAX_TABLE_ROWS} rows, the limit for a {what}",
            fix="thin the table out (a noise-figure sweep needs far fewer points)",
        )


def safe_path_component(text: str | None, *, default: str = "unit", max_length: int = 64) -> str:
    """``text`` made safe as ONE file-name component (DUT id, serial, test name in a folder name).

    Every character that is not an ASCII letter, digit, ``-``, ``_`` or ``.`` becomes ``_``
    (so ``/``, ``\\``, NUL, control characters and spaces never reach a path), a run of dots is
    never left on its own (``..`` cannot name a parent folder), and the result is cut to
    ``max_length`` characters so that a long name never exceeds the file system's limit.
    """
    cleaned = "".join(
        ch if ch.isascii() and (ch.isalnum() or ch in "-_.") else "_" for ch in text or ""
    )
    cleaned = cleaned[:max_length].strip(".")
    return cleaned or default


def list_problems(problems: list[str], limit: int = MAX_PROBLEMS_LISTED) -> list[str]:
    """The first ``limit`` problems, then one line counting the rest."""
    if len(problems) <= limit:
        return problems
    return [*problems[:limit], f"... and {len(problems) - limit} more problems of the same file"]


__all__ = [
    "MAX_PLAN_BYTES",
    "MAX_PROFILE_BYTES",
    "MAX_SCENARIO_BYTES",
    "MAX_TABLE_BYTES",
    "MAX_TABLE_ROWS",
    "MAX_TOUCHSTONE_BYTES",
    "MAX_UNIT_LIST_BYTES",
    "MAX_PROBLEMS_LISTED",
    "check_file_size",
    "check_text_size",
    "check_row_count",
    "list_problems",
    "read_user_text",
    "safe_path_component",
]

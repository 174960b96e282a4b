"""The one reader for the files of a run folder (``run.json``, ``results.json``, the journal).

Files on disc get damaged: a flipped bit, a copy cut short, an editor saving in another
encoding, a disc that filled up. Every read of a run folder goes through this module, so that
each kind of damage is reported the same way: the file, the line, what is wrong and what to do,
as one :class:`RunFileError` (an :class:`~noisebench.errors.InputError`) line. The callers in
:mod:`noisebench.results.store` then render what is intact and list what they skipped; nothing
here ever writes, so the journal is never touched by reading it.
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import TypeVar

from pydantic import BaseModel, ValidationError

from noisebench.errors import InputError

M = TypeVar("M", bound=BaseModel)

#: Largest run-folder file read into memory. A journal of 100 001 points with full budgets is
#: about 0.3 GB; beyond 2 GiB the file is not ours (common practice, our choice).
MAX_RUN_FILE_BYTES = 2 * 1024**3


class RunFileError(InputError):
    """A file of a run folder cannot be read; ``file`` and ``line`` say where."""

    def __init__(self, path: Path, damage: str, *, line: int | None = None, fix: str) -> None:
        self.path = Path(path)
        self.line = line
        where = self.path.name if line is None else f"{self.path.name} line {line}"
        super().__init__(where, damage, fix=fix, value=str(path))


def _line_of(data: bytes, offset: int) -> int:
    return data.count(b"\n", 0, max(offset, 0)) + 1


def read_bytes(path: Path, *, fix: str) -> bytes:
    """The bytes of a run-folder file (size-checked)."""
    path = Path(path)
    try:
        size = os.stat(path).st_size
    except FileNotFoundError:
        raise RunFileError(path, "is missing", fix=fix) from None
    except OSError as exc:
        raise RunFileError(path, f"cannot be read ({exc.strerror or exc})", fix=fix) from None
    if size > MAX_RUN_FILE_BYTES:
        raise RunFileError(
            path,
            f"is {size / 1024**3:.1f} GiB, above the {MAX_RUN_FILE_BYTES // 1024**3} GiB limit "
            "of a run-folder file",
            fix=fix,
        )
    try:
        return path.read_bytes()
    except IsADirectoryError:
        raise RunFileError(path, "is a folder, not a file", fix=fix) from None
    except OSError as exc:
        raise RunFileError(path, f"cannot be read ({exc.strerror or exc})", fix=fix) from None


def read_text(path: Path, *, fix: str) -> str:
    """The UTF-8 text of a run-folder file; damage names the line and byte."""
    data = read_bytes(path, fix=fix)
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RunFileError(
            path,
            f"is damaged: byte {exc.start} is not UTF-8 text",
            line=_line_of(data, exc.start),
            fix=fix,
        ) from None


def read_model(path: Path, model: type[M], *, fix: str) -> M:
    """``model`` validated from the JSON file ``path``; damage names the line and the problem."""
    text = read_text(path, fix=fix)
    if not text.strip():
        raise RunFileError(path, "is empty (cut short when it was written?)", fix=fix)
    try:
        return model.model_validate_json(text)
    except ValidationError as exc:
        first = exc.errors()[0]
        if first["type"] == "json_invalid":
            found = re.search(r"line (\d+)", first["msg"])
            detail = first.get("ctx", {}).get("error", first["msg"])
            raise RunFileError(
                path,
                f"is damaged: not valid JSON ({detail})",
                line=int(found.group(1)) if found else None,
                fix=fix,
            ) from None
        key = ".".join(str(p) for p in first["loc"]) or "top level"
        more = f" (+{exc.error_count() - 1} more)" if exc.error_count() > 1 else ""
        raise RunFileError(path, f"is damaged: {key}: {first['msg']}{more}", fix=fix) from None


def describe_damage(exc: BaseException) -> str:
    """What is wrong with one journal line, in words (no Python exception names)."""
    if isinstance(exc, UnicodeDecodeError):
        return f"not UTF-8 text (byte {exc.start} of the line)"
    if isinstance(exc, UnicodeEncodeError):
        return "holds a text escape that is not a character (a lone surrogate)"
    if isinstance(exc, RecursionError):
        return "nested too deeply to be ours"
    if isinstance(exc, ValueError) and type(exc).__name__ == "JSONDecodeError":
        return f"not valid JSON ({getattr(exc, 'msg', exc)} at column {getattr(exc, 'colno', '?')})"
    if isinstance(exc, ValidationError):
        first = exc.errors()[0]
        key = ".".join(str(p) for p in first["loc"]) or "entry"
        return f"{key}: {first['msg']}"
    if isinstance(exc, KeyError):
        return f"the entry has no {exc.args[0]!r}"
    return str(exc) or "unreadable"


__all__ = [
    "describe_damage",
    "MAX_RUN_FILE_BYTES",
    "RunFileError",
    "read_bytes",
    "read_model",
    "read_text",
]

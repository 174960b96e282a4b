"""Shared helpers for the small CSV tables users write (ENR, gain and loss tables)."""

from __future__ import annotations

from pathlib import Path

from noisebench.errors import InputError


def read_table_text(
    source: str | Path, name: str | None, *, what: str, text_label: str
) -> tuple[str, str]:
    """``(text, label)`` of a table given as a path or as the table text itself.

    ``source`` holding a line break is taken as the text (``label`` = ``name`` or
    ``text_label``); otherwise it is a UTF-8 file path (``label`` = ``name`` or the file name).
    ``what`` names the table in the not-found message ("ENR table file", "gain/loss table").
    """
    if isinstance(source, str) and ("\n" in source or "\r" in source):
        return source, name or text_label
    path = Path(source)
    label = name or path.name
    try:
        return path.read_text(encoding="utf-8"), label
    except FileNotFoundError:
        raise InputError(label, f"{what} not found: {path}", fix="check the path") from None
    except IsADirectoryError:
        raise InputError(
            label, f"{path} is a folder, not a {what}", fix="name the CSV file itself"
        ) from None
    except UnicodeDecodeError:
        raise InputError(label, "is not UTF-8 text", fix="save the table as UTF-8 CSV") from None
    except OSError as exc:
        raise InputError(label, f"cannot be read: {exc.strerror or exc}") from None

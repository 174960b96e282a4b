"""Shared helpers for the small CSV tables users write (ENR, gain and loss tables)."""

from __future__ import annotations

from pathlib import Path

from noisebench.user_files import MAX_TABLE_BYTES, check_text_size, read_user_text


def read_table_text(
    source: str | Path, name: str | None, *, what: str, text_label: str
) -> tuple[str, str]:
    """``(text, label)`` of a table given as a path or as the table text itself.

    ``source`` holding a line break is taken as the text (``label`` = ``name`` or
    ``text_label``); otherwise it is a UTF-8 file path (``label`` = ``name`` or the file name).
    ``what`` names the table in the not-found message ("ENR table file", "gain/loss table").
    Files and texts above :data:`noisebench.user_files.MAX_TABLE_BYTES` are refused unread.
    """
    if isinstance(source, str) and ("\n" in source or "\r" in source):
        label = name or text_label
        check_text_size(source, MAX_TABLE_BYTES, field=label, what=what)
        return source, label
    path = Path(source)
    label = name or path.name
    text = read_user_text(path, MAX_TABLE_BYTES, field=label, what=what)
    return text, label

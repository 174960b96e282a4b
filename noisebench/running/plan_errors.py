"""Plan problems as one line each: the key path that holds the problem and what is wrong."""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any, TypeGuard

from pydantic import (
    ValidationError,
)

from noisebench.errors import InputError


class PlanError(InputError):
    """A plan with one or more problems; ``problems`` holds one line per problem."""

    def __init__(self, problems: list[str], *, source: str | None = None) -> None:
        self.problems = list(problems)
        self.source = source
        where = f"{source}: " if source else ""
        head = f"{where}{len(self.problems)} problem(s) in the plan"
        super().__init__(
            "plan", head + ": " + "; ".join(self.problems), fix="correct each key named above"
        )


_TYPE_TAGS = {"float", "int", "str", "bool", "none", "list", "dict"}


def _is_branch_tag(part: Any) -> TypeGuard[str]:
    """pydantic adds the union member (``float``, ``literal['bench']``) to an error's location."""
    return isinstance(part, str) and ("[" in part or part in _TYPE_TAGS)


def format_location(loc: tuple[Any, ...]) -> str:
    """('sweep', 'segments', 2, 'rbw_hz') -> 'sweep.segments[2].rbw_hz'."""
    text = ""
    for part in loc:
        if isinstance(part, int):
            text += f"[{part}]"
        elif not _is_branch_tag(part):
            text += ("." if text else "") + str(part)
    return text or "plan"


def _join_field(path: str, field: str) -> str:
    """Attach an InputError's own field to the location pydantic reported."""
    if path == "plan":
        return field
    last = re.split(r"[.\[]", path.rsplit(".", 1)[-1])[0]
    if field == last or field.startswith(last + "["):
        head = path.rsplit(".", 1)[0] if "." in path else ""
        return f"{head}.{field}" if head else field
    return f"{path}.{field}"


def format_validation_error(exc: ValidationError) -> list[str]:
    """One line per problem: ``<key path>: <message>``."""
    lines: list[str] = []
    branches: dict[str, list[str]] = {}
    for err in exc.errors(include_url=False):
        loc = tuple(err.get("loc", ()))
        path = format_location(loc)
        cause = (err.get("ctx") or {}).get("error")
        if isinstance(cause, InputError):
            text = cause.message
            prefix = f"{cause.field}: "
            text = text[len(prefix) :] if text.startswith(prefix) else text
            line = f"{_join_field(path, cause.field)}: {text}"
        elif any(_is_branch_tag(p) for p in loc):
            tag = next(p for p in reversed(loc) if _is_branch_tag(p))
            branches.setdefault(path, [repr(err.get("input"))]).append(_branch_name(tag))
            line = path  # placeholder, merged below
        else:
            line = f"{path}: {_plain_message(err)}"
        if line not in lines:
            lines.append(line)
    for path, (got, *names) in branches.items():
        expected = " or ".join(dict.fromkeys(names))
        lines[lines.index(path)] = f"{path}: must be {expected} (got {got})"
    return lines


def _branch_name(tag: str) -> str:
    if tag.startswith("literal["):
        return tag[len("literal[") : -1].replace(",", " or")
    return {
        "float": "a number",
        "int": "an integer",
        "str": "a text (file name)",
        "bool": "true or false",
    }.get(tag, tag)


def _plain_message(err: Mapping[str, Any]) -> str:
    kind = err.get("type", "")
    ctx = err.get("ctx") or {}
    if kind == "extra_forbidden":
        return "unknown key (check its spelling and section)"
    if kind == "missing":
        return "is required"
    if kind in ("greater_than", "greater_than_equal", "less_than", "less_than_equal"):
        op = {
            "greater_than": ">",
            "greater_than_equal": ">=",
            "less_than": "<",
            "less_than_equal": "<=",
        }[kind]
        bound = next(iter(ctx.values()), "?")
        return f"must be {op} {bound} (got {err.get('input')!r})"
    if kind in ("literal_error", "enum"):
        return f"must be one of {ctx.get('expected', '?')} (got {err.get('input')!r})"
    msg = str(err.get("msg", "invalid"))
    # pydantic prefixes a ValueError raised in a validator with "Value error, "
    for prefix in ("Value error, ", "Assertion failed, "):
        if msg.startswith(prefix):
            msg = msg[len(prefix) :]
    return msg[0].lower() + msg[1:] if msg else "invalid"

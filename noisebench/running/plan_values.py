"""Values a plan takes from outside the file: ``${NAME}`` placeholders in its ``[bench]``
strings (instrument addresses, profiles).

A bench address changes between benches and runs (the SCPI simulator on free ports, a lab's
instrument addresses) while the rest of the plan stays; a placeholder keeps that one value out
of the file:

    analyzer = { resource = "TCPIP0::127.0.0.1::${NOISEBENCH_SIM_PORT:-5025}::SOCKET" }

``${NAME}`` takes the value of ``NAME``: first from the command line (``--define NAME=VALUE``,
passed here as ``defines``), else from the environment; ``${NAME:-default}`` falls back to
``default`` when neither sets it. A name that is set nowhere and has no default is a one-line
problem naming the key and the three ways to give it. ``$$`` is a literal ``$``. Only
``[bench]`` is expanded: measurement settings stay in the plan, where a reader sees them.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from typing import Any

PLACEHOLDER = re.compile(r"\$\$|\$\{([A-Za-z_][A-Za-z0-9_]*)(?::-([^}]*))?\}")
EXPANDED_SECTIONS = ("bench",)
DEFINE_FORM = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)=(.*)$", re.S)


def parse_defines(items: list[str] | None) -> dict[str, str]:
    """``["NAME=VALUE", ...]`` from the command line -> ``{"NAME": "VALUE"}``; ValueError
    naming the bad item."""
    out: dict[str, str] = {}
    for item in items or []:
        match = DEFINE_FORM.match(item)
        if match is None:
            raise ValueError(
                f"{item!r} is not NAME=VALUE (a name of letters, digits and _, e.g. "
                "NOISEBENCH_SIM_PORT=5025)"
            )
        out[match.group(1)] = match.group(2)
    return out


def expand_placeholders(
    data: dict[str, Any],
    defines: Mapping[str, str] | None = None,
    environ: Mapping[str, str] | None = None,
) -> tuple[dict[str, Any], list[str]]:
    """(the plan data with its ``[bench]`` placeholders replaced, problems as
    ``key.path: message (fix)`` lines)."""
    defines = dict(defines or {})
    environ = os.environ if environ is None else environ
    problems: list[str] = []

    def value_of(key: str, match: re.Match[str]) -> str:
        if match.group(0) == "$$":
            return "$"
        name, default = match.group(1), match.group(2)
        if name in defines:
            return defines[name]
        if name in environ:
            return environ[name]
        if default is not None:
            return default
        problems.append(
            f"{key}: ${{{name}}} is not set (give --define {name}=VALUE, set the environment "
            f"variable {name}, or write a default: ${{{name}:-VALUE}})"
        )
        return match.group(0)

    def walk(value: Any, key: str) -> Any:
        if isinstance(value, str):
            return PLACEHOLDER.sub(lambda m: value_of(key, m), value)
        if isinstance(value, dict):
            return {k: walk(v, f"{key}.{k}") for k, v in value.items()}
        if isinstance(value, list):
            return [walk(v, f"{key}[{i}]") for i, v in enumerate(value)]
        return value

    out = dict(data)
    for section in EXPANDED_SECTIONS:
        if section in out:
            out[section] = walk(out[section], section)
    return out, problems

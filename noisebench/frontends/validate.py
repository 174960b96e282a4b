"""``noisebench validate FILE``: recognise what a file is by its content, check it as that.

Kinds: a plan (TOML with ``method``/``bench``/``sweep``), an instrument profile (TOML with
``[profile]``), a simulator scenario (TOML with ``[dut]`` and a ``name`` but no plan keys), an
ENR table (CSV with an ``enr_db`` column), a gain or loss table (CSV with ``gain_db`` or
``loss_db``; Touchstone ``.s2p`` as a gain table). The file name is never part of a problem
line here: the caller prints it once in front.
"""

from __future__ import annotations

import errno
import os
import sys
from collections.abc import Callable
from pathlib import Path

from noisebench.errors import NoisebenchError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

PLAN_KEYS = ("method", "bench", "sweep", "acquisition")
KINDS = ("plan", "profile", "scenario", "ENR table", "gain table", "loss table")


def _first_header(path: Path) -> list[str]:
    """The column names of a CSV table (first line that is not a comment or blank)."""
    text = path.read_text(encoding="utf-8-sig", errors="replace")
    for line in text.splitlines():
        stripped = line.strip()
        if stripped and not stripped.startswith("#"):
            return [c.strip().lower() for c in stripped.split(",")]
    return []


def file_kind(path: Path) -> str:
    """What ``path`` holds, from its content (the suffix only picks TOML, CSV or Touchstone)."""
    suffix = path.suffix.lower()
    if suffix in (".s1p", ".s2p"):
        return "gain table"
    if suffix in (".csv", ".txt", ".tsv"):
        columns = _first_header(path)
        if "enr_db" in columns:
            return "ENR table"
        if "loss_db" in columns:
            return "loss table"
        if "gain_db" in columns:
            return "gain table"
        return "ENR table"  # the most common table: its checker names the missing column
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8-sig"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError):
        return "plan"  # the plan loader words TOML syntax errors with line and column
    if any(key in data for key in PLAN_KEYS):
        return "plan"
    if "profile" in data:
        return "profile"
    if "dut" in data and "name" in data:
        return "scenario"
    return "plan"


def _check_plan(path: Path) -> tuple[str, list[str]]:
    from noisebench.running.plan import load_plan, validate_plan_file

    problems = validate_plan_file(path)
    if problems:
        return "", problems
    plan = load_plan(path)
    return (
        f"{plan.method.value.replace('_', '-')} plan {path.name}, {len(plan.points())} points, "
        f"analyzer {plan.bench.analyzer.resource}",
        [],
    )


def _check_enr(path: Path) -> tuple[str, list[str]]:
    from noisebench.science.enr import EnrTable, validate_enr_file
    from noisebench.units import format_frequency_range

    problems = validate_enr_file(path)
    if problems:
        return "", problems
    table = EnrTable.from_csv(path)
    span = table.range_hz
    where = format_frequency_range(*span) if span else "all frequencies (flat)"
    return f"ENR table {path.name}, {len(table.enr_db)} values, {where}", []


def _check_gain(kind: str) -> Callable[[Path], tuple[str, list[str]]]:
    def check(path: Path) -> tuple[str, list[str]]:
        from noisebench.science.gain_files import load_gain_table
        from noisebench.units import format_frequency_range

        table = load_gain_table(path)
        freqs = list(table.freq_hz)
        where = format_frequency_range(min(freqs), max(freqs)) if freqs else "-"
        return f"{kind} {path.name}, {len(freqs)} values, {where}", []

    return check


def _check_profile(path: Path) -> tuple[str, list[str]]:
    from noisebench.drivers.profile import load_profile

    profile = load_profile(path)
    name = getattr(getattr(profile, "profile", None), "name", None) or path.stem
    return f"instrument profile {name} ({path.name})", []


def _check_scenario(path: Path) -> tuple[str, list[str]]:
    from noisebench.sims.scenario import load_scenario

    scenario = load_scenario(path)
    return f"simulator scenario {scenario.name} ({path.name})", []


CHECKERS: dict[str, Callable[[Path], tuple[str, list[str]]]] = {
    "plan": _check_plan,
    "profile": _check_profile,
    "scenario": _check_scenario,
    "ENR table": _check_enr,
    "gain table": _check_gain("gain table"),
    "loss table": _check_gain("loss table"),
}


def validate_file(path: Path) -> tuple[str, str, list[str]]:
    """``(kind, summary, problems)`` of one file; problems are lines without the file name."""
    path = Path(path)
    if not path.exists():  # worded as `noisebench run` words it (the CLI's OSError line)
        raise FileNotFoundError(errno.ENOENT, os.strerror(errno.ENOENT), str(path))
    kind = "plan" if path.is_dir() else file_kind(path)  # the plan loader words a folder
    try:
        summary, problems = CHECKERS[kind](path)
    except (NoisebenchError, ValueError) as exc:
        summary, problems = "", [_strip_name(str(exc), path)]
    return kind, summary, [_strip_name(p, path) for p in problems]


def _strip_name(line: str, path: Path) -> str:
    """A problem line without a leading ``<file>:`` (the caller prints the name once)."""
    for name in (str(path), path.name):
        for prefix in (f"{name}: ", f"{name} ", f"profile {name}: "):
            if line.startswith(prefix):
                return line[len(prefix) :]
    return line

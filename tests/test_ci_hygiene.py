"""The test suite's own hygiene: reproducible property tests in CI, an inherited environment in
subprocesses, and no short timeouts on normal exchanges (a loaded CI machine is not a fault).

Behaviour tests of the suite itself: no outside reference is involved."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

TESTS = Path(__file__).parent


def _profile_in_a_child(ci_value: str | None) -> str:
    env = dict(os.environ)
    env.pop("CI", None)
    if ci_value is not None:
        env["CI"] = ci_value
    code = (
        "import sys; sys.path.insert(0, 'tests'); import conftest; "
        "from hypothesis import settings; s = settings.default; "
        "print(s.derandomize, s.deadline)"
    )
    return subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        env=env,
        cwd=TESTS.parent,
        timeout=120,
        check=True,
    ).stdout.strip()


def test_ci_loads_the_derandomized_hypothesis_profile():
    assert _profile_in_a_child("true") == "True None"  # same examples every CI run
    assert _profile_in_a_child(None) == "False None"  # developers explore new examples


def test_no_test_uses_a_sub_second_timeout_outside_a_deliberate_fault():
    """A sub-second timeout is allowed only where no reply can come in time (held, never sent,
    nothing listening): everywhere else it races a busy machine. Each allowed one says why in
    a ``# short timeout: ...`` comment on the line before."""
    short = re.compile(r"timeout(_s)?\s*=\s*0\.\d+|settimeout\(0\.\d+\)")
    offenders = []
    for path in sorted(TESTS.glob("test_*.py")):
        lines = path.read_text(encoding="utf-8").splitlines()
        for number, line in enumerate(lines, start=1):
            if not short.search(line):
                continue
            if "# short timeout:" not in lines[number - 2] + line:
                offenders.append(f"{path.name}:{number}: {line.strip()}")
    assert offenders == []


def test_example_identities_use_an_obviously_invented_maker():
    """Examples and docstrings never borrow a maker's name, real or cartoon."""
    root = TESTS.parent
    files = [*root.glob("noisebench/**/*.py"), *root.glob("examples/**/*"), root / "README.md"]
    hits = [
        f"{path.relative_to(root)}"
        for path in files
        if path.is_file()
        # errors="ignore": generated example data (SigMF .sigmf-data recordings) is binary
        and re.search(r"\bACME\b", path.read_text(encoding="utf-8", errors="ignore"), re.I)
    ]
    assert hits == []


def test_readme_lists_exactly_the_cautions_the_tool_prints():
    """One list of bench-safety cautions (noisebench.running.safety.CAUTIONS) everywhere."""
    from noisebench.running.safety import CAUTIONS

    readme = (TESTS.parent / "README.md").read_text(encoding="utf-8")
    section = readme.split("## Safety first", 1)[1].split("\n## ", 1)[0]
    bullets: list[str] = []
    for line in section.splitlines():
        if line.startswith("- "):
            bullets.append(line[2:])
        elif line.startswith("  ") and bullets:
            bullets[-1] += " " + line.strip()
    assert [" ".join(b.split()) for b in bullets] == [" ".join(c.split()) for c in CAUTIONS]


def test_examples_that_can_drive_hardware_point_to_the_cautions():
    root = TESTS.parent
    for name in ("examples/gain_real_bench.toml", "examples/user_tests/conftest.py"):
        text = (root / name).read_text(encoding="utf-8")
        assert "SAFETY" in text and "Safety first" in text and "manuals" in text, name


def test_helper_modules_are_imported_the_way_ci_collects_them():
    """CI runs the bare ``pytest`` command, which puts ``tests/`` (rootdir-relative conftest
    folder) on the path but not the project root: ``from tests._helper import ...`` works
    only under ``python -m pytest`` or a PYTHONPATH and fails collection in CI."""
    package_import = re.compile(r"^\s*(from|import)\s+tests(\.|\s|$)")
    offenders = []
    for path in sorted(TESTS.glob("*.py")):
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
            if package_import.match(line):
                offenders.append(f"{path.name}:{number}: {line.strip()}")
    assert offenders == []

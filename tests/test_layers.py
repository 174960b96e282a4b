"""The layering DEVELOPERS.md describes, checked on the source: the core (science, bench,
running, results) never imports a back end (drivers, sims, sampled) nor reads a simulator
attribute; only the composition root, noisebench.bench.registry, opens back ends."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "noisebench"
CORE = ("science", "bench", "running", "results")
COMPOSITION_ROOT = {PACKAGE / "bench" / "registry.py"}
BACK_ENDS = ("noisebench.sims", "noisebench.drivers")


def _core_files() -> list[Path]:
    files = [p for layer in CORE for p in sorted((PACKAGE / layer).rglob("*.py"))]
    return [p for p in files if p not in COMPOSITION_ROOT]


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_core_module_knows_no_back_end(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module:
            assert not node.module.startswith(BACK_ENDS), f"line {node.lineno}: {node.module}"
        if isinstance(node, ast.Import):
            for alias in node.names:
                assert not alias.name.startswith(BACK_ENDS), f"line {node.lineno}: {alias.name}"
        if isinstance(node, ast.Attribute):
            assert node.attr != "sim", f"line {node.lineno}: reads .sim"


def test_importing_the_core_and_the_package_loads_no_back_end():
    code = (
        "import sys, noisebench, noisebench.running.sequencer, noisebench.running.forecast, "
        "noisebench.running.plan_checks, noisebench.results.report; "
        "print(sorted(m for m in sys.modules if m.startswith(('noisebench.sims', "
        "'noisebench.drivers'))))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_methods_build_their_point_results_in_one_place():
    """Every method returns its PointResult through methods/_common.build_point_result, so the
    shared fields, notes and flags cannot drift apart between methods."""
    builders = {}
    for path in sorted((PACKAGE / "science" / "methods").glob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        calls = [
            node.lineno
            for node in ast.walk(tree)
            if isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id == "PointResult"
        ]
        if calls:
            builders[path.name] = calls
    assert list(builders) == ["_common.py"], builders
    assert len(builders["_common.py"]) == 1

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


# ------------------------------------------------------------------ import cycles -------------


def _module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(tree: ast.AST) -> list[ast.Import | ast.ImportFrom]:
    """Every import statement, at module level or inside functions (lazy imports count: a loop
    through a function-level import is still a loop), except ``if TYPE_CHECKING:`` blocks."""
    found: list[ast.Import | ast.ImportFrom] = []

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import | ast.ImportFrom):
            found.append(node)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(tree)
    return found


def import_graph(root: Path = PACKAGE) -> dict[str, set[str]]:
    """module -> the package modules it imports (``from pkg import name`` counts as importing
    ``pkg.name`` when that is a module)."""
    files = {_module_name(p, root): p for p in sorted(root.rglob("*.py"))}
    graph: dict[str, set[str]] = {}
    for name, path in files.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        deps: set[str] = set()
        for node in _imports(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                base = node.module or ""
                if node.level:
                    anchor = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                    base = f"{anchor}.{base}" if base else anchor
                targets = [
                    f"{base}.{a.name}" if f"{base}.{a.name}" in files else base for a in node.names
                ]
            for target in targets:
                while target and target not in files:
                    target = target.rpartition(".")[0]
                if target and target != name:
                    deps.add(target)
        graph[name] = deps
    return graph


def import_cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan 1972), iteratively."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    cycles: list[list[str]] = []
    for start in graph:
        if start in index:
            continue
        work = [(start, iter(sorted(graph[start])))]
        index[start] = low[start] = len(index)
        stack.append(start)
        on_stack.add(start)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = len(index)
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph.get(child, ())))))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                component = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    component.append(member)
                    if member == node:
                        break
                if len(component) > 1:
                    cycles.append(sorted(component))
    return cycles


def test_the_package_has_no_import_cycle():
    cycles = import_cycles(import_graph())
    assert cycles == [], "import cycles: " + "; ".join(" <-> ".join(c) for c in cycles)


def test_the_cycle_check_finds_a_cycle(tmp_path):
    pkg = tmp_path / "pkg"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "a.py").write_text("from pkg import b\n")
    (pkg / "b.py").write_text("def f():\n    from .a import x\n")
    (pkg / "c.py").write_text(
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from pkg.a import y\n"
    )
    (pkg / "d.py").write_text("import pkg.c\n")
    graph = import_graph(pkg)
    assert graph["pkg.a"] == {"pkg.b"} and graph["pkg.b"] == {"pkg.a"}
    assert graph["pkg.c"] == set() and graph["pkg.d"] == {"pkg.c"}
    assert import_cycles(graph) == [["pkg.a", "pkg.b"]]


LONG_MODULE_LINES = 600


@pytest.mark.parametrize(
    "path", sorted(PACKAGE.rglob("*.py")), ids=lambda p: str(p.relative_to(PACKAGE))
)
def test_a_long_module_says_why_at_its_top(path):
    """A module over 600 lines is split by job, or its docstring has a ``Size:`` paragraph
    giving the reason (DEVELOPERS.md, layout)."""
    text = path.read_text(encoding="utf-8")
    if text.count("\n") <= LONG_MODULE_LINES:
        return
    doc = ast.get_docstring(ast.parse(text)) or ""
    assert "\nSize: " in doc, f"{path.name}: {text.count(chr(10))} lines and no 'Size:' reason"

"""No import circle in trainer/ or service/: every import, at module level or inside a
function, is an edge of the graph, read from the source with ast (nothing is imported)."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("trainer", "service")


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def import_graph() -> dict[str, set[str]]:
    """Module → the project modules it imports (a package import counts as its __init__)."""
    files = {_module_name(p): p for pkg in PACKAGES for p in (ROOT / pkg).rglob("*.py")}
    graph: dict[str, set[str]] = {m: set() for m in files}
    for mod, path in files.items():
        package = mod if path.name == "__init__.py" else mod.rpartition(".")[0]
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                    base = ".".join(anchor + ([base] if base else []))
                # a name that is a submodule is an edge to it; any other name, to the module
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in files else base
                           for a in node.names]
            else:
                continue
            for t in targets:
                while t and t not in files:
                    t = t.rpartition(".")[0]
                if t and t != mod:
                    graph[mod].add(t)
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Every strongly connected component of more than one module (Tarjan 1972)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                found.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_the_graph_sees_imports_inside_functions():
    graph = import_graph()
    assert "trainer.cli" in graph and graph["trainer.cli"]  # the CLI imports lazily


def test_no_import_circle_in_trainer_or_service():
    assert cycles(import_graph()) == []


SHARED_STAGE_MODULES = ("trainer.calibration", "trainer.manifest", "trainer.publish")


def test_solvers_leave_calibration_manifest_and_publish_to_the_job():
    # a solver offers residuals, rows and its manifest section; the job calibrates, writes
    # the manifest and publishes (trainer/job.py), so no solver module imports those stages
    graph = import_graph()
    solver_modules = [m for m in graph if m.startswith(("trainer.exact.", "trainer.nystrom."))]
    assert "trainer.exact.solver" in solver_modules and "trainer.nystrom.solver" in solver_modules
    faults = {m: sorted(graph[m] & set(SHARED_STAGE_MODULES)) for m in solver_modules}
    assert {m: f for m, f in faults.items() if f} == {}
    assert set(SHARED_STAGE_MODULES) <= graph["trainer.job"]


def test_only_the_job_and_its_callers_see_the_train_options():
    # the options become a Plan at the top of the job; deeper stages take the plan's fields
    callers = {"trainer.plan", "trainer.job", "trainer.cli", "trainer.demo"}
    seeing = set()
    for path in (ROOT / "trainer").rglob("*.py"):
        tree = ast.parse(path.read_text(), str(path))
        if any(isinstance(n, ast.Name) and n.id == "TrainOptions" for n in ast.walk(tree)) or \
                any(isinstance(n, ast.alias) and n.name == "TrainOptions"
                    for n in ast.walk(tree)):
            seeing.add(_module_name(path))
    assert seeing <= callers, sorted(seeing - callers)

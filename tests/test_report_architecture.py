"""The report package's modules form a one-way path: no two of them import each other."""

from __future__ import annotations

import ast
from pathlib import Path

import benchrun.report

PACKAGE = Path(benchrun.report.__file__).parent


def _imports() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {}
    for path in PACKAGE.glob("*.py"):
        deps: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module:
                if node.module == "benchrun.report":
                    deps |= {a.name for a in node.names}
                elif node.module.startswith("benchrun.report."):
                    deps.add(node.module.split(".")[2])
            elif isinstance(node, ast.Import):
                deps |= {a.name.split(".")[2] for a in node.names
                         if a.name.startswith("benchrun.report.")}
        graph[path.stem] = deps
    return graph


def test_no_import_cycle_in_the_report_package():
    graph = _imports()
    seen: dict[str, int] = {}

    def visit(node: str, stack: list[str]) -> None:
        state = seen.get(node, 0)
        assert state != 1, "import cycle: " + " -> ".join([*stack, node])
        if state == 2:
            return
        seen[node] = 1
        for dep in sorted(graph.get(node, ())):
            visit(dep, [*stack, node])
        seen[node] = 2

    for module in sorted(graph):
        visit(module, [])


def test_gathering_the_facts_reads_no_files_and_knows_no_layout():
    graph = _imports()
    for module in ("facts", "facts_gather"):
        assert not {d for d in graph[module] if d.startswith(("pages", "verify", "render"))}
    source = (PACKAGE / "facts_gather.py").read_text(encoding="utf-8")
    for call in ("open(", "read_bytes", "read_text", "load_bench", "load_sequence"):
        assert call not in source, call

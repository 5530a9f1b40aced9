"""The package's layers: imports go down the data's path, never up, and no two modules
import each other, directly or through others (at module level or inside functions).

Layers, lowest first: ``errors``, ``cleanup``, ``machine`` and ``rules`` (thresholds); ``inputs`` (configuration, data,
candidates); ``engines``; ``statistics`` (pure functions over arrays); ``records`` (the
result records); ``output`` (summary.json, CSV files, report); ``pipeline`` (runner,
executors, store, batch, recovery, calibration); ``cli``. ``demo``, ``examples`` and
``scaffold`` write invented data or templates and import nothing of the package. The
rule is this project's design (DEVELOPERS.md), not an outside standard.
"""

from __future__ import annotations

import ast
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src"

RANK = {"errors": 0, "cleanup": 0, "machine": 0, "rules": 0, "demo": 0, "examples": 0, "scaffold": 0, "inputs": 1, "engines": 2,
        "statistics": 3, "records": 4, "output": 5, "pipeline": 6, "cli": 7, "": 8}


def _module(path: Path) -> str:
    parts = list(path.relative_to(SRC).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def import_graph() -> dict[str, set[str]]:
    """Module -> the package modules it imports (any import statement, anywhere in it)."""
    modules = {_module(p): p for p in SRC.joinpath("contenders").rglob("*.py")}
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
        found: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text())):
            targets = []
            if isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    up = package.split(".")[: len(package.split(".")) - node.level + 1]
                    base = ".".join(up + ([base] if base else []))
                # "from pkg import mod" depends on pkg.mod; "from mod import name", on mod
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names]
            elif isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            for t in targets:
                while t and t not in modules:   # "pkg.mod.name" -> "pkg.mod"
                    t = t.rpartition(".")[0]
                if t and t != name and t != "contenders":
                    found.add(t)
        graph[name] = found
    return graph


def _layer(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else ""


def test_imports_never_go_up_a_layer():
    graph = import_graph()
    assert len(graph) > 40   # the walk found the package
    upward = sorted(f"{a} -> {b}" for a, bs in graph.items() for b in bs
                    if RANK[_layer(b)] > RANK[_layer(a)])
    assert not upward, "imports that go up a layer:\n" + "\n".join(upward)


def test_no_import_cycles():
    graph = import_graph()
    cycles, state = [], {}

    def visit(node: str, path: list[str]) -> None:
        state[node] = "open"
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == "open":
                cycles.append(" -> ".join(path[path.index(nxt):] + [nxt]))
            elif nxt not in state:
                visit(nxt, path + [nxt])
        state[node] = "done"

    for m in sorted(graph):
        if m not in state:
            visit(m, [m])
    assert not cycles, "import cycles:\n" + "\n".join(cycles)


def test_the_rule_can_fail(tmp_path):
    """The walk sees an upward import and a cycle when there is one (a check of the test)."""
    global SRC
    old = SRC
    try:
        pkg = tmp_path / "contenders"
        for sub in ("statistics", "output", "pipeline"):
            (pkg / sub).mkdir(parents=True)
            (pkg / sub / "__init__.py").write_text("")
        (pkg / "__init__.py").write_text("")
        (pkg / "statistics" / "a.py").write_text("from contenders.output import b\n")
        (pkg / "output" / "b.py").write_text("def f():\n    from ..statistics import a\n")
        for i in range(40):
            (pkg / "pipeline" / f"m{i}.py").write_text("")
        SRC = tmp_path
        graph = import_graph()
        assert graph["contenders.statistics.a"] == {"contenders.output.b"}
        assert graph["contenders.output.b"] == {"contenders.statistics.a"}
        try:
            test_imports_never_go_up_a_layer()
        except AssertionError as exc:
            assert "contenders.statistics.a -> contenders.output.b" in str(exc)
        else:
            raise AssertionError("the upward import was not seen")
        try:
            test_no_import_cycles()
        except AssertionError as exc:
            assert "contenders.output.b -> contenders.statistics.a" in str(exc) or \
                   "contenders.statistics.a -> contenders.output.b" in str(exc)
        else:
            raise AssertionError("the cycle was not seen")
    finally:
        SRC = old

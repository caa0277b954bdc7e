"""The library never imports the command line (the CLI is a thin layer over it)."""

from __future__ import annotations

import ast
from pathlib import Path

import ergodex


def _imported_modules(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def test_no_library_module_imports_the_command_line():
    root = Path(ergodex.__file__).parent
    library = [p for p in root.rglob("*.py") if "cli" not in p.relative_to(root).parts]
    assert any(p.name == "simulation.py" for p in library)
    upward = {
        str(p.relative_to(root)): sorted(
            m for m in _imported_modules(p) if m == "ergodex.cli" or m.startswith("ergodex.cli.")
        )
        for p in library
    }
    assert {k: v for k, v in upward.items() if v} == {}


def _service_import_graph() -> dict[str, set[str]]:
    """Module → the service modules it imports anywhere (lazy imports inside functions too)."""
    root = Path(ergodex.__file__).parent
    modules = {
        "ergodex.service." + p.stem: p for p in (root / "service").glob("*.py") if p.stem[0] != "_"
    }
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        targets: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                # "from ergodex.service import tasks" imports the module tasks
                found = [f"{node.module}.{a.name}" for a in node.names]
                targets.update(t for t in found if t in modules)
                if node.module in modules:
                    targets.add(node.module)
            elif isinstance(node, ast.Import):
                targets.update(a.name for a in node.names if a.name in modules)
        graph[name] = targets - {name}
    return graph


def test_service_modules_import_one_another_without_a_cycle():
    graph = _service_import_graph()
    # the job table sits below both the workers and the tasks they run
    assert "ergodex.service.store" in graph["ergodex.service.tasks"]
    assert "ergodex.service.tasks" in graph["ergodex.service.jobs"]
    done: set[str] = set()

    def visit(name: str, path: tuple[str, ...]) -> None:
        if name in path:
            cycle = path[path.index(name) :] + (name,)
            raise AssertionError("import cycle: " + " -> ".join(cycle))
        if name in done:
            return
        for target in sorted(graph[name]):
            visit(target, (*path, name))
        done.add(name)

    for module in sorted(graph):
        visit(module, ())

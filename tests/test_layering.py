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

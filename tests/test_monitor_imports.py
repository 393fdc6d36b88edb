"""twin.monitor is pure: it imports only the standard library, numpy and itself."""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import twin.monitor

ALLOWED_THIRD_PARTY = {"numpy"}


def _imported_modules(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module)
    return names


def test_monitor_imports_only_stdlib_numpy_and_itself():
    package = Path(twin.monitor.__file__).parent
    files = sorted(package.glob("*.py"))
    assert len(files) >= 4
    for f in files:
        for name in _imported_modules(f):
            top = name.split(".")[0]
            if top == "twin":
                assert name.startswith("twin.monitor"), f"{f.name} imports {name}"
            else:
                ok = top in sys.stdlib_module_names or top in ALLOWED_THIRD_PARTY
                assert ok or top == "__future__", f"{f.name} imports {name}"

"""The rules package imports only the standard library, PyYAML and numpy (DESIGN.md, layers)."""

from __future__ import annotations

import ast
import sys
from pathlib import Path

RULES = Path(__file__).resolve().parents[2] / "rules"
ALLOWED = {"yaml", "numpy", "rules"}


def _imported_roots(path: Path) -> set[str]:
    roots: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            roots |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            roots.add(node.module.split(".")[0])
    return roots


def test_rules_imports_only_stdlib_yaml_numpy() -> None:
    bad = {}
    for path in sorted(RULES.rglob("*.py")):
        extra = {
            r
            for r in _imported_roots(path)
            if r not in ALLOWED and r not in sys.stdlib_module_names
        }
        if extra:
            bad[path.name] = sorted(extra)
    assert bad == {}

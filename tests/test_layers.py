"""Imports point one way only (DESIGN.md, "Layers"): a test walks every module and checks.

    web -> server.services -> {server.store, server.feeds, server.indicators, rules}

The table below is the whole rule: for each layer, which project layers it may import. ``rules``
additionally imports only the standard library, PyYAML and numpy.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("server", "web", "rules", "demo_seed")

ALLOWED: dict[str, set[str]] = {
    "rules": set(),
    "server.indicators": set(),
    "server.config": set(),
    "server.store": set(),
    "server.feeds": {"server.store", "server.config"},
    "server.services": {
        "server.store",
        "server.feeds",
        "server.indicators",
        "server.config",
        "rules",
    },
    "server.scheduler": {"server.services", "server.config"},
    "demo_seed": {"server.services", "server.config"},
    "web": {"server.services", "server.config"},
    "server.cli": {
        "server.services",
        "server.config",
        "server.store",
        "server.feeds",
        "rules",
        "web",
        "demo_seed",
        "server.scheduler",
    },
}
RULES_THIRD_PARTY = {"yaml", "numpy"}
LAYERS = sorted(ALLOWED, key=len, reverse=True)


def layer_of(module: str) -> str | None:
    for layer in LAYERS:
        if module == layer or module.startswith(layer + "."):
            return layer
    return None


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports_of(path: Path) -> list[tuple[int, str]]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.append((node.lineno, node.module))
            found += [(node.lineno, f"{node.module}.{a.name}") for a in node.names]
    return found


def project_modules() -> list[Path]:
    return sorted(p for pkg in PACKAGES for p in (ROOT / pkg).rglob("*.py"))


def violations() -> list[str]:
    bad = []
    for path in project_modules():
        source = module_name(path)
        source_layer = layer_of(source)
        if source_layer is None:
            continue
        for line, target in imports_of(path):
            top = target.split(".")[0]
            target_layer = layer_of(target)
            where = f"{path.relative_to(ROOT)}:{line}: {source} imports {target}"
            if target_layer is None:
                if source_layer == "rules" and top not in PACKAGES:
                    if top not in sys.stdlib_module_names and top not in RULES_THIRD_PARTY:
                        bad.append(f"{where} (rules may use only stdlib, yaml, numpy)")
                continue
            if target_layer == source_layer:
                continue
            if target_layer not in ALLOWED[source_layer]:
                bad.append(f"{where} ({source_layer} may not import {target_layer})")
    return bad


def test_imports_point_one_way() -> None:
    assert violations() == []


def test_layer_table_covers_every_package() -> None:
    unassigned = [
        module_name(p)
        for p in project_modules()
        if layer_of(module_name(p)) is None and module_name(p) not in ("server", "server.cli")
    ]
    assert unassigned == []


@pytest.mark.parametrize(
    ("source", "target", "allowed"),
    [
        pytest.param("web.public", "server.store.reads", False, id="web-to-store"),
        pytest.param("server.indicators.wilson", "server.store", False, id="indicators-to-store"),
        pytest.param("rules.loader", "server.indicators", False, id="rules-to-indicators"),
        pytest.param("server.services.x", "rules.loader", True, id="services-to-rules"),
    ],
)
def test_layer_table_judges_known_arrows(source: str, target: str, allowed: bool) -> None:
    # The checker itself must be able to fail: known-bad arrows are refused by the table.
    assert (layer_of(target) in ALLOWED[layer_of(source)]) is allowed  # type: ignore[index]

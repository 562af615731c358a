"""Imports point one way only (DESIGN.md, "Layers"): a checker walks every module and judges it.

    web -> server.services -> {server.store, server.feeds, server.indicators, rules}

The table :data:`ALLOWED` is the whole rule: for each layer, which project layers it may import.
On top of it:

* ``rules`` imports only the standard library, PyYAML and numpy;
* the pure packages (``rules``, ``server.indicators``) import no I/O library (:data:`IO_MODULES`:
  database drivers and ORMs, sockets, HTTP clients, subprocesses), not even from the standard
  library;
* ``bench`` may import anything of the application (the demo simulator too, to validate methods
  against its known truth), and nothing imports ``bench``;
* ``demo_seed`` is imported only by the CLI (its ``demo`` command and the demo feed file) and
  ``bench``.

Every way of importing counts: ``import a.b``, ``from a import b``, relative imports
(``from ..services import x``, resolved against the module's package), and
``importlib.import_module("...")`` / ``__import__("...")`` with a literal name. A dynamic import
whose name is not a literal cannot be checked and is refused as such.

The checker is tested on small invented source trees (``tmp_path``), so each refusal it must make
is shown to happen, and then run on the real tree.
"""

from __future__ import annotations

import ast
import sys
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("server", "web", "rules", "demo_seed", "bench")

_APP = {
    "rules",
    "server.indicators",
    "server.config",
    "server.store",
    "server.feeds",
    "server.services",
    "server.readmodels",
    "server.scheduler",
    "server.cli",
    "web",
}
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
    # read models (the data behind each page) read through the services and the store;
    # the services never import them
    "server.readmodels": {
        "server.services",
        "server.store",
        "server.feeds",
        "server.indicators",
        "server.config",
        "rules",
    },
    # the leader lease (server/scheduler/lease.py) keeps its own row, ``scheduler_lease``
    "server.scheduler": {"server.services", "server.config", "server.store"},
    "demo_seed": {"server.services", "server.config"},
    "web": {"server.readmodels", "server.services", "server.config"},
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
    # benchmarks drive any part of the application, and validations measure methods against
    # the demo simulator's known truth (bench/effects_validation.py)
    "bench": (_APP - {"bench"}) | {"demo_seed"},
}
RULES_THIRD_PARTY = {"yaml", "numpy"}
PURE_LAYERS = ("rules", "server.indicators")
#: Modules that do I/O; refused in the pure layers (a prefix matches its submodules).
IO_MODULES = (
    # databases and ORMs
    "sqlalchemy",
    "alembic",
    "psycopg",
    "psycopg2",
    "sqlite3",
    "dbm",
    "shelve",
    # sockets and servers
    "socket",
    "socketserver",
    "ssl",
    "select",
    "selectors",
    "asyncio",
    "http.server",
    # HTTP and mail clients
    "httpx",
    "requests",
    "urllib3",
    "aiohttp",
    "urllib.request",
    "http.client",
    "smtplib",
    "ftplib",
    # other processes
    "subprocess",
    "multiprocessing",
)
LAYERS = sorted(ALLOWED, key=len, reverse=True)


# --- the checker ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Imported:
    """One imported name: where, what (absolute dotted name) and how it was written."""

    line: int
    target: str
    how: str  # "import", "from", "relative", "importlib"


def layer_of(module: str) -> str | None:
    for layer in LAYERS:
        if module == layer or module.startswith(layer + "."):
            return layer
    return None


def module_name(path: Path, root: Path = ROOT) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _resolve(package: str, level: int, module: str | None) -> str | None:
    """Absolute name of ``from <level dots><module> import ...`` inside ``package``."""
    parts = package.split(".") if package else []
    if level > len(parts):
        return None  # climbs above the top package: not importable, reported by the caller
    base = parts[: len(parts) - (level - 1)]
    return ".".join(base + ([module] if module else []))


def _literal(node: ast.expr | None) -> str | None:
    return node.value if isinstance(node, ast.Constant) and isinstance(node.value, str) else None


def imports_of(path: Path, module: str) -> list[Imported]:
    """Every name ``path`` (module ``module``) imports, by any of the ways the docstring lists."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found: list[Imported] = []
    importlib_names: set[str] = set()  # names bound to the importlib module
    loader_names: set[str] = {"__import__"}  # names bound to an import function
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                found.append(Imported(node.lineno, alias.name, "import"))
                if alias.name == "importlib":
                    importlib_names.add(alias.asname or "importlib")
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0:
                base, how = node.module, "from"
            else:
                base, how = _resolve(package, node.level, node.module), "relative"
                if base is None:
                    dots = "." * node.level
                    found.append(Imported(node.lineno, f"<{dots}{node.module or ''}>", how))
                    continue
            assert base is not None
            if base:
                found.append(Imported(node.lineno, base, how))
            for alias in node.names:
                if alias.name != "*":
                    found.append(Imported(node.lineno, f"{base}.{alias.name}".strip("."), how))
                if base == "importlib" and alias.name == "import_module":
                    loader_names.add(alias.asname or alias.name)
    for node in ast.walk(tree):
        if not isinstance(node, ast.Call):
            continue
        func = node.func
        is_loader = (isinstance(func, ast.Name) and func.id in loader_names) or (
            isinstance(func, ast.Attribute)
            and func.attr == "import_module"
            and isinstance(func.value, ast.Name)
            and func.value.id in importlib_names
        )
        if not is_loader:
            continue
        name = _literal(node.args[0]) if node.args else None
        if name is not None and name.startswith("."):
            anchor = next((_literal(k.value) for k in node.keywords if k.arg == "package"), None)
            if anchor is None and len(node.args) > 1:
                anchor = _literal(node.args[1])
            level = len(name) - len(name.lstrip("."))
            name = _resolve(anchor or package, level, name.lstrip(".") or None)
        found.append(Imported(node.lineno, name or "<not a literal>", "importlib"))
    return found


def _is_io(target: str) -> bool:
    return any(target == m or target.startswith(m + ".") for m in IO_MODULES)


def project_modules(root: Path = ROOT) -> list[Path]:
    folders = [root / pkg for pkg in PACKAGES if (root / pkg).is_dir()]
    return sorted(p for folder in folders for p in folder.rglob("*.py"))


def violations(root: Path = ROOT) -> list[str]:
    """One line per import that breaks the rules, ``path:line: module imports target (why)``."""
    bad: list[str] = []
    seen: set[tuple[Path, int, str]] = set()  # one line per statement and reason

    def refuse(path: Path, imp: Imported, where: str, why: str) -> None:
        if (path, imp.line, why) not in seen:
            seen.add((path, imp.line, why))
            bad.append(f"{where} ({why})")

    for path in project_modules(root):
        source = module_name(path, root)
        source_layer = layer_of(source)
        if source_layer is None:
            continue
        for imp in imports_of(path, source):
            target = imp.target
            where = f"{path.relative_to(root)}:{imp.line}: {source} imports {target}"
            if target.startswith("<"):
                why = (
                    "a dynamic import the checker cannot follow; use a literal name"
                    if imp.how == "importlib"
                    else "a relative import above the top package"
                )
                refuse(path, imp, where, why)
                continue
            top = target.split(".")[0]
            target_layer = layer_of(target)
            if target_layer is None:
                if source_layer in PURE_LAYERS and _is_io(target):
                    refuse(path, imp, where, f"{source_layer} is pure: no I/O library")
                elif source_layer == "rules" and top not in PACKAGES:
                    if top not in sys.stdlib_module_names and top not in RULES_THIRD_PARTY:
                        refuse(path, imp, where, "rules may use only stdlib, yaml, numpy")
                continue
            if target_layer == source_layer:
                continue
            if target_layer not in ALLOWED[source_layer]:
                refuse(path, imp, where, f"{source_layer} may not import {target_layer}, {imp.how}")
    return bad


# --- the checker on invented trees ------------------------------------------------------------


def _tree(root: Path, files: dict[str, str]) -> Path:
    """Write a small source tree: every listed file plus the ``__init__.py`` of its folders."""
    for rel, text in files.items():
        path = root / rel
        for folder in path.relative_to(root).parents:
            if str(folder) != "." and folder.parts[0] != "bench":
                init = root / folder / "__init__.py"
                init.parent.mkdir(parents=True, exist_ok=True)
                init.touch()
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text), encoding="utf-8")
    return root


REFUSED = [
    pytest.param(
        "server/indicators/growth.py", "from ..services import x\n",
        "server.indicators may not import server.services, relative",
        id="relative-indicators-to-services",
    ),
    pytest.param(
        "server/indicators/growth.py", "from .. import services\n",
        "server.indicators may not import server.services, relative",
        id="relative-parent-package-names-a-layer",
    ),
    pytest.param(
        "rules/__init__.py", "from ..web import app\n",
        "relative import above the top package", id="relative-above-the-top",
    ),
    pytest.param(
        "server/store/reads.py", "from ...web import app\n",
        "relative import above the top package", id="relative-three-dots",
    ),
    pytest.param(
        "server/indicators/poisson.py", "import sqlalchemy\n",
        "server.indicators is pure: no I/O library", id="sqlalchemy-in-indicators",
    ),
    pytest.param(
        "server/indicators/poisson.py", "from sqlalchemy.orm import Session\n",
        "server.indicators is pure: no I/O library", id="sqlalchemy-orm-in-indicators",
    ),
    pytest.param(
        "server/indicators/poisson.py", "import http.client\n",
        "server.indicators is pure: no I/O library", id="http-client-in-indicators",
    ),
    pytest.param(
        "server/indicators/poisson.py", "import subprocess\n",
        "server.indicators is pure: no I/O library", id="subprocess-in-indicators",
    ),
    pytest.param(
        "server/indicators/poisson.py",
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    import httpx\n",
        "server.indicators is pure: no I/O library", id="httpx-under-type-checking",
    ),
    pytest.param(
        "rules/loader.py", "import sqlite3\n",
        "rules is pure: no I/O library", id="sqlite3-in-rules",
    ),
    pytest.param(
        "rules/loader.py", "from urllib.request import urlopen\n",
        "rules is pure: no I/O library", id="urllib-request-in-rules",
    ),
    pytest.param(
        "rules/loader.py", "def f():\n    import socket\n",
        "rules is pure: no I/O library", id="socket-inside-a-function",
    ),
    pytest.param(
        "rules/loader.py", "import scipy\n",
        "rules may use only stdlib, yaml, numpy", id="third-party-in-rules",
    ),
    pytest.param(
        "server/store/reads.py", "import importlib\nm = importlib.import_module('web.app')\n",
        "server.store may not import web, importlib", id="importlib-store-to-web",
    ),
    pytest.param(
        "server/store/reads.py",
        "from importlib import import_module as load\nm = load('web')\n",
        "server.store may not import web, importlib", id="import-module-alias",
    ),
    pytest.param(
        "server/store/reads.py", "import importlib as il\nm = il.import_module('web')\n",
        "server.store may not import web, importlib", id="importlib-alias",
    ),
    pytest.param(
        "server/store/reads.py", "m = __import__('server.services.review')\n",
        "server.store may not import server.services, importlib", id="dunder-import",
    ),
    pytest.param(
        "server/store/reads.py",
        "import importlib\nm = importlib.import_module('..services', package='server.store')\n",
        "server.store may not import server.services, importlib", id="importlib-relative",
    ),
    pytest.param(
        "server/store/reads.py", "import importlib\nm = importlib.import_module(NAME)\n",
        "a dynamic import the checker cannot follow", id="importlib-not-a-literal",
    ),
    pytest.param(
        "server/services/ingest.py", "from server.readmodels.morning import morning_overview\n",
        "server.services may not import server.readmodels", id="services-import-read-models",
    ),
    pytest.param(
        "server/readmodels/pages.py", "import bench.engine\n",
        "server.readmodels may not import bench", id="nothing-imports-bench",
    ),
    pytest.param(
        "web/public.py", "from demo_seed.seed import seed_demo\n",
        "web may not import demo_seed", id="web-imports-demo-seed",
    ),
    pytest.param(
        "web/public.py", "from server.store.reads import x\n",
        "web may not import server.store, from", id="web-to-store",
    ),
    pytest.param(
        "rules/loader.py", "import server.indicators\n",
        "rules may not import server.indicators, import", id="rules-to-indicators",
    ),
]


@pytest.mark.parametrize(("rel", "source", "reason"), REFUSED)
def test_violations_refuse_backward_imports(
    tmp_path: Path, rel: str, source: str, reason: str
) -> None:
    root = _tree(tmp_path, {rel: source, "server/services/x.py": "", "web/app.py": ""})
    found = violations(root)
    assert len(found) == 1, found
    assert found[0].startswith(f"{rel}:")
    assert reason in found[0]


ACCEPTED = [
    pytest.param("server/indicators/growth.py", "from . import _arrays\nfrom ._arrays import f\n",
                 id="relative-within-indicators"),
    pytest.param("server/indicators/__init__.py", "from .growth import rate\n",
                 id="relative-in-package-init"),
    pytest.param("server/services/review.py",
                 "from ..store import models\nfrom .evaluation import y\n",
                 id="relative-services-to-store"),
    pytest.param("rules/loader.py", "import urllib.parse\nimport yaml\nimport numpy as np\n",
                 id="rules-pure-stdlib-yaml-numpy"),
    pytest.param("server/indicators/poisson.py", "from scipy import stats\nimport pandas\n",
                 id="indicators-scipy-pandas"),
    pytest.param("server/services/ingest.py", "import sqlalchemy\nimport httpx\n",
                 id="io-in-services"),
    pytest.param("web/app.py", "import importlib\nm = importlib.import_module('server.services')\n",
                 id="importlib-along-the-arrows"),
    pytest.param("bench/web.py", "import web.app\nfrom server.store import x\nimport rules\n",
                 id="bench-imports-the-app"),
    pytest.param("server/cli/main.py", "from demo_seed.seed import seed_demo\n",
                 id="cli-imports-demo-seed"),
    pytest.param("demo_seed/seed.py", "from server.services.ingest import x\n",
                 id="demo-seed-through-services"),
]


@pytest.mark.parametrize(("rel", "source"), ACCEPTED)
def test_violations_accept_imports_along_the_arrows(tmp_path: Path, rel: str, source: str) -> None:
    root = _tree(tmp_path, {rel: source})
    assert violations(root) == []


def test_imports_of_resolves_relative_imports(tmp_path: Path) -> None:
    root = _tree(tmp_path, {"server/indicators/growth.py": "from ..services.review import x\n"})
    found = imports_of(root / "server/indicators/growth.py", "server.indicators.growth")
    assert [i.target for i in found] == ["server.services.review", "server.services.review.x"]


# --- the real tree ----------------------------------------------------------------------------


def test_imports_point_one_way() -> None:
    assert violations() == []


def test_layer_table_covers_every_package() -> None:
    unassigned = [
        module_name(p) for p in project_modules() if layer_of(module_name(p)) is None
    ]
    assert unassigned == ["server"]


def test_layer_table_allows_nothing_to_import_bench() -> None:
    assert [layer for layer, allowed in ALLOWED.items() if "bench" in allowed] == []


def test_layer_table_allows_only_the_cli_and_bench_to_import_demo_seed() -> None:
    assert [layer for layer, allowed in ALLOWED.items() if "demo_seed" in allowed] == [
        "server.cli", "bench"
    ]

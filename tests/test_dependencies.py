"""Every third-party module the application imports is a declared runtime dependency.

Test-only packages (pytest, hypothesis, statsmodels, playwright) must not be imported by the
application itself: a newcomer installs it with ``pip install -e .`` and nothing more.
"""

from __future__ import annotations

import ast
import re
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("server", "web", "rules", "demo_seed")
# Import name -> distribution name, where they differ.
DISTRIBUTION = {
    "yaml": "pyyaml",
    "pydantic_settings": "pydantic-settings",
    "multipart": "python-multipart",
}
# Installed with a declared dependency and part of its public interface.
BUNDLED = {"starlette": "fastapi"}


def declared() -> set[str]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    names = {re.split(r"[<>=!\[; ]", d, maxsplit=1)[0].lower() for d in project["dependencies"]}
    names |= {
        re.split(r"[<>=!\[; ]", d, maxsplit=1)[0].lower()
        for d in project["optional-dependencies"]["postgres"]
    }
    return names


def imported() -> dict[str, str]:
    found: dict[str, str] = {}
    for package in PACKAGES:
        for path in sorted((ROOT / package).rglob("*.py")):
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                if isinstance(node, ast.Import):
                    names = [a.name for a in node.names]
                elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                    names = [node.module]
                else:
                    continue
                for name in names:
                    top = name.split(".")[0]
                    if top not in sys.stdlib_module_names and top not in PACKAGES:
                        found.setdefault(top, str(path.relative_to(ROOT)))
    return found


def test_application_imports_only_declared_dependencies() -> None:
    deps = declared()
    missing = {
        module: where
        for module, where in imported().items()
        if DISTRIBUTION.get(module, module).replace("_", "-").lower() not in deps
        and BUNDLED.get(module) not in deps
    }
    assert missing == {}

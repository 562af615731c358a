"""Fixtures of the web tests: one seeded demo database per session, copied per module.

Seeding the invented demo county takes a few seconds, so it happens once; modules that change
data (decisions, publications, users) work on their own copy of the file.
"""

from __future__ import annotations

import re
import shutil
from collections.abc import Iterator
from datetime import date
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from demo_seed.seed import DEMO_USERS
from server.config import Settings
from web.app import create_app

DEMO_END = date(2026, 11, 30)
PASSWORDS = {name: password for name, _role, password in DEMO_USERS}
ROLE_USER = {role: name for name, role, _password in DEMO_USERS}


@pytest.fixture(scope="session")
def demo_file(lead_policy_demo_file: Path) -> Path:
    """A demo database file (150 days ending on DEMO_END, the lead policy alone), seeded once
    per test session and shared with the service tests (``tests/conftest.py``)."""
    return lead_policy_demo_file


def copy_demo(demo_file: Path, target: Path) -> Path:
    target.parent.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(demo_file, target)
    return target


def settings_for(path: Path, **overrides: object) -> Settings:
    return Settings(database_url=f"sqlite:///{path}", secret_key="k" * 40, **overrides)  # type: ignore[arg-type]


@pytest.fixture(scope="module")
def demo_app_client(
    demo_file: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[TestClient]:
    """A client on this module's own copy of the demo database."""
    path = copy_demo(demo_file, tmp_path_factory.mktemp("copy") / "demo.db")
    with TestClient(create_app(settings_for(path))) as client:
        yield client


def login(client: TestClient, name: str, password: str | None = None) -> int:
    """Sign ``name`` in on ``client``; returns the status of the login POST."""
    client.cookies.clear()
    form = client.get("/staff/login")
    token = re.search(r'name="login_token" value="([^"]+)"', form.text)
    assert token is not None
    answer = client.post(
        "/staff/login",
        data={"name": name, "password": password or PASSWORDS[name],
              "login_token": token.group(1), "next": "/staff/"},
        follow_redirects=False,
    )
    return answer.status_code


def csrf_of(page_text: str) -> str:
    found = re.search(r'name="csrf" value="([^"]+)"', page_text)
    assert found is not None, "no CSRF field on the page"
    return found.group(1)


def seen_fields(page_text: str, assessment_id: int | str | None = None) -> dict[str, str]:
    """The hidden ``official_tier`` and ``official_decision`` fields of the decision form for
    ``assessment_id`` (the first form when None): what a decision posted from it says it saw."""
    at = page_text.index(f'action="/staff/review/{assessment_id}"' if assessment_id is not None
                         else 'action="/staff/review/')
    form = page_text[at:page_text.index("</form>", at)]
    out = {}
    for name in ("official_tier", "official_decision"):
        found = re.search(rf'name="{name}" value="([^"]+)"', form)
        assert found is not None, f"no {name} field in the form"
        out[name] = found.group(1)
    return out

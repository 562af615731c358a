"""Ended sessions stay ended: a session cookie copied before logout, a role change, disabling or
a new password is refused when replayed (staff pages answer with the login redirect)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from tests.web.conftest import copy_demo, csrf_of, login, settings_for
from web.app import create_app
from web.deps import SESSION_COOKIE

ADMIN = "ines.admin"


@pytest.fixture(scope="module")
def app_client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("sessions") / "demo.db")
    with TestClient(create_app(settings_for(path))) as client:
        yield client


def _signed_in(client: TestClient, name: str, password: str | None = None) -> str:
    """Sign ``name`` in; returns the session cookie."""
    assert login(client, name, password) == 303
    cookie = client.cookies.get(SESSION_COOKIE)
    assert cookie
    return cookie


def _replay(client: TestClient, cookie: str, path: str = "/staff/") -> int:
    """Status of a staff page fetched with nothing but ``cookie``."""
    client.cookies.clear()
    client.cookies.set(SESSION_COOKIE, cookie)
    answer = client.get(path, follow_redirects=False)
    if answer.status_code == 303:
        assert answer.headers["location"].startswith("/staff/login?next=")
    return answer.status_code


def _as_admin(client: TestClient, path: str, data: dict[str, str]) -> None:
    _signed_in(client, ADMIN)
    csrf = csrf_of(client.get("/staff/users").text)
    assert client.post(path, data={"csrf": csrf, **data},
                       follow_redirects=False).status_code == 303


def _add(client: TestClient, name: str, role: str) -> None:
    _as_admin(client, "/staff/users", {"name": name, "role": role, "password": "pass-word-" + name})


def test_session_cookie_replayed_after_logout_is_refused(app_client: TestClient) -> None:
    cookie = _signed_in(app_client, "ada.analyst")
    assert _replay(app_client, cookie) == 200
    csrf = csrf_of(app_client.get("/staff/").text)
    assert app_client.post("/staff/logout", data={"csrf": csrf},
                           follow_redirects=False).status_code == 303
    assert _replay(app_client, cookie) == 303


def test_logout_ends_the_other_sessions_of_the_account(app_client: TestClient) -> None:
    laptop = _signed_in(app_client, "vic.viewer")
    phone = _signed_in(app_client, "vic.viewer")
    assert _replay(app_client, laptop) == 200
    csrf = csrf_of(app_client.get("/staff/").text)
    app_client.post("/staff/logout", data={"csrf": csrf}, follow_redirects=False)
    assert _replay(app_client, laptop) == 303
    assert _replay(app_client, phone) == 303


def test_new_login_after_logout_works(app_client: TestClient) -> None:
    cookie = _signed_in(app_client, "otto.approver")
    csrf = csrf_of(app_client.get("/staff/").text)
    app_client.post("/staff/logout", data={"csrf": csrf}, follow_redirects=False)
    fresh = _signed_in(app_client, "otto.approver")
    assert _replay(app_client, fresh) == 200
    assert _replay(app_client, cookie) == 303


def test_disabled_users_session_is_refused(app_client: TestClient) -> None:
    _add(app_client, "dora.disabled", "viewer")
    cookie = _signed_in(app_client, "dora.disabled", "pass-word-dora.disabled")
    assert _replay(app_client, cookie) == 200
    _as_admin(app_client, "/staff/users/dora.disabled/active", {"active": "no"})
    assert _replay(app_client, cookie) == 303


def test_reenabled_user_does_not_revive_old_session(app_client: TestClient) -> None:
    _add(app_client, "rea.enabled", "viewer")
    cookie = _signed_in(app_client, "rea.enabled", "pass-word-rea.enabled")
    _as_admin(app_client, "/staff/users/rea.enabled/active", {"active": "no"})
    _as_admin(app_client, "/staff/users/rea.enabled/active", {"active": "yes"})
    assert _replay(app_client, cookie) == 303
    assert _replay(app_client, _signed_in(app_client, "rea.enabled",
                                          "pass-word-rea.enabled")) == 200


def test_role_change_ends_the_session(app_client: TestClient) -> None:
    _add(app_client, "rob.role", "analyst")
    cookie = _signed_in(app_client, "rob.role", "pass-word-rob.role")
    _as_admin(app_client, "/staff/users/rob.role/role", {"role": "viewer"})
    assert _replay(app_client, cookie) == 303


def test_new_password_ends_the_session_and_replaces_the_old(app_client: TestClient) -> None:
    _add(app_client, "pia.password", "viewer")
    cookie = _signed_in(app_client, "pia.password", "pass-word-pia.password")
    _as_admin(app_client, "/staff/users/pia.password/password",
              {"password": "another-long-pass"})
    assert _replay(app_client, cookie) == 303
    assert login(app_client, "pia.password", "pass-word-pia.password") == 401
    assert login(app_client, "pia.password", "another-long-pass") == 303


def test_short_new_password_is_refused(app_client: TestClient) -> None:
    _signed_in(app_client, ADMIN)
    csrf = csrf_of(app_client.get("/staff/users").text)
    answer = app_client.post("/staff/users/vic.viewer/password",
                             data={"csrf": csrf, "password": "short"})
    assert answer.status_code == 422
    assert "the password needs at least 10 characters" in answer.text


def test_set_password_refused_for_non_admin(app_client: TestClient) -> None:
    _signed_in(app_client, "otto.approver")
    csrf = csrf_of(app_client.get("/staff/").text)
    answer = app_client.post("/staff/users/vic.viewer/password",
                             data={"csrf": csrf, "password": "a-long-password-1"})
    assert answer.status_code == 403


def test_api_session_replay_after_logout_gets_no_staff_data(app_client: TestClient) -> None:
    """A JSON staff route refuses the replayed cookie too (the login redirect, no data)."""
    cookie = _signed_in(app_client, "ada.analyst")
    csrf = csrf_of(app_client.get("/staff/").text)
    app_client.post("/staff/logout", data={"csrf": csrf}, follow_redirects=False)
    assert _replay(app_client, cookie, "/staff/review") == 303

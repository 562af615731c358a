"""The login limit through the web app: forty wrong passwords posted at once from one address,
then the account's owner from another address.

Threads released by one barrier post the login form together (the app runs each in its worker
thread pool, on its own session and connection). The password hash may run for at most the
limit (5 per name and address in 5 minutes); the others get 429 saying when to try again. The
demo database is this module's own copy.
"""

from __future__ import annotations

import re
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from server.services import auth
from tests.web.conftest import PASSWORDS, copy_demo, login, settings_for
from web.app import create_app

pytestmark = pytest.mark.slow
ADMIN = "ines.admin"  # invented demo account (demo_seed.seed)
STRANGER, OFFICE = ("198.51.100.7", 40000), ("10.1.2.3", 40001)  # documentation addresses


@pytest.fixture(scope="module")
def app_path(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[object]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("login-limit") / "demo.db")
    yield create_app(settings_for(path))


def _form(client: TestClient) -> dict[str, str]:
    token = re.search(r'name="login_token" value="([^"]+)"', client.get("/staff/login").text)
    assert token is not None
    return {"name": ADMIN, "login_token": token.group(1), "next": "/staff/"}


def test_login_forty_wrong_at_once_hash_at_most_five_and_the_owner_still_signs_in(
    app_path: object, monkeypatch: pytest.MonkeyPatch
) -> None:
    hashed: list[str] = []
    lock = threading.Lock()
    real = auth.verify_password

    def counting(password: str, stored: str) -> bool:
        with lock:
            hashed.append(password)
        return real(password, stored)

    monkeypatch.setattr(auth, "verify_password", counting)
    with TestClient(app_path, client=STRANGER) as stranger:  # type: ignore[arg-type]
        form = _form(stranger)
        barrier = threading.Barrier(40)
        codes: list[int] = []
        texts: list[str] = []

        def post(k: int) -> None:
            barrier.wait()
            answer = stranger.post("/staff/login", data={**form, "password": f"guess-{k}"},
                                   follow_redirects=False)
            with lock:
                codes.append(answer.status_code)
                texts.append(answer.text)

        threads = [threading.Thread(target=post, args=(k,)) for k in range(40)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
        assert sorted(set(codes)) == [401, 429] and len(codes) == 40
        assert 1 <= len(hashed) <= 5 and codes.count(401) == len(hashed)
        refused = next(t for c, t in zip(codes, texts, strict=True) if c == 429)
        assert re.search(r"try again in \d+ min \d+ s \(at \d\d:\d\d:\d\d UTC\)", refused)
        # attempts that lost the race while counting may leave room for the rest of the 5;
        # then even the right password from the stranger's address is refused, unchecked
        for k in range(5 - len(hashed)):
            assert stranger.post("/staff/login", data={**_form(stranger),
                                                       "password": f"late-{k}"}).status_code == 401
        answer = stranger.post("/staff/login", data={**_form(stranger),
                                                     "password": PASSWORDS[ADMIN]})
        assert answer.status_code == 429 and len(hashed) == 5
    with TestClient(app_path, client=OFFICE) as office:  # type: ignore[arg-type]
        assert login(office, ADMIN) == 303

"""Error answers: bad parameters give an HTML 422 page naming the parameter, staff errors stay
inside the staff layout with a link back to the area, the JSON API keeps JSON."""

from __future__ import annotations

import html
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from tests.web.conftest import copy_demo, csrf_of, login, settings_for
from web.app import create_app
from web.errors import back_link


@pytest.fixture(scope="module")
def client(demo_app_client: TestClient) -> TestClient:
    assert login(demo_app_client, "ines.admin") == 303
    return demo_app_client


@pytest.mark.parametrize(("url", "name", "expected"), [
    ("/staff/district/D04?start=garbage", "'start'", "YYYY-MM-DD"),
    ("/staff/district/D04/explain?day=2026-13-01", "'day'", "YYYY-MM-DD"),
    ("/staff/?page=0", "'page'", "greater than or equal to 1"),
])
def test_bad_query_parameter_gets_an_html_page_naming_it(
    client: TestClient, url: str, name: str, expected: str
) -> None:
    answer = client.get(url)
    assert answer.status_code == 422
    assert answer.headers["content-type"].startswith("text/html")
    message = html.unescape(answer.text.split('class="error-message"', 1)[1].split("</p>")[0])
    assert f"query parameter {name}" in message
    assert expected in message
    assert 'class="staff"' in answer.text  # the staff layout, not the public one


def test_api_validation_error_stays_json(client: TestClient) -> None:
    answer = client.get("/api/public/districts/D01", params={"x": "1"})
    assert answer.status_code == 200  # sanity: the route exists
    pushed = client.post("/api/feeds/demo-county/push", content=b"x",
                         headers={"authorization": "Bearer nope"})
    assert pushed.headers["content-type"].startswith("application/json")


def test_api_route_with_bad_parameter_answers_json_422() -> None:
    from fastapi import FastAPI

    from web.errors import install_error_handlers

    app = FastAPI()
    install_error_handlers(app)

    @app.get("/api/thing")
    def thing(n: int) -> dict[str, int]:
        return {"n": n}

    answer = TestClient(app).get("/api/thing?n=abc")
    assert answer.status_code == 422
    assert answer.json()["detail"][0]["loc"] == ["query", "n"]


def test_staff_form_error_renders_in_staff_layout_with_link_back(client: TestClient) -> None:
    page = client.get("/staff/users")
    answer = client.post("/staff/users", data={"csrf": csrf_of(page.text), "name": "x",
                                               "role": "viewer", "password": "long-enough-1"})
    assert answer.status_code == 422
    assert "at least 2 characters" in answer.text
    assert 'class="staff"' in answer.text
    assert '<a href="/staff/users">Back to Users</a>' in answer.text
    assert "Back to the start page" not in answer.text
    assert "/language?lang=" not in answer.text  # no public language switch


def test_public_error_keeps_public_layout(client: TestClient) -> None:
    answer = client.get("/district/NOPE")
    assert answer.status_code == 404
    assert 'class="staff"' not in answer.text
    assert 'href="/">' in answer.text


@pytest.mark.parametrize(("path", "target"), [
    ("/staff/users/tess/role", "/staff/users"),
    ("/staff/policies/draft", "/staff/policies"),
    ("/staff/policies/backtests/abc", "/staff/policies"),
    ("/staff/review/12", "/staff/review"),
    ("/staff/district/D04/explain", "/staff/district/D04"),
    ("/staff/publish", "/staff/"),
    ("/staff/", "/staff/"),
    ("/district/D01", "/"),
])
def test_back_link_goes_to_the_area(path: str, target: str) -> None:
    assert back_link(path)[0] == target



def test_a_feed_file_broken_while_serving_gives_a_page_naming_it(
    demo_file: Path, tmp_path: Path
) -> None:
    feeds = tmp_path / "feeds.yaml"
    feeds.write_text(
        "feeds:\n  - name: long-csv\n    source: {kind: push}\n    measures: [cases]\n"
    )
    db = copy_demo(demo_file, tmp_path / "demo.db")
    with TestClient(create_app(settings_for(db, feeds_file=feeds))) as client:
        login(client, "ada.analyst")
        assert client.get("/staff/feeds").status_code == 200
        feeds.write_text("feeds:\n  - name: long-csv\n    source: {kind: nowhere}\n")
        answer = client.get("/staff/")
    assert answer.status_code == 503
    assert "The feed definition file is invalid" in html.unescape(answer.text)
    assert "feeds.yaml" in answer.text

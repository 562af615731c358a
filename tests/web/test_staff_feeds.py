"""The staff Feeds page: upload form by role, the remembered feed, receipts, rejected rows."""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from demo_seed.feeds import DEMO_FEEDS_FILE
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web.app import create_app


@pytest.fixture(scope="module")
def client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("feeds") / "demo.db")
    with TestClient(create_app(settings_for(path, feeds_file=DEMO_FEEDS_FILE))) as c:
        yield c


def selected_feed(page: str) -> str | None:
    found = re.search(r'<option value="([^"]+)" selected>', page)
    return found.group(1) if found else None


def upload(client: TestClient, content: bytes, feed: str = "long-csv", name: str = "w.csv"):  # type: ignore[no-untyped-def]
    csrf = csrf_of(client.get("/staff/feeds").text)
    return client.post("/staff/feeds/upload", data={"csrf": csrf, "feed": feed},
                       files={"file": (name, content, "text/csv")})


def test_viewer_sees_who_can_upload_instead_of_the_form(client: TestClient) -> None:
    login(client, ROLE_USER["viewer"])
    page = client.get("/staff/feeds").text
    assert 'action="/staff/feeds/upload"' not in page
    assert "Uploading a file needs the analyst role or a higher one" in page


def test_upload_form_defaults_to_the_push_feed_and_keeps_the_choice(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    assert selected_feed(client.get("/staff/feeds").text) == "long-csv"
    assert selected_feed(client.get("/staff/feeds?upload=gp-sentinel").text) == "gp-sentinel"
    assert selected_feed(client.get("/staff/feeds?upload=nonesuch").text) == "long-csv"


def test_receipt_is_singular_and_links_back_to_the_same_feed(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    answer = upload(client, b"region,date,measure,value\nD13,2026-11-20,cases,29\n"
                            b"D99,2026-11-20,cases,1\n", name="one-good.csv")
    assert answer.status_code == 200
    text = re.sub(r"\s+", " ", answer.text)
    assert "<strong>1</strong> row accepted, <strong>1</strong> rejected" in text
    assert 'href="/staff/feeds?upload=long-csv"' in text
    again = upload(client, b"region,date,measure,value\nD13,2026-11-20,cases,29\n"
                           b"D99,2026-11-20,cases,1\n", name="one-good.csv")
    assert "identical to vintage" in again.text
    page = client.get("/staff/feeds?feed=long-csv").text
    assert "<td>one-good.csv</td><td>ada.analyst</td>" in page


def test_rejected_header_only_upload_shows_the_reason_and_the_last_error(
    client: TestClient,
) -> None:
    login(client, ROLE_USER["analyst"])
    answer = upload(client, b"region,date,measure,value\n", name="h.csv")
    assert answer.status_code == 422 and "no data rows" in answer.text
    page = client.get("/staff/feeds").text
    row = re.search(r'<a href="/staff/feeds\?feed=long-csv">.*?</tr>', page, re.S)
    assert row is not None and "no data rows" in row.group(0)
    assert "<strong>attention</strong>" in row.group(0)

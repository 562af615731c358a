"""The upload form asks before revising values another feed sent, and its receipt lists every
value revised; the Feeds page counts the rejected share (issue 16, item 3). Invented values."""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from demo_seed.feeds import DEMO_FEEDS_FILE
from server.store.models import Observation, Vintage
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web import held_uploads
from web.app import create_app

pytestmark = pytest.mark.slow


@pytest.fixture()
def client(demo_file: Path, tmp_path: Path) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path / "demo.db")
    with TestClient(create_app(settings_for(path, feeds_file=DEMO_FEEDS_FILE))) as c:
        login(c, ROLE_USER["analyst"])
        yield c


def _upload(client: TestClient, content: bytes):  # type: ignore[no-untyped-def]
    csrf = csrf_of(client.get("/staff/feeds").text)
    return client.post("/staff/feeds/upload", data={"csrf": csrf, "feed": "long-csv"},
                       files={"file": ("hand.csv", content, "text/csv")})


def _stored(client: TestClient) -> tuple[int, int]:
    with client.app.state.database.sessions() as s:  # type: ignore[attr-defined]
        return (int(s.scalar(select(func.count()).select_from(Vintage)) or 0),
                int(s.scalar(select(func.count()).select_from(Observation)) or 0))


def _hidden(page: str, name: str) -> str:
    found = re.search(rf'name="{name}" value="([^"]*)"', page)
    assert found is not None, name
    return found.group(1)


def test_upload_over_another_feeds_value_asks_then_lands_on_confirmation(
    client: TestClient,
) -> None:
    before = _stored(client)
    asked = _upload(client, b"region,date,measure,value\nD01,2026-11-29,tests,4321\n")
    assert asked.status_code == 409
    text = re.sub(r"\s+", " ", asked.text)
    assert "Nothing was stored yet." in text
    assert "This file would revise 1 value sent by another feed" in text
    # the row of the revision: region, measure, date, old -> new, who sent the old one
    # the demo's tests arrive through lab-drop (demo_seed/feeds.yaml); long-csv takes them too
    row = re.search(r'<tr class="other-feed"><td>D01</td><td>tests</td><td>2026-11-29</td>'
                    r'<td class="num">(\d+)</td><td class="num">4321</td>'
                    r"<td><strong>lab-drop</strong>", text)
    assert row is not None, text
    assert _stored(client) == before
    token = _hidden(asked.text, "held")
    assert (held_uploads.folder() / f"{token}.bin").exists()
    landed = client.post("/staff/feeds/upload", data={
        "csrf": _hidden(asked.text, "csrf"), "feed": "long-csv", "held": token,
        "confirmed": _hidden(asked.text, "confirmed")})
    assert landed.status_code == 200
    text = re.sub(r"\s+", " ", landed.text)
    assert "This vintage replaces 1 stored value as the current one (1 sent by another feed)." \
        in text
    assert f'<td class="num">{row.group(1)}</td><td class="num">4321</td>' in text
    assert _stored(client) == (before[0] + 1, before[1] + 1)
    assert not (held_uploads.folder() / f"{token}.bin").exists()


def test_a_held_upload_is_only_for_its_uploader(client: TestClient) -> None:
    asked = _upload(client, b"region,date,measure,value\nD02,2026-11-29,tests,3210\n")
    token, digest = _hidden(asked.text, "held"), _hidden(asked.text, "confirmed")
    before = _stored(client)
    login(client, ROLE_USER["admin"])
    csrf = csrf_of(client.get("/staff/feeds").text)
    answer = client.post("/staff/feeds/upload", data={
        "csrf": csrf, "feed": "long-csv", "held": token, "confirmed": digest})
    assert answer.status_code == 422
    assert "made by another account" in answer.text
    assert _stored(client) == before


def test_feeds_page_flags_a_delivery_with_most_rows_rejected(client: TestClient) -> None:
    rows = ["region,date,measure,value", "D05,2026-12-01,cases,4"]
    rows += [f"D99,2026-12-01,cases,{k}" for k in range(9)]  # unknown region: 9 of 10 rejected
    answer = _upload(client, ("\n".join(rows) + "\n").encode())
    assert answer.status_code == 200
    page = re.sub(r"\s+", " ", client.get("/staff/feeds").text)
    line = page[page.index('href="/staff/feeds?feed=long-csv"'):]
    line = line[:line.index("</tr>")]
    assert "<strong>attention</strong>" in line
    assert "<strong>90 %</strong>" in line

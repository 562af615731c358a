"""The staff Feeds page: upload form by role, the remembered feed, receipts, rejected rows."""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from demo_seed.feeds import DEMO_FEEDS_FILE
from server.store.models import Vintage
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
    # a day after the demo's data (2026-11-30): nothing stored to revise, so nothing to confirm
    answer = upload(client, b"region,date,measure,value\nD13,2026-12-01,cases,29\n"
                            b"D99,2026-12-01,cases,1\n", name="one-good.csv")
    assert answer.status_code == 200
    text = re.sub(r"\s+", " ", answer.text)
    assert "<strong>1</strong> row accepted, <strong>1</strong> rejected" in text
    assert 'href="/staff/feeds?upload=long-csv"' in text
    again = upload(client, b"region,date,measure,value\nD13,2026-12-01,cases,29\n"
                           b"D99,2026-12-01,cases,1\n", name="one-good.csv")
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


@pytest.fixture(scope="module")
def small_cap(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    """A client whose upload limit is 2 000 bytes."""
    path = copy_demo(demo_file, tmp_path_factory.mktemp("cap") / "demo.db")
    settings = settings_for(path, feeds_file=DEMO_FEEDS_FILE, upload_max_bytes=2000)
    with TestClient(create_app(settings)) as c:
        yield c


def _vintages(client: TestClient) -> int:
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        return int(session.scalar(select(func.count()).select_from(Vintage)) or 0)


def test_upload_over_the_limit_is_413_and_stores_nothing(small_cap: TestClient) -> None:
    login(small_cap, ROLE_USER["analyst"])
    before = _vintages(small_cap)
    rows = "".join(f"D13,2026-11-{d:02d},cases,{d}\n" for d in range(1, 29)) * 4
    body = ("region,date,measure,value\n" + rows).encode()
    assert len(body) > 2000
    answer = upload(small_cap, body, name="big.csv")
    assert answer.status_code == 413
    assert "over the limit of 2,000 bytes" in answer.text
    assert _vintages(small_cap) == before


def test_upload_without_a_length_is_cut_off_at_the_limit(small_cap: TestClient) -> None:
    """A chunked body (no Content-Length) is refused once 2 000 bytes have arrived."""
    login(small_cap, ROLE_USER["analyst"])
    csrf = csrf_of(small_cap.get("/staff/feeds").text)
    boundary = "tw-boundary"
    head = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"csrf\"\r\n\r\n{csrf}\r\n"
            f"--{boundary}\r\nContent-Disposition: form-data; name=\"feed\"\r\n\r\nlong-csv\r\n"
            f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
            f"filename=\"big.csv\"\r\nContent-Type: text/csv\r\n\r\n"
            "region,date,measure,value\n").encode()
    sent: list[int] = []

    def chunks() -> Iterator[bytes]:
        yield head
        for _ in range(1000):  # up to 1 MB, far past the limit
            sent.append(1)
            yield b"D13,2026-11-01,cases,1\n" * 40
        yield f"\r\n--{boundary}--\r\n".encode()

    before = _vintages(small_cap)
    answer = small_cap.post("/staff/feeds/upload", content=chunks(),
                            headers={"Content-Type": f"multipart/form-data; boundary={boundary}"})
    assert answer.status_code == 413, answer.text[-3000:]
    assert _vintages(small_cap) == before


def test_upload_within_the_limit_is_read_from_the_spooled_file(small_cap: TestClient) -> None:
    login(small_cap, ROLE_USER["analyst"])
    answer = upload(small_cap, b"region,date,measure,value\nD13,2026-12-02,cases,17\n",
                    name="small.csv")  # after the demo's data: nothing to revise or confirm
    assert answer.status_code == 200
    assert "<strong>1</strong> row accepted" in re.sub(r"\s+", " ", answer.text)

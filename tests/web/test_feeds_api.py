"""The push endpoint: missing token, wrong token (401), wrong feed (404), too large (413),
a good push."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import anyio
import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from server.config import Settings
from server.feeds.definition import FeedDefinition, HttpSource, MeasureMap, PushSource
from server.services.database import Database
from server.services.feed_push import issue_token
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
from server.store.models import Vintage
from web import feeds_api
from web.app import create_app

FEEDS = """
feeds:
  - name: long-csv
    source: {kind: push}
    measures: [cases]
  - name: pulled
    source: {kind: http, url: "http://127.0.0.1:9/x.csv"}
    measures: [cases]
"""
GOOD = b"region,date,measure,value\nMA,2026-03-01,cases,3\nMZ,2026-03-01,cases,1\n"


@pytest.fixture(scope="module")
def client_and_token(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[TestClient, str]]:
    folder: Path = tmp_path_factory.mktemp("push")
    (folder / "feeds.yaml").write_text(FEEDS)
    settings = Settings(database_url=f"sqlite:///{folder / 'p.db'}", secret_key="k" * 32,
                        feeds_file=folder / "feeds.yaml")
    db = Database.from_settings(settings)
    db.upgrade()
    with db.transaction() as session:
        store_regions(session=session, actor="t", source="t", records=[RegionRecord(
            code="MA", name="Marrowby", level="district", parent=None, population=100)])
        define_measures(session=session, measures=[
            MeasureRecord(name="cases", unit="n", kind="count", aggregation="sum")])
        token = issue_token(session=session, feed="long-csv", actor="test")
    with TestClient(create_app(settings, database=db)) as client:
        yield client, token
    db.dispose()


def test_push_without_token_is_401(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, _ = client_and_token
    response = client.post("/api/feeds/long-csv/push", content=GOOD)
    assert (response.status_code, response.json()["detail"]) == (
        401, "missing bearer token for feed 'long-csv'")


def test_push_wrong_token_is_401(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, _ = client_and_token
    response = client.post("/api/feeds/long-csv/push", content=GOOD,
                           headers={"Authorization": "Bearer nope"})
    assert response.status_code == 401


def test_push_unknown_feed_is_404(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, token = client_and_token
    response = client.post("/api/feeds/no-such-feed/push", content=GOOD,
                           headers={"Authorization": f"Bearer {token}"})
    assert response.status_code == 404


def test_push_to_pulled_feed_is_422(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, token = client_and_token
    response = client.post("/api/feeds/pulled/push", content=GOOD,
                           headers={"Authorization": f"Bearer {token}"})
    assert response.status_code == 422


def test_push_good_file_answers_with_receipt(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, token = client_and_token
    response = client.post("/api/feeds/long-csv/push", content=GOOD,
                           headers={"Authorization": f"Bearer {token}",
                                    "Content-Type": "text/csv"})
    body = response.json()
    assert response.status_code == 201
    assert (body["rows_accepted"], body["rows_rejected"]) == (1, 1)
    assert body["rejected"] == [{"line": 3, "reason": "unknown_region",
                                 "message": "unknown region code 'MZ'"}]
    assert isinstance(body["vintage_id"], int)


def test_push_json_records(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, token = client_and_token
    response = client.post(
        "/api/feeds/long-csv/push", headers={"Authorization": f"Bearer {token}"},
        json=[{"region": "MA", "date": "2026-03-02", "measure": "cases", "value": 2}])
    assert (response.status_code, response.json()["rows_accepted"]) == (201, 1)


def test_push_header_without_value_is_422(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, token = client_and_token
    response = client.post("/api/feeds/long-csv/push", content=b"region,date,measure\n",
                           headers={"Authorization": f"Bearer {token}"})
    assert response.status_code == 422
    assert "header lacks column(s) ['value']" in response.json()["detail"]


def _raw_push(app: FastAPI, headers: list[tuple[bytes, bytes]], body: bytes) -> tuple[int, int]:
    """POST ``body`` straight through ASGI; returns (status, times the app asked for the body)."""
    asked = 0
    sent: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        nonlocal asked
        asked += 1
        if asked == 1:
            return {"type": "http.request", "body": body, "more_body": False}
        return {"type": "http.disconnect"}

    async def send(message: dict[str, Any]) -> None:
        sent.append(message)

    scope = {
        "type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST",
        "scheme": "http", "path": "/api/feeds/long-csv/push",
        "raw_path": b"/api/feeds/long-csv/push", "root_path": "", "query_string": b"",
        "headers": [(b"host", b"testserver"), *headers], "client": ("127.0.0.1", 50000),
        "server": ("testserver", 80), "state": {},
    }
    anyio.run(app, scope, receive, send)
    start = next(m for m in sent if m["type"] == "http.response.start")
    return start["status"], asked


def _vintages(client: TestClient) -> int:
    with client.app.state.database.sessions() as session:  # type: ignore[attr-defined]
        return int(session.scalar(select(func.count()).select_from(Vintage)) or 0)


def test_push_with_wrong_token_is_401_before_the_body_is_read(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, _ = client_and_token
    status, asked = _raw_push(
        client.app, [(b"authorization", b"Bearer nope"), (b"content-type", b"text/csv"),
                     (b"content-length", str(len(GOOD)).encode())], GOOD)
    assert (status, asked) == (401, 0)


def test_push_with_good_token_reads_the_body(client_and_token) -> None:  # type: ignore[no-untyped-def]
    client, token = client_and_token
    body = b"region,date,measure,value\nMA,2026-04-01,cases,5\n"
    status, asked = _raw_push(
        client.app, [(b"authorization", f"Bearer {token}".encode()),
                     (b"content-type", b"text/csv"),
                     (b"content-length", str(len(body)).encode())], body)
    assert status == 201
    assert asked >= 1


def test_push_declaring_too_large_a_body_is_413_before_reading(  # type: ignore[no-untyped-def]
    client_and_token, monkeypatch: pytest.MonkeyPatch
) -> None:
    client, token = client_and_token
    monkeypatch.setattr(feeds_api, "MAX_PUSH_BYTES", len(GOOD) - 1)
    status, asked = _raw_push(
        client.app, [(b"authorization", f"Bearer {token}".encode()),
                     (b"content-type", b"text/csv"),
                     (b"content-length", str(len(GOOD)).encode())], GOOD)
    assert (status, asked) == (413, 0)


def test_push_streaming_past_the_limit_is_413_and_lands_nothing(  # type: ignore[no-untyped-def]
    client_and_token, monkeypatch: pytest.MonkeyPatch
) -> None:
    client, token = client_and_token
    monkeypatch.setattr(feeds_api, "MAX_PUSH_BYTES", 40)
    before = _vintages(client)
    body = b"region,date,measure,value\n" + b"MA,2026-05-01,cases,7\n" * 4

    def chunks() -> Iterator[bytes]:  # no Content-Length: sent chunked
        yield body[:30]
        yield body[30:]

    response = client.post("/api/feeds/long-csv/push", content=chunks(),
                           headers={"Authorization": f"Bearer {token}"})
    assert response.status_code == 413
    assert "over the limit of 40 bytes" in response.json()["detail"]
    assert _vintages(client) == before


def _feed(source: HttpSource | PushSource) -> FeedDefinition:
    measures = (MeasureMap(measure="cases", source="cases"),)
    return FeedDefinition(name="f", source=source, measures=measures)


@pytest.mark.parametrize(
    ("source", "limit"),
    [
        pytest.param(HttpSource(url="http://127.0.0.1:9/x.csv", max_bytes=1234), 1234,
                     id="definition-max-bytes"),
        pytest.param(PushSource(), feeds_api.MAX_PUSH_BYTES, id="module-default"),
    ],
)
def test_push_limit_uses_the_definition_else_the_default(
    source: HttpSource | PushSource, limit: int
) -> None:
    assert feeds_api.push_limit(_feed(source)) == limit

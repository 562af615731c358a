"""The push endpoint: missing token, wrong token (401), wrong feed (404), a good push."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from server.config import Settings
from server.services.database import Database
from server.services.feeds import issue_token
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
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

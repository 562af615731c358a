"""The start-up check of the web app: data landed but never evaluated are evaluated at start."""

from __future__ import annotations

from pathlib import Path

from fastapi.testclient import TestClient

from server.config import Settings
from server.feeds.definition import load_feeds
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.evaluation import evaluation_behind
from server.services.feeds import ingest_recorded
from tests.server.conftest import cases_csv, seed_small_office
from web.app import create_app


def test_app_start_evaluates_data_a_killed_process_left(committed_db: Database,
                                                       tmp_path: Path) -> None:
    feeds = seed_small_office(committed_db, tmp_path)
    # what a process killed after its ingest's commit leaves: a vintage no run covers
    ingest_recorded(committed_db, feed=load_feeds(feeds)["long-csv"],
                    payload=Payload.from_bytes("push", cases_csv(20)), evaluate=False)
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'unused.db'}", secret_key="k" * 40,
                        feeds_file=feeds, scheduler=False)
    app = create_app(settings, database=committed_db)
    with TestClient(app):
        assert app.state.evaluations.wait_idle(60)
    with committed_db.sessions() as session:
        assert evaluation_behind(session=session) is None
    assert app.state.evaluations.failures == 0

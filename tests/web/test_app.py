"""create_app: background tasks run for the app's lifetime (how `serve` embeds the scheduler)."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from fastapi.testclient import TestClient

from server.cli.asgi import scheduler_task
from server.config import Settings
from server.services.database import Database
from web.app import create_app


def test_create_app_runs_background_tasks_for_its_lifetime(tmp_path: Path) -> None:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'a.db'}", secret_key="k" * 32)
    db = Database.from_settings(settings)
    db.upgrade()
    events: list[str] = []

    @contextmanager
    def task(given: Database) -> Iterator[None]:
        assert given is db
        events.append("start")
        yield
        events.append("stop")

    app = create_app(settings, database=db, background=[task])
    assert events == []
    with TestClient(app) as client:
        assert client.get("/healthz").status_code == 200
        assert events == ["start"]
    assert events == ["start", "stop"]
    db.dispose()


def test_scheduler_task_switched_off_starts_nothing(tmp_path: Path) -> None:
    settings = Settings(
        database_url=f"sqlite:///{tmp_path / 'b.db'}", secret_key="k" * 32, scheduler=False
    )
    db = Database.from_settings(settings)
    db.upgrade()
    with scheduler_task(settings)(db) as scheduler:
        assert scheduler is None
    db.dispose()

"""A burst of pushes against a real server on 127.0.0.1, on SQLite and PostgreSQL.

Every push is answered, every stored vintage is evaluated by the app's one evaluation worker,
and the connection pool (5 + 10 overflow) is not exhausted although more pushes than that run
at once on kept-alive connections.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pytest
import uvicorn
from fastapi import FastAPI
from sqlalchemy import func, select

from server.config import Settings
from server.services.database import Database
from server.services.evaluation import evaluation_behind
from server.services.feed_push import issue_token
from server.store.models import EvaluationRun, Vintage
from tests.server.conftest import cases_csv, seed_small_office
from web.app import create_app

log = logging.getLogger(__name__)

PUSHES = 50
CLIENTS = 25  # more at once than the pool's 15 connections


class _Server:
    """Uvicorn serving ``app`` on a free port of 127.0.0.1 in a thread."""

    def __init__(self, app: FastAPI) -> None:
        config = uvicorn.Config(app, host="127.0.0.1", port=0, log_level="warning",
                                ws="none", lifespan="on")
        self.server = uvicorn.Server(config)
        self.thread = threading.Thread(target=self.server.run, daemon=True)

    def __enter__(self) -> str:
        self.thread.start()
        deadline = time.monotonic() + 60
        while not self.server.started:
            assert time.monotonic() < deadline, "uvicorn did not start"
            time.sleep(0.05)
        port = self.server.servers[0].sockets[0].getsockname()[1]
        return f"http://127.0.0.1:{port}"

    def __exit__(self, *_exc: object) -> None:
        self.server.should_exit = True
        self.thread.join(60)


@pytest.fixture
def office(committed_db: Database, tmp_path: Path) -> Iterator[tuple[FastAPI, str]]:
    feeds = seed_small_office(committed_db, tmp_path)
    with committed_db.transaction() as session:
        token = issue_token(session=session, feed="long-csv", actor="test")
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'unused.db'}", secret_key="k" * 40,
                        feeds_file=feeds, scheduler=False)
    yield create_app(settings, database=committed_db), token


@pytest.mark.slow
def test_push_burst_is_answered_and_evaluated(
    office: tuple[FastAPI, str], committed_db: Database
) -> None:
    app, token = office
    answers: list[int] = []
    started = time.monotonic()

    with _Server(app) as base:
        def pushes(first: int) -> list[int]:
            # each client pushes on one kept-alive connection
            with httpx.Client(base_url=base, timeout=120) as client:
                return [client.post(
                    "/api/feeds/long-csv/push", content=cases_csv(30, value=k),
                    headers={"Authorization": f"Bearer {token}", "Content-Type": "text/csv"},
                ).status_code for k in range(first, PUSHES, CLIENTS)]

        with ThreadPoolExecutor(CLIENTS) as pool:
            for statuses in pool.map(pushes, range(CLIENTS)):
                answers.extend(statuses)
        worker = app.state.evaluations
        assert worker.wait_idle(180)
    with committed_db.sessions() as session:
        vintages = session.scalar(select(func.count()).select_from(Vintage))
        runs = session.scalar(select(func.count()).select_from(EvaluationRun))
        behind = evaluation_behind(session=session)
    log.info("%s: %d pushes, %d answered 201, %d vintages, %d evaluation runs, %d failed "
             "evaluations, %.1f s", committed_db.engine.dialect.name, PUSHES, answers.count(201),
             vintages, runs, worker.failures, time.monotonic() - started)
    assert answers == [201] * PUSHES
    assert behind is None  # every stored vintage evaluated
    assert vintages == PUSHES
    assert worker.failures == 0
    assert 1 <= runs < PUSHES  # coalesced: fewer evaluations than pushes

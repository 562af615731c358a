"""Committed databases (a fresh SQLite file or PostgreSQL schema per test) and a feed server."""

from __future__ import annotations

import os
import threading
import uuid
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest
from sqlalchemy import event, text

from server.services.database import Database
from server.store import make_engine, make_sessionmaker, upgrade

POSTGRES_URL = os.environ.get("TIERWISE_TEST_POSTGRES_URL")


@pytest.fixture(params=[
    pytest.param("sqlite", id="sqlite"),
    pytest.param("postgresql", id="postgresql", marks=[
        pytest.mark.postgres,
        pytest.mark.skipif(not POSTGRES_URL, reason="TIERWISE_TEST_POSTGRES_URL is not set")]),
])
def committed_db(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Database]:
    """A migrated database whose commits are real (the scheduler commits), dropped afterwards."""
    if request.param == "sqlite":
        engine = make_engine(f"sqlite:///{tmp_path / 'sched.db'}")
        schema = None
    else:
        assert POSTGRES_URL is not None
        schema = f"tw_sched_{uuid.uuid4().hex[:12]}"
        admin = make_engine(POSTGRES_URL)
        with admin.begin() as conn:
            conn.execute(text(f'CREATE SCHEMA "{schema}"'))
        admin.dispose()
        engine = make_engine(POSTGRES_URL)

        @event.listens_for(engine, "connect")
        def _path(dbapi_connection, _record):  # type: ignore[no-untyped-def]
            with dbapi_connection.cursor() as cursor:
                cursor.execute(f'SET search_path TO "{schema}"')
            dbapi_connection.commit()

    upgrade(engine)
    db = Database(engine=engine, sessions=make_sessionmaker(engine))
    try:
        yield db
    finally:
        engine.dispose()
        if schema is not None:
            admin = make_engine(POSTGRES_URL)  # type: ignore[arg-type]
            with admin.begin() as conn:
                conn.execute(text(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE'))
            admin.dispose()


class FeedServer:
    """Serves ``self.body`` with an ETag derived from ``self.version``; counts requests."""

    def __init__(self) -> None:
        self.body = b"region,date,measure,value\nSA,2026-03-01,cases,1\n"
        self.version = 1
        self.requests = 0
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *_args: object) -> None:
                return

            def do_GET(self) -> None:  # noqa: N802
                outer.requests += 1
                etag = f'"v{outer.version}"'
                if self.headers.get("If-None-Match") == etag:
                    self.send_response(304)
                    self.end_headers()
                    return
                self.send_response(200)
                self.send_header("ETag", etag)
                self.send_header("Content-Length", str(len(outer.body)))
                self.end_headers()
                self.wfile.write(outer.body)

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.httpd.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}/cases.csv"
        threading.Thread(target=self.httpd.serve_forever, daemon=True).start()

    def publish(self, body: bytes) -> None:
        self.body = body
        self.version += 1


@pytest.fixture
def feed_server() -> Iterator[FeedServer]:
    server = FeedServer()
    try:
        yield server
    finally:
        server.httpd.shutdown()
        server.httpd.server_close()

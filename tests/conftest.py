"""Shared fixtures: a migrated database on SQLite and, when configured, on PostgreSQL.

Every store test runs on both back ends. CI sets ``TIERWISE_TEST_POSTGRES_URL``; the PostgreSQL
variant is skipped only when it is unset. Each test runs inside an outer transaction that is rolled
back (the SQLAlchemy "join a session into an external transaction" recipe), so tests never see each
other's rows.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import Engine, event, text
from sqlalchemy.orm import Session

from server.store import make_engine, upgrade

POSTGRES_URL = os.environ.get("TIERWISE_TEST_POSTGRES_URL")

BACKENDS = [
    pytest.param("sqlite", id="sqlite"),
    pytest.param(
        "postgresql",
        id="postgresql",
        marks=[
            pytest.mark.postgres,
            pytest.mark.skipif(not POSTGRES_URL, reason="TIERWISE_TEST_POSTGRES_URL is not set"),
        ],
    ),
]


def postgres_engine_in_fresh_schema(url: str) -> tuple[Engine, str]:
    """An engine whose search_path is a new, empty schema (so parallel runs never collide)."""
    schema = f"tw_test_{uuid.uuid4().hex[:12]}"
    admin = make_engine(url)
    with admin.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    admin.dispose()
    engine = make_engine(url)

    @event.listens_for(engine, "connect")
    def _search_path(dbapi_connection, _record):  # type: ignore[no-untyped-def]
        with dbapi_connection.cursor() as cursor:
            cursor.execute(f'SET search_path TO "{schema}"')
        dbapi_connection.commit()

    return engine, schema


def drop_schema(url: str, schema: str) -> None:
    admin = make_engine(url)
    with admin.begin() as conn:
        conn.execute(text(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE'))
    admin.dispose()


@pytest.fixture(scope="session", params=BACKENDS)
def migrated_engine(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    """A database brought to the newest migration, once per back end per test session."""
    if request.param == "sqlite":
        path: Path = tmp_path_factory.mktemp("db") / "tierwise-test.db"
        engine = make_engine(f"sqlite:///{path}")
        upgrade(engine)
        yield engine
        engine.dispose()
        return
    assert POSTGRES_URL is not None
    engine, schema = postgres_engine_in_fresh_schema(POSTGRES_URL)
    try:
        upgrade(engine)
        yield engine
    finally:
        engine.dispose()
        drop_schema(POSTGRES_URL, schema)


@pytest.fixture
def session(migrated_engine: Engine) -> Iterator[Session]:
    """A session inside an outer transaction that is rolled back after the test."""
    connection = migrated_engine.connect()
    outer = connection.begin()
    db = Session(bind=connection, join_transaction_mode="create_savepoint", expire_on_commit=False)
    try:
        yield db
    finally:
        db.close()
        outer.rollback()
        connection.close()

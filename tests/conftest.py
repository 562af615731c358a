"""Shared fixtures: a migrated database on SQLite and, when configured, on PostgreSQL.

Every store test runs on both back ends. CI sets ``TIERWISE_TEST_POSTGRES_URL``; the PostgreSQL
variant is skipped only when it is unset. Each test runs inside an outer transaction that is rolled
back (the SQLAlchemy "join a session into an external transaction" recipe), so tests never see each
other's rows.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import Engine
from sqlalchemy.orm import Session

from server.services.database import Database
from server.store import make_sessionmaker, scratch_engine, upgrade

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


@pytest.fixture(scope="session", params=BACKENDS)
def migrated_engine(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    """A database brought to the newest migration, once per back end per test session."""
    if request.param == "sqlite":
        path: Path = tmp_path_factory.mktemp("db") / "tierwise-test.db"
        url = f"sqlite:///{path}"
    else:
        assert POSTGRES_URL is not None
        url = POSTGRES_URL
    with scratch_engine(url, prefix="tw_test") as engine:
        upgrade(engine)
        yield engine


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


@pytest.fixture(params=BACKENDS)
def committed_db(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Database]:
    """A migrated database whose commits are real (a fresh SQLite file or PostgreSQL schema per
    test, dropped afterwards): for the scheduler, crash and concurrency tests."""
    url = f"sqlite:///{tmp_path / 'committed.db'}" if request.param == "sqlite" else POSTGRES_URL
    assert url is not None
    with scratch_engine(url, prefix="tw_commit") as engine:
        upgrade(engine)
        yield Database(engine=engine, sessions=make_sessionmaker(engine))


@pytest.fixture(scope="session")
def lead_policy_demo_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The invented demo county (150 days to 30 Nov 2026, seed 7) with its lead policy alone,
    seeded once per session for the web tests (``demo_file``) and the service and CLI tests
    (``demo_source``) alike; never written to: copy it first."""
    from datetime import date

    from demo_seed.seed import seed_demo
    from server.config import Settings

    path = tmp_path_factory.mktemp("demo-lead-policy") / "demo.db"
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    try:
        seed_demo(db, days=150, end=date(2026, 11, 30), policies=())  # the lead policy alone
    finally:
        db.dispose()
    return path


@pytest.fixture(scope="session")
def several_policies_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The invented demo county (150 days to 30 Nov 2026) with its three district policies active
    at once (county, influenza, RSV; the demo's area-level hospital policy is left out here and
    tested in tests/demo_seed) and the invented office's history under each: every district
    decided and published, the newest changes pending. Seeded once per session; copy it before
    writing to it."""
    from datetime import date

    from demo_seed.seed import seed_demo
    from server.config import Settings

    path = tmp_path_factory.mktemp("several-policies") / "demo.db"
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    try:
        seed_demo(db, days=150, end=date(2026, 11, 30), history=True,
                  policies=("influenza.yaml", "rsv.yaml"))
    finally:
        db.dispose()
    return path

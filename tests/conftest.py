"""Shared fixtures: a migrated database on SQLite and, when configured, on PostgreSQL.

Every store test runs on both back ends. CI sets ``TIERWISE_TEST_POSTGRES_URL``; the PostgreSQL
variant is skipped only when it is unset. Each test runs inside an outer transaction that is rolled
back (the SQLAlchemy "join a session into an external transaction" recipe), so tests never see each
other's rows.

Under pytest-xdist (``pytest -n auto``, as CI runs the suite) each worker has a PostgreSQL database
of its own (``<database>_gw0``, ...), and the seeded demo files are seeded once for all workers.
"""

from __future__ import annotations

import fcntl
import os
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from sqlalchemy import Engine
from sqlalchemy.orm import Session

from server.services.database import Database
from server.store import make_sessionmaker, scratch_engine, upgrade


def _worker_database(url: str | None) -> str | None:
    """``url`` itself, or under pytest-xdist a database of this worker's own next to it
    (created when missing): PostgreSQL's advisory locks (the scheduler's lease, the evaluation
    and stamp locks) belong to a database, not to a schema, so workers sharing one database
    would meet in them although every test has a schema of its own (``scratch_engine``)."""
    worker = os.environ.get("PYTEST_XDIST_WORKER")
    if not url or not worker:
        return url
    from sqlalchemy import create_engine, make_url, text
    from sqlalchemy.exc import DBAPIError

    parsed = make_url(url)
    name = f"{parsed.database}_{worker}"
    admin = create_engine(parsed, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as connection:
            exists = text("SELECT 1 FROM pg_database WHERE datname = :n")
            if connection.scalar(exists, {"n": name}) is None:
                try:
                    connection.execute(text(f'CREATE DATABASE "{name}"'))
                except DBAPIError:  # another run's worker of the same name created it first
                    if connection.scalar(exists, {"n": name}) is None:
                        raise
    finally:
        admin.dispose()
    return parsed.set(database=name).render_as_string(hide_password=False)


POSTGRES_URL = _worker_database(os.environ.get("TIERWISE_TEST_POSTGRES_URL"))

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


def seeded_once(tmp_path_factory: pytest.TempPathFactory, name: str,
                seed: Callable[[Path], None]) -> Path:
    """The file ``seed`` writes, made once per test session: under pytest-xdist once for all
    workers (in the run's shared temporary folder, under a lock; the others wait and reuse it)."""
    if os.environ.get("PYTEST_XDIST_WORKER") is None:
        path = tmp_path_factory.mktemp(name) / "demo.db"
        seed(path)
        return path
    folder = tmp_path_factory.getbasetemp().parent / name  # shared by this run's workers
    folder.mkdir(exist_ok=True)
    path = folder / "demo.db"
    with (folder / "lock").open("w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        if not (folder / "done").exists():
            path.unlink(missing_ok=True)
            seed(path)
            (folder / "done").touch()
    return path


@pytest.fixture(scope="session")
def lead_policy_demo_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The invented demo county (150 days to 30 Nov 2026, seed 7) with its lead policy alone,
    seeded once per session for the web tests (``demo_file``) and the service and CLI tests
    (``demo_source``) alike; never written to: copy it first."""
    from datetime import date

    from demo_seed.seed import seed_demo
    from server.config import Settings

    def seed(path: Path) -> None:
        db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
        try:
            seed_demo(db, days=150, end=date(2026, 11, 30), policies=())  # the lead policy alone
        finally:
            db.dispose()

    return seeded_once(tmp_path_factory, "demo-lead-policy", seed)


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

    def seed(path: Path) -> None:
        db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
        try:
            seed_demo(db, days=150, end=date(2026, 11, 30), history=True,
                      policies=("influenza.yaml", "rsv.yaml"))
        finally:
            db.dispose()

    return seeded_once(tmp_path_factory, "several-policies", seed)

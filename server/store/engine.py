"""Engines and sessions for SQLite (WAL mode) and PostgreSQL (psycopg 3)."""

from __future__ import annotations

import sqlite3
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event, make_url, text
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session, sessionmaker

from server.store.errors import DatabaseUnavailableError


def _sqlite_pragmas(dbapi_connection: sqlite3.Connection, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=NORMAL")
    # Writers queue for the write lock (pushes landing at once, an evaluation): wait up to 30 s,
    # as the driver's own timeout does, instead of failing with "database is locked".
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.close()


def make_engine(url: str, *, echo: bool = False) -> Engine:
    """Build an engine for ``url``; a SQLite file's folder is created when missing.

    SQLite connections run in WAL mode with foreign keys on. ``postgresql://`` URLs are routed to
    the psycopg 3 driver.
    """
    parsed = make_url(url)
    kwargs: dict[str, Any] = {"echo": echo}
    if parsed.get_backend_name() == "sqlite":
        database = parsed.database or ""
        if database and database != ":memory:":
            Path(database).expanduser().parent.mkdir(parents=True, exist_ok=True)
        kwargs["connect_args"] = {"timeout": 30}
    elif parsed.get_backend_name() == "postgresql" and parsed.drivername == "postgresql":
        parsed = parsed.set(drivername="postgresql+psycopg")
    engine = create_engine(parsed, pool_pre_ping=True, **kwargs)
    if parsed.get_backend_name() == "sqlite":
        event.listen(engine, "connect", _sqlite_pragmas)
    return engine


def make_sessionmaker(engine: Engine) -> sessionmaker[Session]:
    """Sessions that do not expire objects on commit (templates read them after the request)."""
    return sessionmaker(engine, expire_on_commit=False)


def check_connection(engine: Engine) -> None:
    """Raise :class:`DatabaseUnavailableError` with one readable line if the database is down."""
    try:
        with engine.connect() as connection:
            connection.execute(text("SELECT 1"))
    except OperationalError as exc:
        reason = str(exc.orig).strip().splitlines()[0] if exc.orig else str(exc)
        raise DatabaseUnavailableError(
            engine.url.render_as_string(hide_password=True), reason
        ) from None


@contextmanager
def scratch_engine(url: str, *, prefix: str = "tw_scratch") -> Iterator[Engine]:
    """An engine on a throw-away schema, for tests and benchmarks.

    On PostgreSQL a new schema named ``<prefix>_<random>`` is created, every connection of the
    engine uses it (``search_path``), and it is dropped with everything in it at the end, so
    parallel runs on one database never meet. SQLite URLs are used as they are.
    """
    if make_url(url).get_backend_name() != "postgresql":
        engine = make_engine(url)
        try:
            yield engine
        finally:
            engine.dispose()
        return
    schema = f"{prefix}_{uuid.uuid4().hex[:12]}"
    admin = make_engine(url)
    try:
        with admin.begin() as connection:
            connection.execute(text(f'CREATE SCHEMA "{schema}"'))
        engine = make_engine(url)

        @event.listens_for(engine, "connect")
        def _search_path(dbapi_connection: Any, _record: Any) -> None:
            with dbapi_connection.cursor() as cursor:
                cursor.execute(f'SET search_path TO "{schema}"')
            dbapi_connection.commit()

        try:
            yield engine
        finally:
            engine.dispose()
            with admin.begin() as connection:
                connection.execute(text(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE'))
    finally:
        admin.dispose()

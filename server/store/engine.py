"""Engines and sessions for SQLite (WAL mode) and PostgreSQL (psycopg 3)."""

from __future__ import annotations

import sqlite3
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
    cursor.execute("PRAGMA busy_timeout=10000")
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

"""Engines: SQLite in WAL mode, a database that does not answer gives one clear line."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import text

from server.store import DatabaseUnavailableError, check_connection, make_engine


def test_make_engine_sqlite_uses_wal(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'sub' / 'x.db'}")
    with engine.connect() as conn:
        assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1
    engine.dispose()


def test_check_connection_unreachable_postgres_is_one_line() -> None:
    engine = make_engine("postgresql+psycopg://nobody@127.0.0.1:1/nothing?connect_timeout=2")
    with pytest.raises(
        DatabaseUnavailableError, match=r"^cannot reach the database at .*127\.0\.0\.1:1"
    ) as info:
        check_connection(engine)
    assert "\n" not in str(info.value)

"""Migrations and models agree, on SQLite and PostgreSQL."""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Engine

from server.store import current_revision, head_revision
from server.store.models import Base


def test_upgrade_reaches_head(migrated_engine: Engine) -> None:
    assert current_revision(migrated_engine) == head_revision(migrated_engine)


def test_migrations_match_models(migrated_engine: Engine) -> None:
    with migrated_engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        diff = compare_metadata(context, Base.metadata)
    assert diff == []
